package inspect

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/binary"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math/big"
	"os"
	"path/filepath"
	"reflect"
	"sort"
	"strings"
	"sync"
	"testing"

	"github.com/apache/arrow-go/v18/arrow/array"
	"github.com/apache/arrow-go/v18/arrow/memory"
	"github.com/apache/arrow-go/v18/parquet/file"
	"github.com/apache/arrow-go/v18/parquet/pqarrow"

	"hindcast/pipeline"
	"hindcast/stages"
)

// ---- fixture: a small fleet written line by line, with what must become
// of every line computed here, from the inputs alone.

const trtConfig = `dataset: trace-test
source:
  uri: logs
partitions: 2
seed: 5
embodiments:
  arm:
    obs: 2
    goal_tolerance: 0.01
episodes:
  max_gap: 500ms
  min_steps: 5
  max_steps: 100
goals:
  future: 1
  geometric: 1
  final: 1
  negative: 0
  gamma: 0.9
splits: {train: 0.5, val: 0.25, test: 0.25}
float: float64
parquet:
  row_group_rows: 64
`

// trtSplits are trtConfig's splits, as exact fractions.
var trtSplits = [3]*big.Rat{big.NewRat(1, 2), big.NewRat(1, 4), big.NewRat(1, 4)}

// trtEp is an expected episode: its id, unit and each step's source line.
type trtEp struct {
	id, unit string
	steps    []TraceStep
}

// trtLogs writes objects line by line and records, for each frame line, the
// episode and step it must become.
type trtLogs struct {
	obs, act int // vector lengths, for the benchmark (0: a 2-element obs)
	files    map[string]*bytes.Buffer
	lines    map[string]int64
	eps      map[string]*trtEp
	order    []string // episode ids in creation order
}

func newTrtLogs() *trtLogs {
	return &trtLogs{files: map[string]*bytes.Buffer{}, lines: map[string]int64{}, eps: map[string]*trtEp{}}
}

func (l *trtLogs) raw(file, text string) int64 {
	if l.files[file] == nil {
		l.files[file] = &bytes.Buffer{}
	}
	l.files[file].WriteString(text + "\n")
	l.lines[file]++
	return l.lines[file]
}

// frame writes one arm frame; id != "" records it as the next step of
// that episode (a frame that must be dropped passes "").
func (l *trtLogs) frame(file, unit string, t int64, id string) {
	text := fmt.Sprintf(`{"unit":%q,"embodiment":"arm","t":%d,"obs":[%d.5,%d.25]}`, unit, t, t%97, t%89)
	if l.obs > 0 {
		text = fmt.Sprintf(`{"unit":%q,"embodiment":"arm","t":%d,"obs":%s,"act":%s}`, unit, t, l.vec(t, l.obs), l.vec(t+1, l.act))
	}
	line := l.raw(file, text)
	if id == "" {
		return
	}
	ep := l.eps[id]
	if ep == nil {
		ep = &trtEp{id: id, unit: unit}
		l.eps[id] = ep
		l.order = append(l.order, id)
	}
	ep.steps = append(ep.steps, TraceStep{Step: int32(len(ep.steps)), Src: file, SrcLine: line})
}

// vec is n values in [-1, 1) with 4 decimals, drawn from a generator
// seeded by seed: vectors that compress like sensor data, not like zeros.
func (l *trtLogs) vec(seed int64, n int) string {
	var b strings.Builder
	x := uint64(seed)*0x9E3779B97F4A7C15 | 1
	b.WriteByte('[')
	for i := range n {
		x ^= x << 13
		x ^= x >> 7
		x ^= x << 17 // xorshift64 (Marsaglia 2003)
		if i > 0 {
			b.WriteByte(',')
		}
		fmt.Fprintf(&b, "%.4f", float64(x%20000)/10000-1)
	}
	b.WriteByte(']')
	return b.String()
}

const trtDt = int64(100_000_000) // 100 ms between frames, under max_gap

// trtFleet is the small fleet of the exact tests:
//   - a.jsonl: unit arm-1 (a unit with a "-"), episode E1 of 30 steps with a
//     blank line 2 and a malformed line 10, then the first 12 steps of E2
//     (after a 2 s gap: a new episode, SPEC §3.2);
//   - b.jsonl: the last 8 steps of E2 (so E2 comes from two objects), unit
//     cart7's E3 of 70 steps (more than a 64-row group), unit neg's E4 of
//     15 steps from a negative t (id "neg--5000000000");
//   - c.jsonl: 3 frames of unit ghost: shorter than min_steps, all dropped;
//   - d.jsonl: a.jsonl's bytes again: a duplicate object.
func trtFleet() *trtLogs {
	l := newTrtLogs()
	t := int64(1_000_000_000)
	e1 := fmt.Sprintf("arm-1-%d", t)
	l.frame("a.jsonl", "arm-1", t, e1)
	l.raw("a.jsonl", "   ")
	for s := 1; s < 30; s++ {
		if s == 8 {
			l.raw("a.jsonl", `{"unit":"arm-1","embodiment":"arm","t":`) // malformed
		}
		l.frame("a.jsonl", "arm-1", t+int64(s)*trtDt, e1)
	}
	t2 := t + 29*trtDt + 2_000_000_000
	e2 := fmt.Sprintf("arm-1-%d", t2)
	for s := range 20 {
		file := "a.jsonl"
		if s >= 12 {
			file = "b.jsonl"
		}
		l.frame(file, "arm-1", t2+int64(s)*trtDt, e2)
	}
	t3 := int64(7_000_000_000)
	for s := range 70 {
		l.frame("b.jsonl", "cart7", t3+int64(s)*trtDt, fmt.Sprintf("cart7-%d", t3))
	}
	t4 := int64(-5_000_000_000)
	for s := range 15 {
		l.frame("b.jsonl", "neg", t4+int64(s)*trtDt, "neg--5000000000")
	}
	for s := range 3 {
		l.frame("c.jsonl", "ghost", int64(s)*trtDt, "")
	}
	l.files["d.jsonl"] = bytes.NewBuffer(bytes.Clone(l.files["a.jsonl"].Bytes()))
	return l
}

// trtBuild runs the whole pipeline over the objects and opens the version.
func trtBuild(tb testing.TB, cfgYAML string, files map[string]*bytes.Buffer) *pipeline.Version {
	tb.Helper()
	dir := tb.TempDir()
	for name, body := range files {
		p := filepath.Join(dir, "logs", name)
		if err := os.MkdirAll(filepath.Dir(p), 0o755); err != nil {
			tb.Fatal(err)
		}
		if err := os.WriteFile(p, body.Bytes(), 0o644); err != nil {
			tb.Fatal(err)
		}
	}
	cfg, err := pipeline.ParseConfig([]byte(cfgYAML), dir, "trace.yaml")
	if err != nil {
		tb.Fatal(err)
	}
	ctx := context.Background()
	if _, err := pipeline.Execute(ctx, cfg, stages.All(), pipeline.Options{Version: "v1", Parallel: 2}); err != nil {
		tb.Fatalf("run: %v", err)
	}
	v, err := pipeline.OpenVersion(ctx, filepath.Join(dir, "datasets", cfg.Dataset, "v1"), pipeline.StorageConfig{})
	if err != nil {
		tb.Fatal(err)
	}
	return v
}

// trtPartition is SPEC §3.4's partition, computed here:
// BE_uint64(sha256(unit)[0:8]) mod partitions.
func trtPartition(unit string, partitions int) int {
	h := sha256.Sum256([]byte(unit))
	return int(binary.BigEndian.Uint64(h[:8]) % uint64(partitions))
}

// trtSplit is SPEC §3.4's split, computed here with exact fractions:
// u = BE_uint64(sha256(key)[0:8]) / 2^64; train when u < train, val when
// u < train + val, else test.
func trtSplit(key string) string {
	h := sha256.Sum256([]byte(key))
	u := new(big.Rat).SetFrac(new(big.Int).SetUint64(binary.BigEndian.Uint64(h[:8])), new(big.Int).Lsh(big.NewInt(1), 64))
	if u.Cmp(trtSplits[0]) < 0 {
		return "train"
	}
	if u.Cmp(new(big.Rat).Add(trtSplits[0], trtSplits[1])) < 0 {
		return "val"
	}
	return "test"
}

// trtLayout is where every frame and pair must be: per shard, the episodes
// in id order (SPEC §4: rows sorted by (episode, step)), and per episode its
// first frames row and first pairs row.
type trtLayout struct {
	eps        map[string]*trtEp
	split      map[string]string
	part       map[string]int
	framesAt   map[string]int64 // first frames row of the episode in its file
	pairsAt    map[string]int64 // first pairs row
	filesRows  map[string]int64 // rows per file path
	fileOrder  map[string][]string
	strategies []string // goals per step, in pairs order (SPEC §4)
}

// trtExpect lays the episodes out; byUnit is split_by: unit.
func trtExpect(l *trtLogs, byUnit bool) *trtLayout {
	lay := &trtLayout{eps: l.eps, split: map[string]string{}, part: map[string]int{},
		framesAt: map[string]int64{}, pairsAt: map[string]int64{}, filesRows: map[string]int64{},
		fileOrder: map[string][]string{}, strategies: []string{"future", "geometric", "final"}}
	ids := append([]string{}, l.order...)
	sort.Strings(ids)
	for _, id := range ids {
		ep := l.eps[id]
		key := id
		if byUnit {
			key = ep.unit
		}
		lay.split[id], lay.part[id] = trtSplit(key), trtPartition(ep.unit, 2)
		fp, pp := lay.path("frames", id), lay.path("pairs", id)
		lay.framesAt[id], lay.pairsAt[id] = lay.filesRows[fp], lay.filesRows[pp]
		lay.filesRows[fp] += int64(len(ep.steps))
		// Steps 0…T−2 get one goal per strategy; step T−1 none (SPEC §3.3).
		lay.filesRows[pp] += int64(len(lay.strategies) * (len(ep.steps) - 1))
		lay.fileOrder[fp] = append(lay.fileOrder[fp], id)
		lay.fileOrder[pp] = append(lay.fileOrder[pp], id)
	}
	return lay
}

func (lay *trtLayout) path(table, id string) string {
	return fmt.Sprintf("%s/split=%s/part-%05d.parquet", table, lay.split[id], lay.part[id])
}

// trtRuns turns a sorted set of rows into [start, end) ranges (the test's
// own implementation).
func trtRuns(rows []int64) [][2]int64 {
	sort.Slice(rows, func(i, j int) bool { return rows[i] < rows[j] })
	out := [][2]int64{}
	for _, r := range rows {
		if len(out) > 0 && out[len(out)-1][1] == r {
			out[len(out)-1][1] = r + 1
			continue
		}
		out = append(out, [2]int64{r, r + 1})
	}
	return out
}

type trtFixture struct {
	logs *trtLogs
	lay  *trtLayout
	v    *pipeline.Version
}

func trtSmall(t *testing.T) *trtFixture {
	t.Helper()
	l := trtFleet()
	return &trtFixture{logs: l, lay: trtExpect(l, false), v: trtBuild(t, trtConfig, l.files)}
}

func trtSortedSet(m map[string]bool) []string {
	var out []string
	for k := range m {
		out = append(out, k)
	}
	sort.Strings(out)
	return out
}

func trtDeepEqual(t *testing.T, what string, got, want any) {
	t.Helper()
	if !reflect.DeepEqual(got, want) {
		gj, _ := json.MarshalIndent(got, "", " ")
		wj, _ := json.MarshalIndent(want, "", " ")
		t.Errorf("%s:\n got %s\nwant %s", what, gj, wj)
	}
}

// ---- tests

func TestTraceFixtureLayout(t *testing.T) {
	// The fixture's premises, so the other tests test what they claim.
	fx := trtSmall(t)
	m := fx.v.Manifest
	if m.Funnel.Episodes != 4 || m.Funnel.Frames != 30+20+70+15 {
		t.Fatalf("funnel: %d episodes, %d frames; want 4 and 135", m.Funnel.Episodes, m.Funnel.Frames)
	}
	for _, f := range m.Files {
		if want := fx.lay.filesRows[f.Path]; f.Rows != want {
			t.Errorf("%s: %d rows in the manifest, want %d", f.Path, f.Rows, want)
		}
	}
	if len(m.Files) != len(fx.lay.filesRows) {
		t.Errorf("manifest has %d files, want %d", len(m.Files), len(fx.lay.filesRows))
	}
}

func TestTraceEpisode(t *testing.T) {
	trtCheckEpisodes(t, trtSmall(t))
}

func TestTraceEpisodeSplitByUnit(t *testing.T) {
	// split_by: unit: the split comes from the unit, not the id (SPEC §3.4).
	l := trtFleet()
	fx := &trtFixture{logs: l, lay: trtExpect(l, true), v: trtBuild(t, trtConfig+"split_by: unit\n", l.files)}
	trtCheckEpisodes(t, fx)
}

func trtCheckEpisodes(t *testing.T, fx *trtFixture) {
	t.Helper()
	ctx := context.Background()
	for _, id := range fx.logs.order {
		ep, lay := fx.logs.eps[id], fx.lay
		res, err := Trace(ctx, fx.v, TraceQuery{Episode: id})
		if err != nil {
			t.Fatalf("%s: %v", id, err)
		}
		n := int64(len(ep.steps))
		np := int64(len(lay.strategies)) * (n - 1)
		wantFiles := []TraceFile{
			{Path: lay.path("frames", id), Table: "frames", Split: lay.split[id], Partition: lay.part[id],
				Rows: [][2]int64{{lay.framesAt[id], lay.framesAt[id] + n}}, Episodes: []string{id}},
			{Path: lay.path("pairs", id), Table: "pairs", Split: lay.split[id], Partition: lay.part[id],
				Rows: [][2]int64{{lay.pairsAt[id], lay.pairsAt[id] + np}}, Episodes: []string{id}},
		}
		trtDeepEqual(t, id+" files", res.Files, wantFiles)
		wantEps := []TraceEpisode{{ID: id, Unit: ep.unit, Split: lay.split[id], Partition: lay.part[id], Steps: ep.steps}}
		trtDeepEqual(t, id+" episodes", res.Episodes, wantEps)
		if res.Kind != TraceKindEpisode || res.Dataset != "trace-test" || res.Version != "v1" {
			t.Errorf("%s: kind %q dataset %q version %q", id, res.Kind, res.Dataset, res.Version)
		}
	}
}

func TestTraceEpisodeWithoutConfig(t *testing.T) {
	// A manifest whose config cannot place the episode: every frames file is
	// searched (row-group statistics, then bloom filters) and the answer is
	// the same.
	fx := trtSmall(t)
	m := *fx.v.Manifest
	m.Config = json.RawMessage(`{}`)
	v := *fx.v
	v.Manifest = &m
	for _, id := range fx.logs.order {
		want, err := Trace(context.Background(), fx.v, TraceQuery{Episode: id})
		if err != nil {
			t.Fatal(err)
		}
		got, err := Trace(context.Background(), &v, TraceQuery{Episode: id})
		if err != nil {
			t.Fatalf("%s without config: %v", id, err)
		}
		trtDeepEqual(t, id+" files", got.Files, want.Files)
		trtDeepEqual(t, id+" episodes", got.Episodes, want.Episodes)
	}
}

// trtPair is a pairs row as arrow-go (an independent Parquet reader) reads
// it: its episode and step, and its goal's episode and step.
type trtPair struct {
	ep, goalEp     string
	step, goalStep int32
}

// trtPairsOf reads every row of a version's pairs shard with arrow-go.
func trtPairsOf(t *testing.T, v *pipeline.Version, path string) []trtPair {
	t.Helper()
	r, err := v.Store.Open(context.Background(), path, 0)
	if err != nil {
		t.Fatal(err)
	}
	raw, err := io.ReadAll(r)
	r.Close()
	if err != nil {
		t.Fatal(err)
	}
	rdr, err := file.NewParquetReader(bytes.NewReader(raw))
	if err != nil {
		t.Fatalf("arrow-go cannot open %s: %v", path, err)
	}
	defer rdr.Close()
	fr, err := pqarrow.NewFileReader(rdr, pqarrow.ArrowReadProperties{BatchSize: 4096}, memory.DefaultAllocator)
	if err != nil {
		t.Fatal(err)
	}
	tbl, err := fr.ReadTable(context.Background())
	if err != nil {
		t.Fatalf("arrow-go cannot read %s: %v", path, err)
	}
	defer tbl.Release()
	cols := map[string][]any{}
	for c := range int(tbl.NumCols()) {
		col := tbl.Column(c)
		for _, chunk := range col.Data().Chunks() {
			for i := range chunk.Len() {
				switch a := chunk.(type) {
				case *array.String:
					cols[col.Name()] = append(cols[col.Name()], a.Value(i))
				case *array.Int32:
					cols[col.Name()] = append(cols[col.Name()], a.Value(i))
				}
			}
		}
	}
	out := make([]trtPair, tbl.NumRows())
	for i := range out {
		out[i] = trtPair{ep: cols["episode"][i].(string), step: cols["step"][i].(int32),
			goalEp: cols["goal_episode"][i].(string), goalStep: cols["goal_step"][i].(int32)}
	}
	return out
}

// TestTraceSource checks a source's answer against one computed from the
// inputs and from the shards read whole by arrow-go: its frames rows, and
// every pairs row that holds one of its frames, as the row's own step, as
// its next step (next_obs), or as its goal (from the same episode, or from
// another one for negative goals).
func TestTraceSource(t *testing.T) {
	l := trtFleet()
	lay := trtExpect(l, false)
	ctx := context.Background()
	for _, negatives := range []int{0, 1} {
		v := trtBuild(t, strings.Replace(trtConfig, "negative: 0", fmt.Sprintf("negative: %d", negatives), 1), l.files)
		pairs := map[string][]trtPair{}
		for _, f := range v.Manifest.Files {
			if f.Table == "pairs" {
				pairs[f.Path] = trtPairsOf(t, v, f.Path)
			}
		}
		for _, key := range []string{"a.jsonl", "b.jsonl"} {
			what := fmt.Sprintf("negative %d, %s", negatives, key)
			rows := map[string][]int64{}
			epsOf := map[string]map[string]bool{}
			keep := func(path string, row int64, id string) {
				rows[path] = append(rows[path], row)
				if epsOf[path] == nil {
					epsOf[path] = map[string]bool{}
				}
				epsOf[path][id] = true
			}
			// Every step read from key and its frames row.
			from := map[string]map[int32]bool{}
			var wantEps []TraceEpisode
			ids := append([]string{}, l.order...)
			sort.Strings(ids)
			for _, id := range ids {
				ep := l.eps[id]
				var steps []TraceStep
				for _, s := range ep.steps {
					if s.Src != key {
						continue
					}
					steps = append(steps, s)
					if from[id] == nil {
						from[id] = map[int32]bool{}
					}
					from[id][s.Step] = true
					keep(lay.path("frames", id), lay.framesAt[id]+int64(s.Step), id)
				}
				if len(steps) > 0 {
					wantEps = append(wantEps, TraceEpisode{ID: id, Unit: ep.unit, Split: lay.split[id], Partition: lay.part[id], Steps: steps})
				}
			}
			// Every pairs row that holds one of those frames.
			asNext, asOtherGoal := 0, 0
			for path, ps := range pairs {
				for i, p := range ps {
					own, next, goal := from[p.ep][p.step], from[p.ep][p.step+1], from[p.goalEp][p.goalStep]
					if own || next || goal {
						keep(path, int64(i), p.ep)
					}
					if next && !own {
						asNext++
					}
					if goal && p.goalEp != p.ep && !own && !next {
						asOtherGoal++
					}
				}
			}
			// E2's steps 0–11 are in a.jsonl and 12–19 in b.jsonl: step 11's
			// rows (3 strategies, or 4 with a negative) hold b.jsonl's frame
			// as next_obs only.
			// E2 has a negative only when another episode shares its
			// partition and split (SPEC §3.3).
			e2neg := 0
			for _, id := range ids {
				ep := l.eps[id]
				if negatives == 0 || len(ep.steps) < 13 || ep.steps[11].Src != "a.jsonl" || ep.steps[12].Src != "b.jsonl" {
					continue
				}
				for _, o := range ids {
					if o != id && lay.part[o] == lay.part[id] && lay.split[o] == lay.split[id] {
						e2neg = negatives
					}
				}
			}
			if key == "b.jsonl" && asNext != 3+e2neg {
				t.Errorf("%s: %d pairs rows hold the source's frame as next_obs only, want %d (E2 step 11)", what, asNext, 3+e2neg)
			}
			if negatives > 0 && asOtherGoal == 0 {
				t.Errorf("%s: no pairs row of another episode took a frame of the source as its negative goal", what)
			}
			var wantFiles []TraceFile
			for path, rs := range rows {
				some := trtSortedSet(epsOf[path])
				var split string
				var part int
				for _, f := range v.Manifest.Files {
					if f.Path == path {
						split, part = f.Split, f.Partition
					}
				}
				wantFiles = append(wantFiles, TraceFile{Path: path, Table: strings.Split(path, "/")[0],
					Split: split, Partition: part, Rows: trtRuns(rs), Episodes: some})
			}
			sort.Slice(wantFiles, func(i, j int) bool { return wantFiles[i].Path < wantFiles[j].Path })

			// By key, and by the object's URI as the manifest records it.
			for _, q := range []string{key, pipeline.JoinURI(v.Manifest.SourceRoot, key)} {
				res, err := Trace(ctx, v, TraceQuery{Source: q})
				if err != nil {
					t.Fatalf("%s: %v", q, err)
				}
				trtDeepEqual(t, what+" files", res.Files, wantFiles)
				trtDeepEqual(t, what+" episodes", res.Episodes, wantEps)
				if res.Source == nil || res.Source.Key != key || res.Source.DuplicateOf != nil {
					t.Errorf("%s: source %+v", q, res.Source)
				}
			}
		}
		// a.jsonl has 44 lines: 42 frames, a blank line (not counted, SPEC
		// §1) and a malformed one.
		if res, err := Trace(ctx, v, TraceQuery{Source: "a.jsonl"}); err != nil || res.Source.Lines != 43 || res.Source.Kept != 42 {
			t.Errorf("a.jsonl: %+v, %v; want 43 lines, 42 kept", res.Source, err)
		}
	}
}

func TestTraceSourceEmpty(t *testing.T) {
	fx := trtSmall(t)
	ctx := context.Background()
	// c.jsonl's frames all fell in a short episode; d.jsonl is a duplicate
	// of a.jsonl: neither is in any file, and that is an answer, not an error.
	for key, dup := range map[string]string{"c.jsonl": "", "d.jsonl": "a.jsonl"} {
		res, err := Trace(ctx, fx.v, TraceQuery{Source: key})
		if err != nil {
			t.Fatalf("%s: %v", key, err)
		}
		if len(res.Files) != 0 || len(res.Episodes) != 0 || res.Files == nil || res.Episodes == nil {
			t.Errorf("%s: files %v episodes %v, want both empty (and not null)", key, res.Files, res.Episodes)
		}
		gotDup := ""
		if res.Source.DuplicateOf != nil {
			gotDup = *res.Source.DuplicateOf
		}
		if gotDup != dup || res.Source.Kept != 0 {
			t.Errorf("%s: duplicate_of %q kept %d, want %q and 0", key, gotDup, res.Source.Kept, dup)
		}
		j, _ := json.Marshal(res)
		if !bytes.Contains(j, []byte(`"files":[]`)) || !bytes.Contains(j, []byte(`"episodes":[]`)) {
			t.Errorf("%s: JSON %s lacks empty files and episodes", key, j)
		}
	}
	if _, err := Trace(ctx, fx.v, TraceQuery{Source: "nope.jsonl"}); err == nil || !strings.Contains(err.Error(), "not in the manifest") {
		t.Errorf("unknown source: %v", err)
	}
}

func TestTraceRowFrames(t *testing.T) {
	fx := trtSmall(t)
	lay := fx.lay
	for path, ids := range lay.fileOrder {
		if !strings.HasPrefix(path, "frames/") {
			continue
		}
		for _, id := range ids {
			for _, s := range fx.logs.eps[id].steps {
				row := lay.framesAt[id] + int64(s.Step)
				res, err := Trace(context.Background(), fx.v, TraceQuery{File: path, Row: row})
				if err != nil {
					t.Fatalf("%s row %d: %v", path, row, err)
				}
				r := res.Row
				if r == nil || r.Episode != id || r.Unit != fx.logs.eps[id].unit || r.Step != s.Step || r.Src != s.Src ||
					r.SrcLine != s.SrcLine || r.Table != "frames" || r.Goal != nil || r.RowGroup != int(row/64) {
					t.Errorf("%s row %d: %+v; want %s step %d from %s line %d, row group %d", path, row, r, id, s.Step, s.Src, s.SrcLine, row/64)
				}
				if want := pipeline.JoinURI(fx.v.Manifest.SourceRoot, s.Src); r != nil && r.SrcURI != want {
					t.Errorf("%s row %d: src_uri %s, want %s", path, row, r.SrcURI, want)
				}
				trtDeepEqual(t, "files", res.Files, []TraceFile{{Path: path, Table: "frames", Split: lay.split[id],
					Partition: lay.part[id], Rows: [][2]int64{{row, row + 1}}, Episodes: []string{id}}})
			}
		}
	}
}

func TestTraceRowPairs(t *testing.T) {
	fx := trtSmall(t)
	lay := fx.lay
	k := int64(len(lay.strategies))
	for path, ids := range lay.fileOrder {
		if !strings.HasPrefix(path, "pairs/") {
			continue
		}
		for _, id := range ids {
			ep := fx.logs.eps[id]
			last := int32(len(ep.steps) - 1)
			for s := range last {
				for j, strat := range lay.strategies {
					row := lay.pairsAt[id] + k*int64(s) + int64(j)
					res, err := Trace(context.Background(), fx.v, TraceQuery{File: path, Row: row})
					if err != nil {
						t.Fatalf("%s row %d: %v", path, row, err)
					}
					r, src := res.Row, ep.steps[s]
					if r.Episode != id || r.Step != s || r.Src != src.Src || r.SrcLine != src.SrcLine || r.Table != "pairs" || r.Goal == nil {
						t.Fatalf("%s row %d: %+v; want %s step %d from %s line %d", path, row, r, id, s, src.Src, src.SrcLine)
					}
					g := r.Goal
					// SPEC §3.3: final is the last step; future and geometric
					// offsets lie in 1…T−1−step (no horizon here).
					if g.Strategy != strat || g.Episode != id || g.Offset < 1 || g.Offset > last-s || g.Step != s+g.Offset ||
						strat == "final" && g.Step != last {
						t.Errorf("%s row %d: goal %+v; want strategy %s in %s, offset 1…%d", path, row, g, strat, id, last-s)
						continue
					}
					if want := ep.steps[g.Step]; g.Src != want.Src || g.SrcLine != want.SrcLine {
						t.Errorf("%s row %d: goal from %s line %d, want %s line %d", path, row, g.Src, g.SrcLine, want.Src, want.SrcLine)
					}
				}
			}
		}
	}
}

func TestTraceRowNegativeGoals(t *testing.T) {
	// With negative goals, a pairs row's goal frame is in another episode of
	// the same partition and split (SPEC §3.3): its source
	// line must come from that episode's frames.
	l := trtFleet()
	lay := trtExpect(l, false)
	v := trtBuild(t, strings.Replace(trtConfig, "negative: 0", "negative: 1", 1), l.files)
	// Negatives come from the same partition and split (SPEC §3.3).
	type pool struct {
		part  int
		split string
	}
	perPart := map[pool]int{}
	for _, id := range l.order {
		perPart[pool{lay.part[id], lay.split[id]}]++
	}
	// Pairs rows again: per step, future, geometric, final, and one
	// negative when the partition has another episode (all are arm).
	at := map[string]int64{}
	k := map[string]int64{}
	rows := map[string]int64{}
	ids := append([]string{}, l.order...)
	sort.Strings(ids)
	for _, id := range ids {
		k[id] = 3
		if perPart[pool{lay.part[id], lay.split[id]}] > 1 {
			k[id] = 4
		}
		p := lay.path("pairs", id)
		at[id] = rows[p]
		rows[p] += k[id] * int64(len(l.eps[id].steps)-1)
	}
	checked := 0
	for _, id := range ids {
		if k[id] != 4 {
			continue
		}
		ep := l.eps[id]
		for s := range int64(len(ep.steps) - 1) {
			row := at[id] + 4*s + 3
			res, err := Trace(context.Background(), v, TraceQuery{File: lay.path("pairs", id), Row: row})
			if err != nil {
				t.Fatalf("%s row %d: %v", lay.path("pairs", id), row, err)
			}
			r, g := res.Row, res.Row.Goal
			if r.Episode != id || r.Step != int32(s) || g.Strategy != "negative" || g.Offset != -1 || g.Episode == id {
				t.Fatalf("%s row %d: %+v goal %+v; want %s step %d with a negative goal", lay.path("pairs", id), row, r, g, id, s)
			}
			other, ok := l.eps[g.Episode]
			if !ok || lay.part[g.Episode] != lay.part[id] || int(g.Step) >= len(other.steps) {
				t.Fatalf("%s row %d: goal %+v is not a step of another episode of partition %d", lay.path("pairs", id), row, g, lay.part[id])
			}
			if want := other.steps[g.Step]; g.Src != want.Src || g.SrcLine != want.SrcLine {
				t.Errorf("%s row %d: goal from %s line %d, want %s line %d", lay.path("pairs", id), row, g.Src, g.SrcLine, want.Src, want.SrcLine)
			}
			checked++
		}
	}
	if checked == 0 {
		t.Fatal("no negative goal checked")
	}
}

func TestTraceErrors(t *testing.T) {
	fx := trtSmall(t)
	ctx := context.Background()
	frames := fx.lay.path("frames", fx.logs.order[0])
	n := fx.lay.filesRows[frames]
	for _, tc := range []struct {
		q    TraceQuery
		want string
	}{
		{TraceQuery{Episode: "arm-1-999"}, `episode "arm-1-999" not found`},
		{TraceQuery{Episode: "ghost-0"}, `episode "ghost-0" not found`}, // its frames were dropped
		{TraceQuery{Episode: "nodash"}, "not an episode id"},
		{TraceQuery{Episode: "arm-1-007"}, "not an episode id"}, // SPEC §3.2 ids carry no leading zeros
		{TraceQuery{File: frames, Row: n}, fmt.Sprintf("row %d out of range: %s has %d rows (0 to %d)", n, frames, n, n-1)},
		{TraceQuery{File: frames, Row: -1}, "row -1 out of range"},
		{TraceQuery{File: "frames/split=train/part-00099.parquet"}, "is not a file of this version"},
		{TraceQuery{}, "give a source, an episode"},
		{TraceQuery{Episode: "x-1", Source: "a.jsonl"}, "only one of"},
		{TraceQuery{Row: 3}, "a row needs a file"},
	} {
		_, err := Trace(ctx, fx.v, tc.q)
		if err == nil || !strings.Contains(err.Error(), tc.want) {
			t.Errorf("%+v: error %v, want one containing %q", tc.q, err, tc.want)
		}
	}
}

func TestTraceEpisodeUnits(t *testing.T) {
	for id, want := range map[string][]string{
		"arm-1-1000":                   {"arm-1"},
		"u-0":                          {"u"},
		"neg--5000000000":              {"neg-", "neg"}, // unit "neg-" at t=5e9, or unit "neg" at t=−5e9
		"u--9223372036854775808":       {"u"},           // −2^63 fits; +2^63 does not (int64)
		"u-9223372036854775808":        nil,
		"u-007":                        nil,
		"u-":                           nil,
		"-5":                           nil,
		"nodash":                       nil,
		"bad unit-5":                   nil,
		strings.Repeat("x", 65) + "-1": nil, // SPEC §1: 1–64 characters
	} {
		if got := trEpisodeUnits(id); !reflect.DeepEqual(got, want) {
			t.Errorf("trEpisodeUnits(%q) = %q, want %q", id, got, want)
		}
	}
}

func TestTraceText(t *testing.T) {
	fx := trtSmall(t)
	ctx := context.Background()
	e1 := fx.logs.order[0]
	res, err := Trace(ctx, fx.v, TraceQuery{Episode: e1})
	if err != nil {
		t.Fatal(err)
	}
	var b strings.Builder
	if err := res.WriteText(&b); err != nil {
		t.Fatal(err)
	}
	// E1's lines, by hand: step 0 on line 1, line 2 blank, steps 1–7 on
	// lines 3–9, line 10 malformed, steps 8–29 on lines 11–32.
	for _, want := range []string{
		"episode " + e1 + ": unit arm-1, split " + fx.lay.split[e1],
		"  step 0: a.jsonl line 1\n",
		"  steps 1-7: a.jsonl lines 3-9\n",
		"  steps 8-29: a.jsonl lines 11-32\n",
		fmt.Sprintf("  %s  30 rows in 1 range: [%d, %d)\n", fx.lay.path("frames", e1), fx.lay.framesAt[e1], fx.lay.framesAt[e1]+30),
	} {
		if !strings.Contains(b.String(), want) {
			t.Errorf("text lacks %q:\n%s", want, b.String())
		}
	}

	// --json: files as objects with a path relative to the version folder.
	j, err := json.Marshal(res)
	if err != nil {
		t.Fatal(err)
	}
	var doc struct {
		Files []struct {
			Path string     `json:"path"`
			Rows [][2]int64 `json:"rows"`
		} `json:"files"`
	}
	if err := json.Unmarshal(j, &doc); err != nil {
		t.Fatal(err)
	}
	if len(doc.Files) != 2 || doc.Files[0].Path != fx.lay.path("frames", e1) ||
		!reflect.DeepEqual(doc.Files[0].Rows, [][2]int64{{fx.lay.framesAt[e1], fx.lay.framesAt[e1] + 30}}) {
		t.Errorf("JSON files: %s", j)
	}

	// A source: its counts, and its episodes' steps from it.
	res, err = Trace(ctx, fx.v, TraceQuery{Source: "a.jsonl"})
	if err != nil {
		t.Fatal(err)
	}
	b.Reset()
	if err := res.WriteText(&b); err != nil {
		t.Fatal(err)
	}
	e2 := fx.logs.order[1]
	for _, want := range []string{
		"source a.jsonl (" + pipeline.JoinURI(fx.v.Manifest.SourceRoot, "a.jsonl") + ")\n",
		"  43 lines, 42 frames kept in 2 episodes\n",
		"episode " + e2 + ": unit arm-1, split " + fx.lay.split[e2] + fmt.Sprintf(", partition %d, 12 steps from this source\n", fx.lay.part[e2]),
		"  steps 0-11: a.jsonl lines 33-44\n",
	} {
		if !strings.Contains(b.String(), want) {
			t.Errorf("text lacks %q:\n%s", want, b.String())
		}
	}

	// A pairs row names its goal.
	pp := fx.lay.path("pairs", e1)
	row := fx.lay.pairsAt[e1] + 2 // step 0, final
	res, err = Trace(ctx, fx.v, TraceQuery{File: pp, Row: row})
	if err != nil {
		t.Fatal(err)
	}
	b.Reset()
	if err := res.WriteText(&b); err != nil {
		t.Fatal(err)
	}
	for _, want := range []string{
		fmt.Sprintf("%s row %d (row group %d)\n", pp, row, row/64),
		"  episode " + e1 + " step 0 (unit arm-1)\n",
		"  from a.jsonl line 1\n",
		"  goal (final): episode " + e1 + " step 29, offset 29, from a.jsonl line 32\n",
	} {
		if !strings.Contains(b.String(), want) {
			t.Errorf("text lacks %q:\n%s", want, b.String())
		}
	}
}

// A source's rows in a pairs file can be hundreds of ranges: the text
// shows per file the rows, the ranges and the first trTextRanges (5) of
// them, and --json keeps every range.
func TestTraceTextRangesCapped(t *testing.T) {
	var many [][2]int64 // 8 ranges of 2 rows: [0, 2) [10, 12) … [70, 72)
	for i := int64(0); i < 8; i++ {
		many = append(many, [2]int64{10 * i, 10*i + 2})
	}
	res := &TraceResult{
		Query: TraceQuery{Source: "a.jsonl"}, Kind: TraceKindSource, Dataset: "d", Version: "v1",
		Source: &TraceSource{Key: "a.jsonl", URI: "file:///logs/a.jsonl", Lines: 9, Kept: 1},
		Files: []TraceFile{
			{Path: "frames/split=train/part-00000.parquet", Table: "frames", Split: "train",
				Rows: [][2]int64{{3, 4}}, Episodes: []string{"u-1"}},
			{Path: "frames/split=val/part-00001.parquet", Table: "frames", Split: "val", Partition: 1,
				Rows: [][2]int64{{0, 3}, {5, 6}}, Episodes: []string{"u-2", "u-3"}},
			{Path: "pairs/split=test/part-00000.parquet", Table: "pairs", Split: "test",
				Rows: many[:5], Episodes: []string{"u-4"}},
			{Path: "pairs/split=train/part-00000.parquet", Table: "pairs", Split: "train",
				Rows: many, Episodes: []string{"u-1"}},
			{Path: "pairs/split=val/part-00001.parquet", Table: "pairs", Split: "val", Partition: 1,
				Rows: many[:6], Episodes: []string{"u-2"}},
		},
		Episodes: []TraceEpisode{},
		Cost:     TraceCost{Files: 5, FileBytes: 1000, Bytes: 100, Requests: 7},
	}
	var b strings.Builder
	if err := res.WriteText(&b); err != nil {
		t.Fatal(err)
	}
	want := "source a.jsonl (file:///logs/a.jsonl)\n" +
		"  9 lines, 0 frames kept in 0 episodes\n" +
		"files:\n" +
		"  frames/split=train/part-00000.parquet  1 row in 1 range: [3, 4)\n" +
		"    episodes: u-1\n" +
		"  frames/split=val/part-00001.parquet  4 rows in 2 ranges: [0, 3) [5, 6)\n" +
		"    episodes: u-2, u-3\n" +
		"  pairs/split=test/part-00000.parquet  10 rows in 5 ranges: [0, 2) [10, 12) [20, 22) [30, 32) [40, 42)\n" +
		"    episodes: u-4\n" +
		"  pairs/split=train/part-00000.parquet  16 rows in 8 ranges: [0, 2) [10, 12) [20, 22) [30, 32) [40, 42) … and 3 more ranges\n" +
		"    episodes: u-1\n" +
		"  pairs/split=val/part-00001.parquet  12 rows in 6 ranges: [0, 2) [10, 12) [20, 22) [30, 32) [40, 42) … and 1 more range\n" +
		"    episodes: u-2\n" +
		"read 100 of 1000 bytes of 5 files in 7 requests\n"
	if b.String() != want {
		t.Errorf("text\n%s\nwant\n%s", b.String(), want)
	}

	j, err := json.Marshal(res)
	if err != nil {
		t.Fatal(err)
	}
	var doc struct {
		Files []struct {
			Rows [][2]int64 `json:"rows"`
		} `json:"files"`
	}
	if err := json.Unmarshal(j, &doc); err != nil {
		t.Fatal(err)
	}
	if len(doc.Files) != 5 || !reflect.DeepEqual(doc.Files[3].Rows, many) {
		t.Errorf("JSON files %s, want the pairs train file with all 8 ranges", j)
	}
}

func TestTraceBloomRulesOut(t *testing.T) {
	// When every frames file must be searched, a row group whose statistics
	// admit an id is still skipped when its bloom filter on episode says
	// the id is absent. Bloom filters have no false negatives (Bloom 1970);
	// at the writer's 10 bits per value false positives are about 1% (from
	// memory), and none occur for these few ids (the inputs are fixed, so
	// this is deterministic).
	fx := trtSmall(t)
	tr := newTracer(context.Background(), fx.v)
	defer tr.close()
	ruledOut := 0
	for _, f := range fx.v.Manifest.Files {
		if f.Table != "frames" {
			continue
		}
		tf, err := tr.file(f.Path)
		if err != nil {
			t.Fatal(err)
		}
		in := map[string]bool{}
		for _, id := range fx.lay.fileOrder[f.Path] {
			in[id] = true
		}
		for _, id := range fx.logs.order {
			byStats, err := tf.groups("episode", trAdmitOne(id), nil)
			if err != nil {
				t.Fatal(err)
			}
			withBloom, err := tf.groups("episode", trAdmitOne(id), []byte(id))
			if err != nil {
				t.Fatal(err)
			}
			// 64-row groups (row_group_rows): the groups holding the id's rows.
			var want []int
			if in[id] {
				first, n := fx.lay.framesAt[id], int64(len(fx.logs.eps[id].steps))
				for g := first / 64; g <= (first+n-1)/64; g++ {
					want = append(want, int(g))
				}
			}
			if !reflect.DeepEqual(withBloom, want) {
				t.Errorf("%s, %s: groups %v with the bloom filter, want %v", f.Path, id, withBloom, want)
			}
			if len(byStats) > len(withBloom) {
				ruledOut++
			}
		}
	}
	// frames/split=train/part-00000.parquet holds arm-1-1000000000 and
	// neg--5000000000 in one group: its statistics admit cart7-7000000000,
	// which sorts between them (see trtFleet and trtExpect).
	if ruledOut == 0 {
		t.Error("no row group was ruled out by its bloom filter alone; the fixture no longer tests it")
	}
}

func TestTraceReaderAt(t *testing.T) {
	dir := t.TempDir()
	data := make([]byte, 100_000)
	for i := range data {
		data[i] = byte(i * 7)
	}
	if err := os.WriteFile(filepath.Join(dir, "obj"), data, 0o644); err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	store := pipeline.NewLocalStore(dir)
	if _, err := trOpenReaderAt(ctx, store, "missing"); err == nil || !errors.Is(err, pipeline.ErrNotFound) {
		t.Errorf("missing object: %v, want ErrNotFound", err)
	}
	ra, err := trOpenReaderAt(ctx, store, "obj")
	if err != nil {
		t.Fatal(err)
	}
	defer ra.Close()
	for _, tc := range []struct {
		off, n    int64
		wantN     int
		eof       bool
		wantOpens int64
	}{
		{0, 100, 100, false, 1},
		{100, 1000, 1000, false, 1},                          // continues the stream
		{1100 + trMaxSkip, 10, 10, false, 1},                 // a small jump forward: skipped over
		{1110 + trMaxSkip + 1 + trMaxSkip, 10, 10, false, 2}, // a long one: reopened
		{50, 10, 10, false, 3},                               // backward: reopened
		{99_990, 20, 10, true, 4},                            // the end: short, with io.EOF (io.ReaderAt)
		{100_000, 5, 0, true, 4},                             // past the end: nothing, no request
	} {
		p := make([]byte, tc.n)
		n, err := ra.ReadAt(p, tc.off)
		if n != tc.wantN || (err == io.EOF) != tc.eof || err != nil && err != io.EOF {
			t.Errorf("ReadAt(%d bytes at %d) = %d, %v; want %d, eof %v", tc.n, tc.off, n, err, tc.wantN, tc.eof)
		}
		if !bytes.Equal(p[:n], data[tc.off:tc.off+int64(n)]) {
			t.Errorf("ReadAt(%d bytes at %d): wrong bytes", tc.n, tc.off)
		}
		if ra.opens != tc.wantOpens {
			t.Errorf("after ReadAt(%d bytes at %d): %d opens, want %d", tc.n, tc.off, ra.opens, tc.wantOpens)
		}
	}
}

// trtCountStore counts the bytes read from each key through Open.
type trtCountStore struct {
	pipeline.Store
	mu   sync.Mutex
	read map[string]int64
}

func (s *trtCountStore) Open(ctx context.Context, key string, offset int64) (io.ReadCloser, error) {
	rc, err := s.Store.Open(ctx, key, offset)
	if err != nil {
		return nil, err
	}
	return &trtCountReader{ReadCloser: rc, s: s, key: key}, nil
}

type trtCountReader struct {
	io.ReadCloser
	s   *trtCountStore
	key string
}

func (r *trtCountReader) Read(p []byte) (int, error) {
	n, err := r.ReadCloser.Read(p)
	r.s.mu.Lock()
	r.s.read[r.key] += int64(n)
	r.s.mu.Unlock()
	return n, err
}

func TestTraceReadsPartOfFile(t *testing.T) {
	// One unit, one partition, one split: one frames file and one pairs file
	// of 800 and 2,280 rows, in 64-row groups.
	const cfg = `dataset: trace-read
source:
  uri: logs
partitions: 1
embodiments:
  arm:
    obs: 2
    goal_tolerance: 0.01
episodes:
  min_steps: 5
goals:
  future: 1
  geometric: 1
  final: 1
splits: {train: 1}
parquet:
  row_group_rows: 64
`
	l := newTrtLogs()
	for e := range 40 {
		t0 := int64(e) * 10_000_000_000
		for s := range 20 {
			l.frame("u.jsonl", "solo", t0+int64(s)*trtDt, fmt.Sprintf("solo-%d", t0))
		}
	}
	v := trtBuild(t, cfg, l.files)
	cs := &trtCountStore{Store: v.Store, read: map[string]int64{}}
	counted := *v
	counted.Store = cs
	id := "solo-200000000000" // episode 20: rows 20·20… in byte order of ids
	res, err := Trace(context.Background(), &counted, TraceQuery{Episode: id})
	if err != nil {
		t.Fatal(err)
	}
	ids := append([]string{}, l.order...)
	sort.Strings(ids)
	at := int64(sort.SearchStrings(ids, id))
	want := []TraceFile{
		{Path: "frames/split=train/part-00000.parquet", Table: "frames", Split: "train", Rows: [][2]int64{{20 * at, 20*at + 20}}, Episodes: []string{id}},
		{Path: "pairs/split=train/part-00000.parquet", Table: "pairs", Split: "train", Rows: [][2]int64{{57 * at, 57*at + 57}}, Episodes: []string{id}},
	}
	trtDeepEqual(t, "files", res.Files, want)
	for _, f := range v.Manifest.Files {
		got := cs.read[f.Path]
		if got == 0 || got >= f.Bytes {
			t.Errorf("%s: read %d of its %d bytes; want some, and less than all", f.Path, got, f.Bytes)
		}
		t.Logf("%s: read %d of %d bytes", f.Path, got, f.Bytes)
	}
	if res.Cost.Bytes != cs.read[want[0].Path]+cs.read[want[1].Path] {
		t.Errorf("cost says %d bytes read, the store counted %d", res.Cost.Bytes, cs.read[want[0].Path]+cs.read[want[1].Path])
	}
}

// ---- benchmark: 10,000 episodes of 12 steps (120,000 lines, obs of 10 and
// act of 7 numbers) from 20 units in 200 objects, packed with small and
// with default-sized row groups.

func BenchmarkTrace(b *testing.B) {
	const cfg = `dataset: trace-bench
source:
  uri: logs
partitions: 4
embodiments:
  arm:
    obs: 10
    act: 7
    goal_dims: [7, 8, 9]
    goal_tolerance: 0.03
episodes:
  min_steps: 10
goals:
  future: 1
  geometric: 1
  final: 1
  negative: %d
parquet:
  row_group_rows: %d
`
	l := newTrtLogs()
	l.obs, l.act = 10, 7 // SPEC §2's example embodiment
	var sources []string
	for u := range 20 {
		unit := fmt.Sprintf("bench-%02d", u)
		for e := range 500 {
			file := fmt.Sprintf("%s/%03d.jsonl", unit, e/50)
			if e%50 == 0 {
				sources = append(sources, file)
			}
			// Times of today's epoch: ids of one unit sort by time.
			t0 := int64(1_700_000_000_000_000_000) + int64(e)*10_000_000_000
			for s := range 12 {
				l.frame(file, unit, t0+int64(s)*trtDt, fmt.Sprintf("%s-%d", unit, t0))
			}
		}
	}
	// Row groups of 1,024 and of the default 65,536 rows; and the default
	// with a negative goal per step, which a source query must also search
	// for (by the unsorted goal_episode column).
	for _, opt := range []struct{ negative, rg int }{{0, 1024}, {0, 65536}, {1, 65536}} {
		rg := opt.rg
		name := fmt.Sprintf("RowGroup=%d", rg)
		if opt.negative > 0 {
			name += "+negative"
		}
		v := trtBuild(b, fmt.Sprintf(cfg, opt.negative, rg), l.files)
		if v.Manifest.Funnel.Episodes != 10_000 {
			b.Fatalf("%d episodes, want 10000", v.Manifest.Funnel.Episodes)
		}
		var frames, pairs []pipeline.File
		for _, f := range v.Manifest.Files {
			if f.Table == "frames" {
				frames = append(frames, f)
			} else {
				pairs = append(pairs, f)
			}
		}
		ctx := context.Background()
		run := func(b *testing.B, q func(i int) TraceQuery) {
			var read, size int64
			i := 0
			for b.Loop() {
				res, err := Trace(ctx, v, q(i))
				if err != nil {
					b.Fatal(err)
				}
				read += res.Cost.Bytes
				size += res.Cost.FileBytes
				i++
			}
			// What a lookup read, beside the size of the files it opened.
			b.ReportMetric(float64(read)/float64(i), "read-B/op")
			b.ReportMetric(float64(size)/float64(i), "files-B/op")
		}
		b.Run(name+"/Episode", func(b *testing.B) {
			run(b, func(i int) TraceQuery { return TraceQuery{Episode: l.order[(i*7919)%len(l.order)]} })
		})
		b.Run(name+"/Source", func(b *testing.B) {
			run(b, func(i int) TraceQuery { return TraceQuery{Source: sources[(i*31)%len(sources)]} })
		})
		b.Run(name+"/RowFrames", func(b *testing.B) {
			run(b, func(i int) TraceQuery {
				f := frames[i%len(frames)]
				return TraceQuery{File: f.Path, Row: int64(i*7919) % f.Rows}
			})
		})
		b.Run(name+"/RowPairs", func(b *testing.B) {
			run(b, func(i int) TraceQuery {
				f := pairs[i%len(pairs)]
				return TraceQuery{File: f.Path, Row: int64(i*7919) % f.Rows}
			})
		})
	}
}

// TestTraceTextEpisodesCapped: a source's text lists at most ten episode ids
// per file, then how many more; a shorter list is given whole.
func TestTraceTextEpisodesCapped(t *testing.T) {
	var ids []string
	for i := range 12 {
		ids = append(ids, fmt.Sprintf("u-%02d", i))
	}
	if got, want := trListText(ids, trTextEpisodes), "u-00, u-01, u-02, u-03, u-04, u-05, u-06, u-07, u-08, u-09 … and 2 more"; got != want {
		t.Errorf("12 ids: %q, want %q", got, want)
	}
	if got, want := trListText(ids[:10], trTextEpisodes), strings.Join(ids[:10], ", "); got != want {
		t.Errorf("10 ids: %q, want %q", got, want)
	}
}
