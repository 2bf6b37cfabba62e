package pipeline

import (
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"math"
	"sort"
	"time"
)

// ManifestFormat is the manifest's format version; readers refuse others.
const ManifestFormat = 1

// Manifest is a dataset version's manifest.json (SPEC §5): which logs, which
// config and which code made each shard.
type Manifest struct {
	Format       int                         `json:"format"`
	Dataset      string                      `json:"dataset"`
	Version      string                      `json:"version"`
	Created      string                      `json:"created"`
	Tool         ToolInfo                    `json:"tool"`
	Config       json.RawMessage             `json:"config"`
	ConfigSHA256 string                      `json:"config_sha256"`
	Seed         int64                       `json:"seed"`
	SourceRoot   string                      `json:"source_root"`
	Sources      []Source                    `json:"sources"`
	Funnel       Funnel                      `json:"funnel"`
	Counts       []Count                     `json:"counts"`
	Files        []File                      `json:"files"`
	Stats        map[string]EmbodimentStats  `json:"stats"`
	Offsets      map[string]map[string]int64 `json:"goal_offsets"`
	Reached      map[string]map[string]int64 `json:"goal_reached"`
	EpisodeSteps map[string]map[string]int64 `json:"episode_steps"`
	Units        []UnitCount                 `json:"units"`
	Stages       []StageResult               `json:"stages"`
	// Gates are the quality gates checked before commit (pipeline/gates.go).
	Gates []Gate `json:"gates"`
	// Quarantine is the file of dropped lines (config quarantine: true), or
	// null.
	Quarantine *QuarantineFile `json:"quarantine"`
	Digest     string          `json:"digest"`
}

// ToolInfo names the code that made a version.
type ToolInfo struct {
	Version string `json:"version"`
	Commit  string `json:"commit"`
}

// Source is one listed object and what became of its lines.
type Source struct {
	Key         string           `json:"key"`
	URI         string           `json:"uri"`
	Bytes       int64            `json:"bytes"`
	SHA256      string           `json:"sha256"`
	ETag        string           `json:"etag,omitempty"`
	VersionID   string           `json:"version_id,omitempty"`
	Lines       int64            `json:"lines"`
	Kept        int64            `json:"kept"`
	Dropped     map[string]int64 `json:"dropped"`
	DuplicateOf *string          `json:"duplicate_of"`
	Incomplete  bool             `json:"incomplete"`
	// Recording is what became of a recording's ticks (SPEC §7.6); absent
	// for JSON Lines, for a duplicate and for a skipped recording.
	Recording *RecordingSummary `json:"recording,omitempty"`
	// Skipped is the reason a recording was skipped whole (SPEC §7.1).
	Skipped string `json:"skipped,omitempty"`
	// Files lists the frames files holding this source's kept frames (their
	// pairs are in the pairs file of the same split and partition).
	Files []string `json:"files"`
}

// UnitCount is what became of one unit's lines; unit "" gathers the lines
// whose unit could not be read.
type UnitCount struct {
	Unit    string           `json:"unit"`
	Frames  int64            `json:"frames"`
	Dropped map[string]int64 `json:"dropped"`
}

// Funnel counts, over the whole version, what came in and what was kept:
// lines = frames + Σ dropped.
type Funnel struct {
	Objects          int64            `json:"objects"`
	DuplicateObjects int64            `json:"duplicate_objects"`
	Lines            int64            `json:"lines"`
	Frames           int64            `json:"frames"`
	Episodes         int64            `json:"episodes"`
	Pairs            int64            `json:"pairs"`
	Dropped          map[string]int64 `json:"dropped"`
	// SkippedObjects counts the recordings skipped whole, by reason (SPEC
	// §7.6), every reason present.
	SkippedObjects map[string]int64 `json:"skipped_objects"`
}

// File is one shard of the version.
type File struct {
	Path      string `json:"path"`
	Table     string `json:"table"`
	Split     string `json:"split"`
	Partition int    `json:"partition"`
	Rows      int64  `json:"rows"`
	Episodes  int64  `json:"episodes"`
	Bytes     int64  `json:"bytes"`
	SHA256    string `json:"sha256"`
}

// EmbodimentStats holds the train split's per-dimension statistics.
type EmbodimentStats struct {
	Obs VectorStats `json:"obs"`
	Act VectorStats `json:"act"`
}

// VectorStats is count, and per dimension mean, population std, min and max.
type VectorStats struct {
	Count int64     `json:"count"`
	Mean  []float64 `json:"mean"`
	Std   []float64 `json:"std"`
	Min   []float64 `json:"min"`
	Max   []float64 `json:"max"`
}

func vectorStats(m *Moments) VectorStats {
	if m == nil || m.N == 0 {
		return VectorStats{Mean: []float64{}, Std: []float64{}, Min: []float64{}, Max: []float64{}}
	}
	v := VectorStats{Count: m.N, Mean: m.Mean, Min: m.Min, Max: m.Max}
	for _, s := range m.M2 {
		v.Std = append(v.Std, math.Sqrt(max(s, 0)/float64(m.N)))
	}
	return v
}

// Stage names, as the manifest and the work layout use them.
const (
	StageIngest   = "ingest"
	StageEpisodes = "episodes"
	StageGoals    = "goals"
	StagePack     = "pack"
)

// BuildManifest assembles the manifest of a finished run from its sealed
// items. Everything in it but created, tool.commit and stage seconds is a
// function of the inputs and the config.
func BuildManifest(cfg *Config, res *Result, version string, tool ToolInfo, created time.Time) (*Manifest, error) {
	m := &Manifest{
		Format: ManifestFormat, Dataset: cfg.Dataset, Version: version,
		Created: created.UTC().Format(time.RFC3339), Tool: tool,
		Config: cfg.CanonicalJSON(), ConfigSHA256: cfg.SHA256(), Seed: cfg.Seed,
		SourceRoot: cfg.Source.URI, Stages: res.Stages,
		Funnel:       Funnel{Dropped: map[string]int64{}, SkippedObjects: map[string]int64{}},
		Stats:        map[string]EmbodimentStats{},
		Offsets:      map[string]map[string]int64{},
		Reached:      map[string]map[string]int64{},
		EpisodeSteps: map[string]map[string]int64{},
		Sources:      []Source{}, Files: []File{}, Counts: []Count{}, Units: []UnitCount{},
	}
	units := map[string]*UnitCount{}
	unit := func(name string) *UnitCount {
		if units[name] == nil {
			units[name] = &UnitCount{Unit: name, Dropped: map[string]int64{}}
		}
		return units[name]
	}
	for _, r := range Reasons() {
		m.Funnel.Dropped[r] = 0
	}
	for _, r := range SkipReasons() {
		m.Funnel.SkippedObjects[r] = 0
	}
	srcs, err := Sources(res.Sealed[StageIngest])
	if err != nil {
		return nil, err
	}
	later := map[string]map[string]int64{} // drops by the episodes stage, per source
	for _, s := range res.Sealed[StageEpisodes] {
		var e EpisodesSummary
		if err := json.Unmarshal(s.Summary, &e); err != nil {
			return nil, fmt.Errorf("episodes %s: summary: %w", s.Item.ID, err)
		}
		m.Funnel.Frames += e.Frames
		m.Funnel.Episodes += e.Episodes
		for u, n := range e.Units {
			unit(u).Frames += n
		}
		for u, byReason := range e.DroppedByUnit {
			for r, n := range byReason {
				unit(u).Dropped[r] += n
			}
		}
		for src, byReason := range e.Dropped {
			if later[src] == nil {
				later[src] = map[string]int64{}
			}
			for r, n := range byReason {
				later[src][r] += n
			}
		}
	}
	for _, s := range srcs {
		src := Source{Key: s.Key, URI: JoinURI(cfg.Source.URI, s.Key), Bytes: s.Bytes, SHA256: s.SHA256,
			ETag: s.ETag, VersionID: s.Version, Dropped: map[string]int64{}, Incomplete: s.Incomplete}
		m.Funnel.Objects++
		if s.DuplicateOf != "" {
			dup := s.DuplicateOf
			src.DuplicateOf = &dup
			m.Funnel.DuplicateObjects++
			m.Sources = append(m.Sources, src)
			continue
		}
		src.Lines, src.Kept = s.Lines, s.Kept
		src.Recording, src.Skipped = s.Recording, s.Skipped
		if s.Skipped != "" {
			m.Funnel.SkippedObjects[s.Skipped]++
		}
		for r, n := range s.Dropped {
			src.Dropped[r] += n
		}
		for u, byReason := range s.DroppedByUnit {
			for r, n := range byReason {
				unit(u).Dropped[r] += n
			}
		}
		for r, n := range later[s.Key] {
			src.Dropped[r] += n
			src.Kept -= n
		}
		m.Funnel.Lines += src.Lines
		for r, n := range src.Dropped {
			m.Funnel.Dropped[r] += n
		}
		m.Sources = append(m.Sources, src)
	}
	srcFiles := map[string][]string{}
	obs, act := map[string]*Moments{}, map[string]*Moments{}
	for _, s := range res.Sealed[StagePack] { // partition order: merges are reproducible
		var p PackSummary
		if err := json.Unmarshal(s.Summary, &p); err != nil {
			return nil, fmt.Errorf("pack %s: summary: %w", s.Item.ID, err)
		}
		for _, f := range p.Files {
			m.Files = append(m.Files, File{Path: f.Path, Table: f.Table, Split: f.Split, Partition: f.Partition,
				Rows: f.Rows, Episodes: f.Episodes, Bytes: f.Bytes, SHA256: f.SHA256})
			if f.Table == "pairs" {
				m.Funnel.Pairs += f.Rows
			}
		}
		m.Counts = append(m.Counts, p.Counts...)
		for _, name := range sortedKeys(p.Obs) {
			if obs[name] == nil {
				obs[name], act[name] = &Moments{}, &Moments{}
			}
			obs[name].Merge(p.Obs[name])
			act[name].Merge(p.Act[name])
		}
		for strat, byOff := range p.Offsets {
			for off, n := range byOff {
				AddCount(m.Offsets, strat, fmt.Sprint(off), n)
			}
		}
		for strat, byOff := range p.Reached {
			for off, n := range byOff {
				AddCount(m.Reached, strat, fmt.Sprint(off), n)
			}
		}
		for emb, bySteps := range p.Steps {
			for steps, n := range bySteps {
				AddCount(m.EpisodeSteps, emb, fmt.Sprint(steps), n)
			}
		}
		for src, files := range p.SourceFiles {
			srcFiles[src] = append(srcFiles[src], files...)
		}
	}
	for name := range cfg.Embodiments {
		m.Stats[name] = EmbodimentStats{Obs: vectorStats(obs[name]), Act: vectorStats(act[name])}
	}
	m.Counts = mergeCounts(m.Counts)
	for i := range m.Sources {
		files := srcFiles[m.Sources[i].Key]
		sort.Strings(files)
		m.Sources[i].Files = append([]string{}, files...)
	}
	for _, name := range sortedKeys(units) {
		m.Units = append(m.Units, *units[name])
	}
	sort.Slice(m.Files, func(i, j int) bool { return m.Files[i].Path < m.Files[j].Path })
	m.Digest = Digest(m.ConfigSHA256, m.Sources, m.Files)
	return m, nil
}

func sortedKeys[V any](m map[string]V) []string {
	keys := make([]string, 0, len(m))
	for k := range m {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	return keys
}

func mergeCounts(cs []Count) []Count {
	byKey := map[[2]string]*Count{}
	var keys [][2]string
	for _, c := range cs {
		k := [2]string{c.Embodiment, c.Split}
		if byKey[k] == nil {
			byKey[k] = &Count{Embodiment: c.Embodiment, Split: c.Split}
			keys = append(keys, k)
		}
		byKey[k].Episodes += c.Episodes
		byKey[k].Frames += c.Frames
		byKey[k].Pairs += c.Pairs
	}
	order := map[string]int{"train": 0, "val": 1, "test": 2}
	sort.Slice(keys, func(i, j int) bool {
		if keys[i][0] != keys[j][0] {
			return keys[i][0] < keys[j][0]
		}
		return order[keys[i][1]] < order[keys[j][1]]
	})
	out := []Count{}
	for _, k := range keys {
		out = append(out, *byKey[k])
	}
	return out
}

// Digest is the SHA-256 over everything that determines a version's content:
// the hex SHA-256 of the JSON text
// {"config_sha256":C,"files":[[path,sha256],…],"sources":[[key,sha256],…]}
// with sources sorted by key and files by path. Storage locations are not in
// it, so the same inputs and config give the same digest wherever they live.
func Digest(configSHA string, sources []Source, files []File) string {
	type doc struct {
		Config  string      `json:"config_sha256"`
		Files   [][2]string `json:"files"`
		Sources [][2]string `json:"sources"`
	}
	d := doc{Config: configSHA, Files: [][2]string{}, Sources: [][2]string{}}
	for _, s := range sources {
		d.Sources = append(d.Sources, [2]string{s.Key, s.SHA256})
	}
	for _, f := range files {
		d.Files = append(d.Files, [2]string{f.Path, f.SHA256})
	}
	sort.Slice(d.Sources, func(i, j int) bool { return d.Sources[i][0] < d.Sources[j][0] })
	sort.Slice(d.Files, func(i, j int) bool { return d.Files[i][0] < d.Files[j][0] })
	b, _ := json.Marshal(d)
	h := sha256.Sum256(b)
	return hex.EncodeToString(h[:])
}
