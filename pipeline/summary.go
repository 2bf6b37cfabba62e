package pipeline

import (
	"bufio"
	"context"
	"encoding/json"
	"fmt"
	"io"
)

// Summaries seal stage items (see doneRecord). They are the only thing a
// later stage, the commit and the manifest read of an item besides its data
// files, so each holds what those need and nothing that varies between runs.

// Reason names. Their order, and what each applies to, is defined once, by
// ReasonDefs; everything else that lists reasons (the funnel, the summary,
// show, report, the quarantine, the manifest's JSON Schema, the tests)
// derives from it or is checked against it.
const (
	Oversize  = "oversize"
	Truncated = "truncated"
	// Stale is SPEC §7.4's first reason for a recording's tick.
	Stale             = "stale"
	Malformed         = "malformed"
	UnknownEmbodiment = "unknown_embodiment"
	DimMismatch       = "dim_mismatch"
	NonFinite         = "non_finite"
	OutOfRange        = "out_of_range"
	ImageMissing      = "image_missing"
	ImageCorrupt      = "image_corrupt"
	TimeRegress       = "time_regress"
	Duplicate         = "duplicate"
	Conflict          = "conflict"
	ShortEpisode      = "short_episode"
)

// ReasonDef describes one drop reason: which stage decides it and which
// input kinds it can apply to.
type ReasonDef struct {
	Name string
	// Stage is StageIngest or StageEpisodes.
	Stage string
	// Lines: it can drop a JSON Lines line (SPEC §3.1); Ticks: a
	// recording's tick (§7.4). Episode-stage reasons apply to both.
	Lines, Ticks bool
	// Rule is the SPEC section that defines it.
	Rule string
}

// ReasonDefs lists every drop reason once, in report order: SPEC §3.1's
// check order with §7.4's stale merged in before malformed (the one order
// consistent with both tables), then the episode-stage drops of §3.2. Each
// call returns a fresh slice.
func ReasonDefs() []ReasonDef {
	return []ReasonDef{
		{Oversize, StageIngest, true, false, "3.1"},
		{Truncated, StageIngest, true, false, "3.1"},
		{Stale, StageIngest, false, true, "7.4"},
		{Malformed, StageIngest, true, true, "3.1, 7.4"},
		{UnknownEmbodiment, StageIngest, true, false, "3.1"},
		{DimMismatch, StageIngest, true, true, "3.1, 7.4"},
		{NonFinite, StageIngest, true, true, "3.1, 7.4"},
		{OutOfRange, StageIngest, true, true, "3.1, 7.4"},
		{ImageMissing, StageIngest, true, false, "3.1"},
		{ImageCorrupt, StageIngest, true, true, "3.1, 7.4"},
		{TimeRegress, StageIngest, true, false, "3.1"},
		{Duplicate, StageEpisodes, true, true, "3.2"},
		{Conflict, StageEpisodes, true, true, "3.2"},
		{ShortEpisode, StageEpisodes, true, true, "3.2"},
	}
}

// Reasons lists every drop reason in report order (the names of
// ReasonDefs).
func Reasons() []string {
	defs := ReasonDefs()
	out := make([]string, len(defs))
	for i, d := range defs {
		out[i] = d.Name
	}
	return out
}

// Reasons a recording is skipped whole (SPEC §7.1).
const (
	SkipUnreadable        = "unreadable"
	SkipNoUnit            = "no_unit"
	SkipUnknownEmbodiment = "unknown_embodiment"
)

// SkipReasons lists the skip reasons in the order they apply (SPEC §7.1):
// the first that applies is a skipped recording's reason.
func SkipReasons() []string {
	return []string{SkipUnreadable, SkipNoUnit, SkipUnknownEmbodiment}
}

// RecordingSummary is what ingest learned of one recording (SPEC §7.6).
type RecordingSummary struct {
	Unit       string `json:"unit"`
	Embodiment string `json:"embodiment"`
	Ticks      int64  `json:"ticks"`
	// Messages counts decodable messages read per topic (frame, events,
	// task and success topics); Undecodable the others.
	Messages    map[string]int64 `json:"messages"`
	Undecodable map[string]int64 `json:"undecodable"`
	// StaleBy counts the stale ticks per topic: the first stale source's
	// topic in frames order (obs, act, cameras). Beyond SPEC: "stale" alone
	// does not tell an operator which sensor stopped.
	StaleBy map[string]int64 `json:"stale_by"`
}

// IngestSummary seals one ingested object.
type IngestSummary struct {
	Key     string           `json:"key"`
	Bytes   int64            `json:"bytes"`
	SHA256  string           `json:"sha256"`
	ETag    string           `json:"etag,omitempty"`
	Version string           `json:"version_id,omitempty"`
	Lines   int64            `json:"lines"`
	Kept    int64            `json:"kept"`
	Dropped map[string]int64 `json:"dropped"`
	// DroppedByUnit splits Dropped by the line's unit; "" holds lines whose
	// unit could not be read (oversize, truncated, malformed).
	DroppedByUnit map[string]map[string]int64 `json:"dropped_by_unit"`
	Incomplete    bool                        `json:"incomplete"`
	// Quarantine is the work key of this object's dropped lines, when the
	// config asks for a quarantine and a line was dropped.
	Quarantine string `json:"quarantine,omitempty"`
	// Recording is set for a recording that was read (SPEC §7.6); Skipped
	// names the reason a recording was skipped whole (§7.1). Both are
	// absent for JSON Lines.
	Recording *RecordingSummary `json:"recording,omitempty"`
	Skipped   string            `json:"skipped,omitempty"`
	// Runs lists, per partition (five-digit name), the work keys of the
	// sorted runs holding this object's accepted frames.
	Runs map[string][]string `json:"runs"`
	// PartFrames counts the accepted frames per partition (the size of the
	// episodes work it makes).
	PartFrames map[string]int64 `json:"part_frames"`
}

// EpisodeInfo indexes one episode of a partition.
type EpisodeInfo struct {
	ID         string `json:"id"`
	Unit       string `json:"unit"`
	Embodiment string `json:"embodiment"`
	Steps      int    `json:"steps"`
}

// EpisodesSummary seals one partition's episodes.
type EpisodesSummary struct {
	Partition int    `json:"partition"`
	File      string `json:"file"` // work key of the episode stream, sorted by (episode, step)
	Frames    int64  `json:"frames"`
	// Episodes counts the partition's episodes; Index is the work key of
	// their list in file order (by id), written by WriteEpisodeIndex. The
	// list is not in the summary itself: every stage's summaries are held
	// for the whole run, and a partition may hold millions of episodes.
	Episodes int64  `json:"episodes"`
	Index    string `json:"index"`
	// Dropped counts the frames this stage dropped, per source key and reason.
	Dropped map[string]map[string]int64 `json:"dropped"`
	// DroppedByUnit counts them per unit and reason.
	DroppedByUnit map[string]map[string]int64 `json:"dropped_by_unit"`
	// Units counts the kept frames per unit.
	Units map[string]int64 `json:"units"`
	// Quarantine is the work key of the frames this stage dropped, when the
	// config asks for a quarantine and a frame was dropped.
	Quarantine string `json:"quarantine,omitempty"`
}

// GoalsSummary seals one partition's goals.
type GoalsSummary struct {
	Partition int    `json:"partition"`
	File      string `json:"file"`
	Pairs     int64  `json:"pairs"`
	// PerStrategy counts pairs by strategy name.
	PerStrategy map[string]int64 `json:"per_strategy"`
}

// PackedFile is one Parquet shard written by pack, before commit.
type PackedFile struct {
	Path      string `json:"path"` // relative to the version folder
	Work      string `json:"work"` // work key of the file
	Table     string `json:"table"`
	Split     string `json:"split"`
	Partition int    `json:"partition"`
	Rows      int64  `json:"rows"`
	Episodes  int64  `json:"episodes"`
	Bytes     int64  `json:"bytes"`
	SHA256    string `json:"sha256"`
}

// Count is one (embodiment, split) cell of episodes, frames and pairs.
type Count struct {
	Embodiment string `json:"embodiment"`
	Split      string `json:"split"`
	Episodes   int64  `json:"episodes"`
	Frames     int64  `json:"frames"`
	Pairs      int64  `json:"pairs"`
}

// Moments accumulates count, mean, sum of squared deviations, min and max per
// dimension (Welford's online algorithm; partitions are combined with Chan et
// al.'s pairwise update, always in partition order so the result is the same
// whatever ran first).
type Moments struct {
	N    int64     `json:"n"`
	Mean []float64 `json:"mean"`
	M2   []float64 `json:"m2"`
	Min  []float64 `json:"min"`
	Max  []float64 `json:"max"`
}

// Add accumulates one vector.
func (m *Moments) Add(x []float64) {
	if m.N == 0 {
		m.Mean = make([]float64, len(x))
		m.M2 = make([]float64, len(x))
		m.Min = append([]float64(nil), x...)
		m.Max = append([]float64(nil), x...)
	}
	m.N++
	n := float64(m.N)
	for i, v := range x {
		d := v - m.Mean[i]
		m.Mean[i] += d / n
		m.M2[i] += d * (v - m.Mean[i])
		m.Min[i] = min(m.Min[i], v)
		m.Max[i] = max(m.Max[i], v)
	}
}

// Merge folds o into m (Chan, Golub and LeVeque's pairwise combination).
func (m *Moments) Merge(o *Moments) {
	if o == nil || o.N == 0 {
		return
	}
	if m.N == 0 {
		*m = Moments{N: o.N, Mean: append([]float64(nil), o.Mean...), M2: append([]float64(nil), o.M2...),
			Min: append([]float64(nil), o.Min...), Max: append([]float64(nil), o.Max...)}
		return
	}
	na, nb := float64(m.N), float64(o.N)
	n := na + nb
	for i := range m.Mean {
		d := o.Mean[i] - m.Mean[i]
		m.Mean[i] += d * nb / n
		m.M2[i] += o.M2[i] + d*d*na*nb/n
		m.Min[i] = min(m.Min[i], o.Min[i])
		m.Max[i] = max(m.Max[i], o.Max[i])
	}
	m.N += o.N
}

// PackSummary seals one partition's shards.
type PackSummary struct {
	Partition int          `json:"partition"`
	Files     []PackedFile `json:"files"`
	Counts    []Count      `json:"counts"`
	// Obs and Act hold the train split's moments per embodiment.
	Obs map[string]*Moments `json:"obs"`
	Act map[string]*Moments `json:"act"`
	// Offsets counts pairs by strategy and goal offset, for reports;
	// Reached counts those whose goal was reached.
	Offsets map[string]map[int32]int64 `json:"offsets,omitempty"`
	Reached map[string]map[int32]int64 `json:"reached,omitempty"`
	// Steps counts episodes by embodiment and length.
	Steps map[string]map[int]int64 `json:"steps"`
	// SourceFiles lists, per source key, the frames files holding its frames.
	SourceFiles map[string][]string `json:"source_files"`
}

// PartName is the five-digit partition name used in keys and file names.
func PartName(p int) string { return fmt.Sprintf("%05d", p) }

// SourceSummary is an ingest summary with the duplicate decision made.
type SourceSummary struct {
	IngestSummary
	DuplicateOf string
}

// IngestSummaries decodes the sealed ingest items (in key order) and marks
// every object whose SHA-256 equals an earlier object's as its duplicate.
func Sources(sealed []Sealed) ([]SourceSummary, error) {
	out := make([]SourceSummary, len(sealed))
	first := map[string]string{}
	for i, s := range sealed {
		if err := json.Unmarshal(s.Summary, &out[i].IngestSummary); err != nil {
			return nil, fmt.Errorf("ingest %s: summary: %w", s.Item.ID, err)
		}
		o := &out[i]
		if k, ok := first[o.SHA256]; ok {
			o.DuplicateOf = k
		} else {
			first[o.SHA256] = o.Key
		}
	}
	return out, nil
}

// AddCount adds n to m[a][b], making the inner map when needed.
func AddCount[K comparable](m map[string]map[K]int64, a string, b K, n int64) {
	in := m[a]
	if in == nil {
		in = map[K]int64{}
		m[a] = in
	}
	in[b] += n
}

// WriteEpisodeIndex stores a partition's episode list as JSON Lines, one
// EpisodeInfo per line.
func WriteEpisodeIndex(ctx context.Context, work Store, key string, infos []EpisodeInfo) error {
	up, err := work.Create(ctx, key)
	if err != nil {
		return err
	}
	bw := bufio.NewWriterSize(up, 256<<10)
	enc := json.NewEncoder(bw)
	for i := range infos {
		if err := enc.Encode(&infos[i]); err != nil {
			up.Abort()
			return fmt.Errorf("write %s: %w", JoinURI(work.URI(), key), err)
		}
	}
	if err := bw.Flush(); err != nil {
		up.Abort()
		return fmt.Errorf("write %s: %w", JoinURI(work.URI(), key), err)
	}
	return up.Commit(false)
}

// ReadEpisodeIndex reads back a list WriteEpisodeIndex stored.
func ReadEpisodeIndex(ctx context.Context, work Store, key string) ([]EpisodeInfo, error) {
	rc, err := work.Open(ctx, key, 0)
	if err != nil {
		return nil, err
	}
	defer rc.Close()
	var infos []EpisodeInfo
	dec := json.NewDecoder(bufio.NewReaderSize(rc, 256<<10))
	for {
		var e EpisodeInfo
		if err := dec.Decode(&e); err == io.EOF {
			return infos, nil
		} else if err != nil {
			return nil, fmt.Errorf("read %s: %w", JoinURI(work.URI(), key), err)
		}
		infos = append(infos, e)
	}
}
