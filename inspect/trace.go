package inspect

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"slices"
	"sort"
	"strconv"
	"strings"

	"github.com/parquet-go/parquet-go"

	"hindcast/pipeline"
)

// TraceQuery asks for the lineage of one thing in a dataset version. Exactly
// one of Source, Episode or File (with Row) is set.
type TraceQuery struct {
	// Source is an object key relative to the manifest's source_root, or
	// the object's full URI.
	Source string `json:"source,omitempty"`
	// Episode is an episode id, <unit>-<t of its first frame> (SPEC §3.2).
	Episode string `json:"episode,omitempty"`
	// File is a shard's path relative to the version folder, Row a 0-based
	// row index in it.
	File string `json:"file,omitempty"`
	Row  int64  `json:"row"`
}

// Trace answer kinds.
const (
	TraceKindSource  = "source"
	TraceKindEpisode = "episode"
	TraceKindRow     = "row"
)

// TraceResult is the answer to a TraceQuery. Files and Episodes are always
// present (empty, not null, when nothing matched), so a script can iterate
// them without checking.
type TraceResult struct {
	Query   TraceQuery `json:"query"`
	Kind    string     `json:"kind"`
	Dataset string     `json:"dataset"`
	Version string     `json:"version"`
	// Source is the queried object as the manifest records it (source
	// queries only).
	Source *TraceSource `json:"source,omitempty"`
	// TickSources lists the recordings among the answer's sources, sorted:
	// their src_line is a tick's 1-based index, not a line.
	TickSources []string `json:"tick_sources,omitempty"`
	// Row is the queried row (file + row queries only).
	Row *TraceRow `json:"row,omitempty"`
	// Files lists every shard holding rows of the answer, by path. For a
	// source, its frames rows and every pairs row holding one of its
	// frames as step, next step or goal.
	Files []TraceFile `json:"files"`
	// Episodes lists the episodes of the answer, by id, with the source
	// object and line of each of their steps (for a source query, only the
	// steps that came from that source).
	Episodes []TraceEpisode `json:"episodes"`
	// Cost says what the lookup read: it is meant to be a small part of the
	// files it opened.
	Cost TraceCost `json:"cost"`
	// Dropped lists the source's dropped lines from the version's
	// quarantine (source queries on a version with a quarantine; the CLI
	// fills it).
	Dropped []QuarantinedLine `json:"dropped,omitempty"`
}

// TraceSource is a source object's manifest entry, in short.
type TraceSource struct {
	Key         string  `json:"key"`
	URI         string  `json:"uri"`
	Lines       int64   `json:"lines"`
	Kept        int64   `json:"kept"`
	DuplicateOf *string `json:"duplicate_of"`
	Incomplete  bool    `json:"incomplete"`
	// Recording is a recording's entry (SPEC §7.6): its lines are ticks
	// and a src_line is a tick's index. Skipped says why a recording was
	// skipped whole.
	Recording *pipeline.RecordingSummary `json:"recording,omitempty"`
	Skipped   string                     `json:"skipped,omitempty"`
}

// TraceFile is one shard and the rows of it that the answer covers.
type TraceFile struct {
	Path      string `json:"path"` // relative to the version folder
	Table     string `json:"table"`
	Split     string `json:"split"`
	Partition int    `json:"partition"`
	// Rows are half-open [start, end) ranges of 0-based row indexes, sorted.
	Rows [][2]int64 `json:"rows"`
	// Episodes are the ids of the episodes those rows belong to, sorted.
	Episodes []string `json:"episodes"`
}

// TraceEpisode is one episode and where its steps came from.
type TraceEpisode struct {
	ID        string      `json:"id"`
	Unit      string      `json:"unit"`
	Split     string      `json:"split"`
	Partition int         `json:"partition"`
	Steps     []TraceStep `json:"steps"`
}

// TraceStep is a step of an episode and the source line it was read from.
type TraceStep struct {
	Step    int32  `json:"step"`
	Src     string `json:"src"`      // object key relative to the source root
	SrcLine int64  `json:"src_line"` // 1-based physical line
}

// TraceRow is one row of a shard and its lineage.
type TraceRow struct {
	Path     string `json:"path"`
	Table    string `json:"table"`
	Row      int64  `json:"row"`
	RowGroup int    `json:"row_group"`
	Episode  string `json:"episode"`
	Unit     string `json:"unit"`
	Step     int32  `json:"step"`
	T        int64  `json:"t"`
	Src      string `json:"src"`
	SrcLine  int64  `json:"src_line"`
	SrcURI   string `json:"src_uri"`
	// Goal is the pairs row's goal and the frame it was taken from (pairs
	// rows only).
	Goal *TraceGoal `json:"goal,omitempty"`
}

// TraceGoal is a pairs row's goal: the frame it names and that frame's
// source line.
type TraceGoal struct {
	Strategy string `json:"strategy"`
	Episode  string `json:"episode"`
	Step     int32  `json:"step"`
	Offset   int32  `json:"offset"` // −1 for negative goals (SPEC §4)
	Src      string `json:"src"`
	SrcLine  int64  `json:"src_line"`
}

// TraceCost counts what a lookup read from the version's store.
type TraceCost struct {
	Files     int   `json:"files"`      // Parquet files opened
	FileBytes int64 `json:"file_bytes"` // their total size
	Bytes     int64 `json:"bytes"`      // bytes read from them
	Requests  int64 `json:"requests"`   // ranged reads (Store.Open calls)
}

// Trace answers a lineage query from the manifest and the shards' Parquet
// metadata: row-group statistics and page indexes of the sorted episode
// column (and, when several files must be searched, its bloom filters)
// name the few row groups and pages to read, and only the columns the
// answer needs are read from them.
func Trace(ctx context.Context, v *pipeline.Version, q TraceQuery) (*TraceResult, error) {
	kinds := 0
	for _, set := range []bool{q.Source != "", q.Episode != "", q.File != ""} {
		if set {
			kinds++
		}
	}
	switch {
	case q.File == "" && q.Row != 0:
		return nil, errors.New("trace: a row needs a file")
	case kinds == 0:
		return nil, errors.New("trace: give a source, an episode, or a file and a row")
	case kinds > 1:
		return nil, errors.New("trace: give only one of a source, an episode, or a file and a row")
	}
	t := newTracer(ctx, v)
	defer t.close()
	res := &TraceResult{Query: q, Dataset: v.Manifest.Dataset, Version: v.Manifest.Version,
		Files: []TraceFile{}, Episodes: []TraceEpisode{}}
	var err error
	switch {
	case q.Source != "":
		res.Kind = TraceKindSource
		err = t.source(res, q.Source)
	case q.Episode != "":
		res.Kind = TraceKindEpisode
		err = t.episodeQuery(res, q.Episode)
	default:
		res.Kind = TraceKindRow
		err = t.row(res, q.File, q.Row)
	}
	if err != nil {
		return nil, fmt.Errorf("trace %s: %w", v.URI, err)
	}
	res.Cost = t.cost()
	res.TickSources = trTickSources(v.Manifest, res)
	sort.Slice(res.Files, func(i, j int) bool { return res.Files[i].Path < res.Files[j].Path })
	sort.Slice(res.Episodes, func(i, j int) bool {
		a, b := res.Episodes[i], res.Episodes[j]
		if a.ID != b.ID {
			return a.ID < b.ID
		}
		return a.Unit < b.Unit
	})
	return res, nil
}

// trConfig is the part of the manifest's resolved config that places an
// episode in a file (SPEC §3.4).
type trConfig struct {
	Partitions int                  `json:"partitions"`
	Splits     pipeline.SplitConfig `json:"splits"`
	SplitBy    string               `json:"split_by"`
	Goals      struct {
		// Negative is nil when the manifest's config does not say.
		Negative *int `json:"negative"`
	} `json:"goals"`
}

// negatives reports whether the version may hold negative goals: unless its
// config says there are none, a lookup must expect them.
func (t *trTracer) negatives() bool {
	n := t.cfg.Goals.Negative
	return n == nil || *n > 0
}

func (c trConfig) usable() bool {
	return c.Partitions > 0 && (c.SplitBy == "episode" || c.SplitBy == "unit") &&
		c.Splits.Train >= 0 && c.Splits.Val >= 0 && c.Splits.Test >= 0 && c.Splits.Train+c.Splits.Val+c.Splits.Test > 0
}

type trTracer struct {
	ctx    context.Context
	v      *pipeline.Version
	cfg    trConfig
	cfgOK  bool
	byPath map[string]pipeline.File
	open   map[string]*trFile
}

func newTracer(ctx context.Context, v *pipeline.Version) *trTracer {
	t := &trTracer{ctx: ctx, v: v, byPath: map[string]pipeline.File{}, open: map[string]*trFile{}}
	if err := json.Unmarshal(v.Manifest.Config, &t.cfg); err == nil {
		t.cfgOK = t.cfg.usable()
	}
	for _, f := range v.Manifest.Files {
		t.byPath[f.Path] = f
	}
	return t
}

func (t *trTracer) close() {
	for _, f := range t.open {
		f.ra.Close()
	}
}

func (t *trTracer) cost() TraceCost {
	var c TraceCost
	for _, f := range t.open {
		c.Files++
		c.FileBytes += f.ra.size
		c.Bytes += f.ra.read
		c.Requests += f.ra.opens
	}
	return c
}

// file opens (once) the shard at path, which must be in the manifest.
func (t *trTracer) file(path string) (*trFile, error) {
	if f := t.open[path]; f != nil {
		return f, nil
	}
	entry, ok := t.byPath[path]
	if !ok {
		return nil, fmt.Errorf("%s is not a file of this version (see the manifest's files)", path)
	}
	pf, ra, err := trOpenParquet(t.ctx, t.v.Store, path)
	if err != nil {
		return nil, err
	}
	tf := &trFile{entry: entry, f: pf, ra: ra, starts: []int64{0}}
	for _, g := range pf.RowGroups() {
		tf.starts = append(tf.starts, tf.starts[len(tf.starts)-1]+g.NumRows())
	}
	t.open[path] = tf
	return tf, nil
}

// pairsOf returns the pairs shard of the same split and partition as a
// frames shard: it holds the same episodes.
func (t *trTracer) pairsOf(frames pipeline.File) (pipeline.File, bool) {
	for _, f := range t.v.Manifest.Files {
		if f.Table == "pairs" && f.Split == frames.Split && f.Partition == frames.Partition {
			return f, true
		}
	}
	return pipeline.File{}, false
}

func (t *trTracer) srcURI(key string) string {
	for _, s := range t.v.Manifest.Sources {
		if s.Key == key {
			return s.URI
		}
	}
	return pipeline.JoinURI(t.v.Manifest.SourceRoot, key)
}

// ---- source → files, episodes, rows

// trSourceScan is what a source query gathers: the source's steps by
// episode id (an episode is in one frames shard, so each set is whole once
// its shard is read), the partitions that hold them, its episodes and the
// pairs rows that use one of its frames.
type trSourceScan struct {
	key      string
	steps    map[string]map[int32]bool
	parts    map[int]bool
	episodes map[[2]string]*TraceEpisode
	pairs    trPairRows
}

func (t *trTracer) source(res *TraceResult, query string) error {
	src, err := t.findSource(query)
	if err != nil {
		return err
	}
	res.Source = &TraceSource{Key: src.Key, URI: src.URI, Lines: src.Lines, Kept: src.Kept,
		DuplicateOf: src.DuplicateOf, Incomplete: src.Incomplete, Recording: src.Recording, Skipped: src.Skipped}
	if src.DuplicateOf != nil {
		return nil // a duplicate object contributes no lines (SPEC §3.1)
	}
	paths := src.Files
	if len(paths) == 0 && src.Kept > 0 {
		// A manifest that kept frames but names no file: search them all.
		for _, f := range t.v.Manifest.Files {
			if f.Table == "frames" {
				paths = append(paths, f.Path)
			}
		}
	}
	sc := &trSourceScan{key: src.Key, steps: map[string]map[int32]bool{}, parts: map[int]bool{},
		episodes: map[[2]string]*TraceEpisode{}, pairs: trPairRows{}}
	for _, path := range paths {
		if err := t.sourceFrames(res, sc, path); err != nil {
			return err
		}
	}
	if len(sc.steps) > 0 && t.negatives() {
		if err := t.sourceNegatives(sc); err != nil {
			return err
		}
	}
	for path, rows := range sc.pairs {
		tf, err := t.file(path)
		if err != nil {
			return err
		}
		ids := map[string]bool{}
		sorted := make([]int64, 0, len(rows))
		for r, id := range rows {
			sorted = append(sorted, r)
			ids[id] = true
		}
		slices.Sort(sorted)
		res.Files = append(res.Files, tf.answer(sorted, ids))
	}
	for _, ep := range sc.episodes {
		sort.Slice(ep.Steps, func(i, j int) bool { return ep.Steps[i].Step < ep.Steps[j].Step })
		res.Episodes = append(res.Episodes, *ep)
	}
	return nil
}

// findSource finds the manifest's source named by a key relative to the
// source root or by its URI.
func (t *trTracer) findSource(query string) (*pipeline.Source, error) {
	m := t.v.Manifest
	key := query
	if strings.Contains(query, "://") {
		root := strings.TrimSuffix(m.SourceRoot, "/") + "/"
		key = strings.TrimPrefix(query, root)
	}
	for i := range m.Sources {
		if m.Sources[i].Key == key || m.Sources[i].URI == query {
			return &m.Sources[i], nil
		}
	}
	return nil, fmt.Errorf("source %q is not in the manifest (%d sources under %s)", query, len(m.Sources), m.SourceRoot)
}

// sourceFrames finds the source's rows in one frames shard, by the src
// column's statistics, then the pairs of their episodes.
func (t *trTracer) sourceFrames(res *TraceResult, sc *trSourceScan, path string) error {
	key := sc.key
	tf, err := t.file(path)
	if err != nil {
		return fmt.Errorf("source %s: %w", key, err)
	}
	isKey := func(s []byte) bool { return string(s) == key }
	groups, err := tf.groups("src", trAdmitOne(key), nil)
	if err != nil {
		return err
	}
	hits, err := tf.find(groups, "src", trAdmitOne(key), isKey, "")
	if err != nil {
		return err
	}
	if len(hits.rows) == 0 {
		return nil
	}
	cols, err := tf.readRows(hits.rows, "episode", "unit", "step", "src_line")
	if err != nil {
		return err
	}
	ids := map[string]bool{}
	for i := range hits.rows {
		id, unit, step := cols[0][i].s, cols[1][i].s, int32(cols[2][i].i)
		ids[id] = true
		if sc.steps[id] == nil {
			sc.steps[id] = map[int32]bool{}
		}
		sc.steps[id][step] = true
		ep := sc.episodes[[2]string{id, unit}]
		if ep == nil {
			ep = &TraceEpisode{ID: id, Unit: unit, Split: tf.entry.Split, Partition: tf.entry.Partition}
			sc.episodes[[2]string{id, unit}] = ep
		}
		ep.Steps = append(ep.Steps, TraceStep{Step: step, Src: key, SrcLine: cols[3][i].i})
	}
	res.Files = append(res.Files, tf.answer(hits.rows, ids))
	sc.parts[tf.entry.Partition] = true
	return t.sourcePairs(sc, tf.entry, ids)
}

// sourcePairs finds the pairs of the episodes ids, in the pairs shard of
// the same split and partition as their frames, by the episode column's
// statistics: of their rows, those whose step, next step (next_obs) or
// goal is a frame of this source.
func (t *trTracer) sourcePairs(sc *trSourceScan, frames pipeline.File, ids map[string]bool) error {
	pe, ok := t.pairsOf(frames)
	if !ok {
		return nil
	}
	pf, err := t.file(pe.Path)
	if err != nil {
		return err
	}
	sorted := trSortedKeys(ids)
	admit := trAdmitAny(sorted)
	pgroups, err := pf.groups("episode", admit, nil)
	if err != nil {
		return err
	}
	phits, err := pf.find(pgroups, "episode", admit, func(s []byte) bool { return ids[string(s)] }, sorted[len(sorted)-1])
	if err != nil {
		return err
	}
	pcols, err := pf.readRows(phits.rows, "step", "goal_episode", "goal_step")
	if err != nil {
		return err
	}
	for i, r := range phits.rows {
		own, step := sc.steps[phits.vals[i]], int32(pcols[0][i].i)
		if own[step] || own[step+1] || sc.steps[pcols[1][i].s][int32(pcols[2][i].i)] {
			sc.pairs.add(pe.Path, r, phits.vals[i])
		}
	}
	return nil
}

// sourceNegatives finds the pairs rows that took one of the source's frames
// as a negative goal. Negative goals are frames of another episode of the
// same partition, maybe of another split (SPEC §3.3), so they are found by
// the goal_episode column of every pairs shard of those partitions. That
// column is not sorted, so this reads most of it; versions made without
// negatives skip it.
func (t *trTracer) sourceNegatives(sc *trSourceScan) error {
	sorted := trSortedKeys(sc.steps)
	admit := trAdmitAny(sorted)
	for _, f := range t.v.Manifest.Files {
		if f.Table != "pairs" || !sc.parts[f.Partition] {
			continue
		}
		pf, err := t.file(f.Path)
		if err != nil {
			return err
		}
		groups, err := pf.groups("goal_episode", admit, nil)
		if err != nil {
			return err
		}
		hits, err := pf.find(groups, "goal_episode", admit, func(s []byte) bool { return sc.steps[string(s)] != nil }, "")
		if err != nil {
			return err
		}
		cols, err := pf.readRows(hits.rows, "goal_step", "episode")
		if err != nil {
			return err
		}
		for i, r := range hits.rows {
			if sc.steps[hits.vals[i]][int32(cols[0][i].i)] {
				sc.pairs.add(f.Path, r, cols[1][i].s)
			}
		}
	}
	return nil
}

// trPairRows are pairs rows found for an answer: by shard path, each row
// with its episode id.
type trPairRows map[string]map[int64]string

func (p trPairRows) add(path string, row int64, episode string) {
	if p[path] == nil {
		p[path] = map[int64]string{}
	}
	p[path][row] = episode
}

// ---- episode → files, rows, source lines

// trFound is an episode located in a frames shard.
type trFound struct {
	file  *trFile
	rows  []int64 // its frames rows
	unit  []string
	step  []int64
	src   []string
	line  []int64
	units []string // the distinct units, sorted (one, unless two units' ids coincide)
}

func (t *trTracer) episodeQuery(res *TraceResult, id string) error {
	found, err := t.episode(id)
	if err != nil {
		return err
	}
	for _, fd := range found {
		tf := fd.file
		res.Files = append(res.Files, tf.answer(fd.rows, map[string]bool{id: true}))
		for _, unit := range fd.units {
			ep := TraceEpisode{ID: id, Unit: unit, Split: tf.entry.Split, Partition: tf.entry.Partition, Steps: []TraceStep{}}
			for i := range fd.rows {
				if fd.unit[i] == unit {
					ep.Steps = append(ep.Steps, TraceStep{Step: int32(fd.step[i]), Src: fd.src[i], SrcLine: fd.line[i]})
				}
			}
			sort.Slice(ep.Steps, func(i, j int) bool { return ep.Steps[i].Step < ep.Steps[j].Step })
			res.Episodes = append(res.Episodes, ep)
		}
		pe, ok := t.pairsOf(tf.entry)
		if !ok {
			continue
		}
		pf, err := t.file(pe.Path)
		if err != nil {
			return err
		}
		admit := trAdmitOne(id)
		groups, err := pf.groups("episode", admit, nil)
		if err != nil {
			return err
		}
		hits, err := pf.find(groups, "episode", admit, func(s []byte) bool { return string(s) == id }, id)
		if err != nil {
			return err
		}
		if len(hits.rows) > 0 {
			res.Files = append(res.Files, pf.answer(hits.rows, map[string]bool{id: true}))
		}
	}
	return nil
}

// episode finds an episode's frames rows. The id names its unit, the unit
// its partition and (with the config's split_by) its split, and so the one
// frames shard that can hold it (SPEC §3.4); only when the manifest's
// config cannot be used are all frames shards searched, their bloom
// filters ruling most row groups out without a page read.
func (t *trTracer) episode(id string) ([]trFound, error) {
	units := trEpisodeUnits(id)
	if len(units) == 0 {
		return nil, fmt.Errorf("%q is not an episode id (want <unit>-<t>, SPEC §3.2)", id)
	}
	var paths []string
	search := !t.cfgOK
	if t.cfgOK {
		for _, unit := range units {
			key := id
			if t.cfg.SplitBy == "unit" {
				key = unit
			}
			path := fmt.Sprintf("frames/split=%s/part-%s.parquet", pipeline.SplitOf(key, t.cfg.Splits),
				pipeline.PartName(pipeline.PartitionOf(unit, t.cfg.Partitions)))
			if f, ok := t.byPath[path]; ok && f.Table == "frames" && !slices.Contains(paths, path) {
				paths = append(paths, path)
			}
		}
	} else {
		for _, f := range t.v.Manifest.Files {
			if f.Table == "frames" {
				paths = append(paths, f.Path)
			}
		}
	}
	useBloom := search || len(paths) > 1
	var found []trFound
	for _, path := range paths {
		tf, err := t.file(path)
		if err != nil {
			return nil, err
		}
		admit := trAdmitOne(id)
		var bloom []byte
		if useBloom {
			bloom = []byte(id)
		}
		groups, err := tf.groups("episode", admit, bloom)
		if err != nil {
			return nil, err
		}
		hits, err := tf.find(groups, "episode", admit, func(s []byte) bool { return string(s) == id }, id)
		if err != nil {
			return nil, err
		}
		if len(hits.rows) == 0 {
			continue
		}
		cols, err := tf.readRows(hits.rows, "unit", "step", "src", "src_line")
		if err != nil {
			return nil, err
		}
		fd := trFound{file: tf, rows: hits.rows}
		seen := map[string]bool{}
		for i := range hits.rows {
			fd.unit = append(fd.unit, cols[0][i].s)
			fd.step = append(fd.step, cols[1][i].i)
			fd.src = append(fd.src, cols[2][i].s)
			fd.line = append(fd.line, cols[3][i].i)
			seen[cols[0][i].s] = true
		}
		fd.units = trSortedKeys(seen)
		found = append(found, fd)
	}
	if len(found) == 0 {
		where := "no frames file of this version can hold it"
		if len(paths) > 0 {
			where = "looked in " + strings.Join(paths, ", ")
		}
		return nil, fmt.Errorf("episode %q not found (%s)", id, where)
	}
	return found, nil
}

// trEpisodeUnits returns the units an episode id can belong to: the part
// before the last "-", or, when the time is negative ("unit--5"), the part
// before the "--". An id like "a--5" is both unit "a-" at t=5 and unit "a"
// at t=−5 (both are valid units), so both are returned. Each candidate
// must give back the id exactly, as SPEC §3.2 writes it.
func trEpisodeUnits(id string) []string {
	var units []string
	try := func(unit, tText string) {
		t, err := strconv.ParseInt(tText, 10, 64)
		if err != nil || !trValidUnit(unit) || unit+"-"+strconv.FormatInt(t, 10) != id {
			return
		}
		units = append(units, unit)
	}
	i := strings.LastIndex(id, "-")
	if i < 0 {
		return nil
	}
	try(id[:i], id[i+1:])
	if i > 0 && id[i-1] == '-' {
		try(id[:i-1], id[i:])
	}
	return units
}

// trValidUnit is SPEC §1's unit: 1–64 of A-Za-z0-9._-.
func trValidUnit(u string) bool {
	if len(u) == 0 || len(u) > 64 {
		return false
	}
	for _, c := range []byte(u) {
		ok := c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z' || c >= '0' && c <= '9' || c == '.' || c == '_' || c == '-'
		if !ok {
			return false
		}
	}
	return true
}

// ---- file + row → episode, step, source line

func (t *trTracer) row(res *TraceResult, path string, row int64) error {
	tf, err := t.file(path)
	if err != nil {
		return err
	}
	n := tf.starts[len(tf.starts)-1]
	if row < 0 || row >= n {
		if n == 0 {
			return fmt.Errorf("row %d out of range: %s has no rows", row, path)
		}
		return fmt.Errorf("row %d out of range: %s has %d rows (0 to %d)", row, path, n, n-1)
	}
	cols := []string{"episode", "unit", "step", "t", "src", "src_line"}
	pairs := tf.entry.Table == "pairs"
	if pairs {
		cols = append(cols, "strategy", "goal_episode", "goal_step", "goal_offset")
	}
	vals, err := tf.readRows([]int64{row}, cols...)
	if err != nil {
		return err
	}
	g := sort.Search(len(tf.starts), func(i int) bool { return tf.starts[i] > row }) - 1
	r := &TraceRow{Path: path, Table: tf.entry.Table, Row: row, RowGroup: g,
		Episode: vals[0][0].s, Unit: vals[1][0].s, Step: int32(vals[2][0].i), T: vals[3][0].i,
		Src: vals[4][0].s, SrcLine: vals[5][0].i}
	r.SrcURI = t.srcURI(r.Src)
	res.Row = r
	res.Files = append(res.Files, tf.answer([]int64{row}, map[string]bool{r.Episode: true}))
	ep := TraceEpisode{ID: r.Episode, Unit: r.Unit, Split: tf.entry.Split, Partition: tf.entry.Partition,
		Steps: []TraceStep{{Step: r.Step, Src: r.Src, SrcLine: r.SrcLine}}}
	res.Episodes = append(res.Episodes, ep)
	if !pairs {
		return nil
	}
	goal := &TraceGoal{Strategy: vals[6][0].s, Episode: vals[7][0].s, Step: int32(vals[8][0].i), Offset: int32(vals[9][0].i)}
	r.Goal = goal
	// The goal frame's own source line, from the goal episode's frames: the
	// same episode, or for a negative goal another episode of the same
	// partition (SPEC §3.3).
	found, err := t.episode(goal.Episode)
	if err != nil {
		return fmt.Errorf("goal of %s row %d: %w", path, row, err)
	}
	for _, fd := range found {
		if fd.file.entry.Partition != tf.entry.Partition {
			continue
		}
		for i := range fd.rows {
			if fd.step[i] == int64(goal.Step) && (goal.Episode != r.Episode || fd.unit[i] == r.Unit) {
				goal.Src, goal.SrcLine = fd.src[i], fd.line[i]
				return nil
			}
		}
	}
	return fmt.Errorf("goal of %s row %d: episode %s has no step %d in partition %d", path, row, goal.Episode, goal.Step, tf.entry.Partition)
}

// ---- reading shards

// trFile is an opened shard.
type trFile struct {
	entry  pipeline.File
	f      *parquet.File
	ra     *trReaderAt
	starts []int64 // first row of each row group, then the row count
}

// trIndexMin is the column chunk size from which a lookup reads the chunk's
// page index to skip pages: below it, the chunk is likely one page, and its
// index would cost a read of its own for nothing.
const trIndexMin = 64 << 10

// trVal is one value of a flat column: a string or an integer.
type trVal struct {
	s string
	i int64
}

func (tf *trFile) leaf(name string) (int, error) {
	l, ok := tf.f.Schema().Lookup(name)
	if !ok || l.MaxRepetitionLevel != 0 {
		return 0, fmt.Errorf("%s: no flat column %q", tf.entry.Path, name)
	}
	return l.ColumnIndex, nil
}

// trAdmit says whether a string column's [min, max] statistics can hold a
// wanted value.
type trAdmit func(min, max string) bool

func trAdmitOne(v string) trAdmit {
	return func(min, max string) bool { return min <= v && v <= max }
}

// trAdmitAny admits when any of the sorted values lies in [min, max].
func trAdmitAny(sorted []string) trAdmit {
	return func(min, max string) bool {
		i := sort.SearchStrings(sorted, min)
		return i < len(sorted) && sorted[i] <= max
	}
}

// groups returns the row groups whose statistics of column name admit a
// wanted value and, when bloom is not nil, whose bloom filter on that
// column may hold it. A row group without statistics is kept.
func (tf *trFile) groups(name string, admit trAdmit, bloom []byte) ([]int, error) {
	c, err := tf.leaf(name)
	if err != nil {
		return nil, err
	}
	var out []int
	for g, rg := range tf.f.RowGroups() {
		chunk := rg.ColumnChunks()[c]
		if fc, ok := chunk.(*parquet.FileColumnChunk); ok {
			if min, max, ok := fc.Bounds(); ok && !admit(string(min.ByteArray()), string(max.ByteArray())) {
				continue
			}
		}
		if bloom != nil {
			if bf := chunk.BloomFilter(); bf != nil {
				// A failed read of the filter only costs the rule-out.
				if has, err := bf.Check(parquet.ByteArrayValue(bloom)); err == nil && !has {
					continue
				}
			}
		}
		out = append(out, g)
	}
	return out, nil
}

// trHits are the rows of a file whose value matched, with the values.
type trHits struct {
	rows []int64
	vals []string
}

// find reads string column name in the given row groups (only the pages
// whose index admits a wanted value, for a chunk large enough to have
// several) and returns the rows whose value matches. For the episode
// column, which the shards are sorted by (SPEC §4), last is the largest
// wanted value: the scan stops at the first value past it.
func (tf *trFile) find(groups []int, name string, admit trAdmit, match func([]byte) bool, last string) (trHits, error) {
	var h trHits
	c, err := tf.leaf(name)
	if err != nil {
		return h, err
	}
	done := false
	for _, g := range groups {
		spans, err := tf.spans(g, c, admit)
		if err != nil {
			return h, err
		}
		err = tf.readRuns(g, c, spans, func(row int64, v parquet.Value) bool {
			s := v.ByteArray()
			if match(s) {
				h.rows = append(h.rows, row)
				h.vals = append(h.vals, string(s))
			} else if last != "" && string(s) > last {
				done = true
			}
			return !done
		})
		if err != nil || done {
			return h, err
		}
	}
	return h, nil
}

// spans returns the row spans of row group g (relative to it) that may hold
// an admitted value of column c: by the column index when the chunk is
// large enough for several pages, else the whole group.
func (tf *trFile) spans(g, c int, admit trAdmit) ([][2]int64, error) {
	rg := tf.f.RowGroups()[g]
	all := [][2]int64{{0, rg.NumRows()}}
	if tf.f.Metadata().RowGroups[g].Columns[c].MetaData.TotalCompressedSize < trIndexMin {
		return all, nil
	}
	chunk := rg.ColumnChunks()[c]
	ci, err := chunk.ColumnIndex()
	if err != nil {
		return all, nil // no page index: read the chunk
	}
	oi, err := chunk.OffsetIndex()
	if err != nil || oi.NumPages() != ci.NumPages() {
		return all, nil
	}
	var out [][2]int64
	for p := range ci.NumPages() {
		if !ci.NullPage(p) && !admit(string(ci.MinValue(p).ByteArray()), string(ci.MaxValue(p).ByteArray())) {
			continue
		}
		start, end := oi.FirstRowIndex(p), rg.NumRows()
		if p+1 < oi.NumPages() {
			end = oi.FirstRowIndex(p + 1)
		}
		if n := len(out); n > 0 && out[n-1][1] == start {
			out[n-1][1] = end
		} else {
			out = append(out, [2]int64{start, end})
		}
	}
	return out, nil
}

// readRuns calls fn with each value of flat column c at the rows of runs
// (half-open, sorted, disjoint, relative to row group g), with the row's
// index in the file, until fn returns false. Byte array values are only
// valid during the call. One page reader serves every run: in a chunk with
// a page index, parquet-go's SeekToRow stays on the page it has and keeps
// the dictionary it read, so scattered rows cost the pages that hold them
// rather than a fetch each; a chunk without one (small, likely one page)
// is read once from the first wanted row to the last.
func (tf *trFile) readRuns(g, c int, runs [][2]int64, fn func(row int64, v parquet.Value) bool) error {
	if len(runs) == 0 {
		return nil
	}
	chunk := tf.f.RowGroups()[g].ColumnChunks()[c]
	indexed := false
	if tf.f.Metadata().RowGroups[g].Columns[c].MetaData.TotalCompressedSize >= trIndexMin {
		_, err := chunk.OffsetIndex() // lets a seek jump to a page instead of decoding those before it
		indexed = err == nil
	}
	pages := chunk.Pages()
	defer pages.Close()
	buf := make([]parquet.Value, 1024)
	var vr parquet.ValueReader
	row := int64(0) // the row of the next value to read
	// next reads n values from row on, passing them to fn when emit.
	next := func(n int64, emit bool) (bool, error) {
		for n > 0 {
			if vr == nil {
				page, err := pages.ReadPage()
				if err != nil {
					if err == io.EOF {
						err = io.ErrUnexpectedEOF
					}
					return false, fmt.Errorf("%s: row group %d, column %d at row %d: %w", tf.entry.Path, g, c, row, err)
				}
				vr = page.Values()
			}
			k, err := vr.ReadValues(buf[:min(n, int64(len(buf)))])
			for _, v := range buf[:k] {
				if emit && !fn(tf.starts[g]+row, v) {
					return false, nil
				}
				row++
			}
			n -= int64(k)
			if err == io.EOF || k == 0 && err == nil {
				vr = nil // on to the next page
			} else if err != nil {
				return false, fmt.Errorf("%s: row group %d, column %d at row %d: %w", tf.entry.Path, g, c, row, err)
			}
		}
		return true, nil
	}
	for _, run := range runs {
		from, to := run[0], run[1]
		if from >= to {
			continue
		}
		// From the chunk's start, its dictionary page comes first in the
		// same read; a seek, even to row 0, skips it and fetches it after.
		if from != row && (indexed || row == 0) {
			if err := pages.SeekToRow(from); err != nil {
				return fmt.Errorf("%s: row group %d: seek to row %d: %w", tf.entry.Path, g, from, err)
			}
			vr, row = nil, from
		}
		if more, err := next(from-row, false); err != nil || !more {
			return err
		}
		if more, err := next(to-from, true); err != nil || !more {
			return err
		}
	}
	return nil
}

// readRows reads the named flat columns at the given file rows (sorted),
// one run of consecutive rows at a time: out[i][j] is column i at rows[j].
func (tf *trFile) readRows(rows []int64, names ...string) ([][]trVal, error) {
	out := make([][]trVal, len(names))
	for i, name := range names {
		c, err := tf.leaf(name)
		if err != nil {
			return nil, err
		}
		vals := make([]trVal, 0, len(rows))
		add := func(_ int64, v parquet.Value) bool {
			switch v.Kind() {
			case parquet.ByteArray:
				vals = append(vals, trVal{s: string(v.ByteArray())})
			case parquet.Int32:
				vals = append(vals, trVal{i: int64(v.Int32())})
			default:
				vals = append(vals, trVal{i: v.Int64()})
			}
			return true
		}
		// The runs of rows, cut at row-group bounds, one group at a time.
		var (
			g    = -1
			runs [][2]int64
		)
		for _, run := range trRuns(rows) {
			for start := run[0]; start < run[1]; {
				at := sort.Search(len(tf.starts), func(k int) bool { return tf.starts[k] > start }) - 1
				if at != g {
					if err := tf.readRuns(g, c, runs, add); err != nil {
						return nil, err
					}
					g, runs = at, runs[:0]
				}
				end := min(run[1], tf.starts[g+1])
				runs = append(runs, [2]int64{start - tf.starts[g], end - tf.starts[g]})
				start = end
			}
		}
		if err := tf.readRuns(g, c, runs, add); err != nil {
			return nil, err
		}
		if len(vals) != len(rows) {
			return nil, fmt.Errorf("%s: column %s: read %d values for %d rows", tf.entry.Path, name, len(vals), len(rows))
		}
		out[i] = vals
	}
	return out, nil
}

// answer is the file's part of an answer: its rows as ranges and the
// episodes they belong to.
func (tf *trFile) answer(rows []int64, episodes map[string]bool) TraceFile {
	return TraceFile{Path: tf.entry.Path, Table: tf.entry.Table, Split: tf.entry.Split,
		Partition: tf.entry.Partition, Rows: trRuns(rows), Episodes: trSortedKeys(episodes)}
}

// trRuns turns sorted row indexes into half-open [start, end) ranges.
func trRuns(rows []int64) [][2]int64 {
	out := [][2]int64{}
	for _, r := range rows {
		if n := len(out); n > 0 && out[n-1][1] == r {
			out[n-1][1]++
		} else {
			out = append(out, [2]int64{r, r + 1})
		}
	}
	return out
}

func trSortedKeys[V any](m map[string]V) []string {
	out := make([]string, 0, len(m))
	for k := range m {
		out = append(out, k)
	}
	sort.Strings(out)
	return out
}

// ---- text

// WriteText writes the answer for a reader: files with their row ranges,
// then each episode's steps with their source lines, runs of consecutive
// steps from consecutive lines of one object written as one line.
func (r *TraceResult) WriteText(w io.Writer) error {
	ew := &trErrWriter{w: w}
	switch r.Kind {
	case TraceKindSource:
		s := r.Source
		ew.printf("source %s (%s)\n", s.Key, s.URI)
		lines := "lines"
		if rec := s.Recording; rec != nil {
			lines = "ticks"
			ew.printf("  recording of unit %s (%s)\n", rec.Unit, rec.Embodiment)
			if len(rec.StaleBy) > 0 {
				ew.printf("  stale ticks by topic: %s\n", countsText(rec.StaleBy, shSortedKeys(rec.StaleBy)))
			}
		}
		switch {
		case s.DuplicateOf != nil:
			ew.printf("  a duplicate of %s: it contributed no frames\n", *s.DuplicateOf)
		case s.Skipped != "":
			ew.printf("  a recording skipped as %s: it contributed no frames\n", s.Skipped)
		case len(r.Files) == 0:
			ew.printf("  %s, no frame kept in any file\n", trCount(s.Lines, strings.TrimSuffix(lines, "s"), lines))
		default:
			frames := 0
			for _, e := range r.Episodes {
				frames += len(e.Steps)
			}
			ew.printf("  %s, %s kept in %s\n", trCount(s.Lines, strings.TrimSuffix(lines, "s"), lines), trCount(int64(frames), "frame", "frames"), trCount(int64(len(r.Episodes)), "episode", "episodes"))
		}
	case TraceKindEpisode:
		ew.printf("episode %s\n", r.Query.Episode)
	case TraceKindRow:
		x := r.Row
		ew.printf("%s row %d (row group %d)\n", x.Path, x.Row, x.RowGroup)
		ew.printf("  episode %s step %d (unit %s)\n", x.Episode, x.Step, x.Unit)
		ew.printf("  from %s %s %d\n", x.Src, r.lineWord(x.Src, false), x.SrcLine)
		if g := x.Goal; g != nil {
			ew.printf("  goal (%s): episode %s step %d, offset %d, from %s %s %d\n",
				g.Strategy, g.Episode, g.Step, g.Offset, g.Src, r.lineWord(g.Src, false), g.SrcLine)
		}
		ew.printf("read %d of %d bytes of %d files in %d requests\n", r.Cost.Bytes, r.Cost.FileBytes, r.Cost.Files, r.Cost.Requests)
		return ew.err
	}
	if len(r.Files) > 0 {
		ew.printf("files:\n")
	}
	for _, f := range r.Files {
		ew.printf("  %s  %s\n", f.Path, trRowsText(f.Rows))
		if r.Kind == TraceKindSource {
			ew.printf("    episodes: %s\n", trListText(f.Episodes, trTextEpisodes))
		}
	}
	for _, e := range r.Episodes {
		ew.printf("episode %s: unit %s, split %s, partition %d, %d steps", e.ID, e.Unit, e.Split, e.Partition, len(e.Steps))
		if r.Kind == TraceKindSource {
			ew.printf(" from this source")
		}
		ew.printf("\n")
		for i := 0; i < len(e.Steps); {
			j := i + 1
			for j < len(e.Steps) && e.Steps[j].Src == e.Steps[i].Src &&
				e.Steps[j].Step-e.Steps[i].Step == int32(j-i) && e.Steps[j].SrcLine-e.Steps[i].SrcLine == int64(j-i) {
				j++
			}
			a, b := e.Steps[i], e.Steps[j-1]
			if j-i == 1 {
				ew.printf("  step %d: %s %s %d\n", a.Step, a.Src, r.lineWord(a.Src, false), a.SrcLine)
			} else {
				ew.printf("  steps %d-%d: %s %s %d-%d\n", a.Step, b.Step, a.Src, r.lineWord(a.Src, true), a.SrcLine, b.SrcLine)
			}
			i = j
		}
	}
	ew.printf("read %d of %d bytes of %d files in %d requests\n", r.Cost.Bytes, r.Cost.FileBytes, r.Cost.Files, r.Cost.Requests)
	return ew.err
}

// lineWord names what a src_line of src counts: a line of JSON Lines, a
// tick of a recording.
func (r *TraceResult) lineWord(src string, many bool) string {
	word := "line"
	if _, ok := slices.BinarySearch(r.TickSources, src); ok {
		word = "tick"
	}
	if many {
		word += "s"
	}
	return word
}

// trTickSources lists the recordings among the sources an answer names.
func trTickSources(m *pipeline.Manifest, res *TraceResult) []string {
	recs := map[string]bool{}
	for _, s := range m.Sources {
		if s.Recording != nil {
			recs[s.Key] = true
		}
	}
	if len(recs) == 0 {
		return nil
	}
	found := map[string]bool{}
	if res.Source != nil && recs[res.Source.Key] {
		found[res.Source.Key] = true
	}
	for _, e := range res.Episodes {
		for _, st := range e.Steps {
			if recs[st.Src] {
				found[st.Src] = true
			}
		}
	}
	if x := res.Row; x != nil {
		if recs[x.Src] {
			found[x.Src] = true
		}
		if g := x.Goal; g != nil && recs[g.Src] {
			found[g.Src] = true
		}
	}
	if len(found) == 0 {
		return nil
	}
	return shSortedKeys(found)
}

// trTextRanges is how many row ranges of a file the text shows: a source
// whose frames are spread over a pairs file can touch hundreds of ranges,
// which on one line say nothing to a reader; --json keeps them all.
const trTextRanges = 5

// trRowsText summarizes a file's row ranges for a reader: the number of
// rows and of ranges, the first trTextRanges ranges, and how many more.
func trRowsText(ranges [][2]int64) string {
	var n int64
	for _, x := range ranges {
		n += x[1] - x[0]
	}
	var b strings.Builder
	fmt.Fprintf(&b, "%s in %s:", trCount(n, "row", "rows"), trCount(int64(len(ranges)), "range", "ranges"))
	for _, x := range ranges[:min(len(ranges), trTextRanges)] {
		fmt.Fprintf(&b, " [%d, %d)", x[0], x[1])
	}
	if more := len(ranges) - trTextRanges; more > 0 {
		fmt.Fprintf(&b, " … and %s", trCount(int64(more), "more range", "more ranges"))
	}
	return b.String()
}

// trTextEpisodes is how many episode ids of a file a source's text shows
// (negative goals can tie a source to most episodes of a partition).
const trTextEpisodes = 10

// trListText joins the first max items, then says how many more there are.
func trListText(items []string, max int) string {
	if len(items) <= max {
		return strings.Join(items, ", ")
	}
	return strings.Join(items[:max], ", ") + fmt.Sprintf(" … and %d more", len(items)-max)
}

// trCount writes n and the noun in the number it needs.
func trCount(n int64, one, many string) string {
	if n == 1 {
		return "1 " + one
	}
	return fmt.Sprintf("%d %s", n, many)
}

// trErrWriter keeps the first write error, so text output is written
// without a check per line.
type trErrWriter struct {
	w   io.Writer
	err error
}

func (e *trErrWriter) printf(format string, args ...any) {
	if e.err == nil {
		_, e.err = fmt.Fprintf(e.w, format, args...)
	}
}
