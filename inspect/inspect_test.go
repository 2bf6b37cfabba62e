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
	"maps"
	"os"
	"path/filepath"
	"slices"
	"sort"
	"strings"
	"testing"

	"github.com/aws/aws-sdk-go-v2/aws"
	"github.com/aws/aws-sdk-go-v2/service/s3"

	"hindcast/internal/s3test"
	"hindcast/pipeline"
	"hindcast/stages"
)

// The tests run the real pipeline on a small hand-written fleet, then show,
// verify and diff the versions it commits. Every expected count comes from
// the fleet as written below and the SPEC's rules, worked out in this file,
// never from the program's output.

// vfConfigYAML is the test config; %d is goals.future. Two partitions and
// splits of 1/2, 1/4, 1/4 spread four episodes over several files.
const vfConfigYAML = `dataset: inspect-test
source:
  uri: src
work: work
output: out
partitions: 2
seed: 7
embodiments:
  arm:
    obs: 3
    act: 1
    goal_tolerance: 0.05
  cart:
    obs: 2
    act: 1
    goal_tolerance: 0.05
episodes:
  max_gap: 500ms
  min_steps: 2
  max_steps: 100
goals:
  future: %d
  geometric: 0
  final: 1
  negative: 0
  gamma: 0.9
  horizon: 0
splits: {train: 0.5, val: 0.25, test: 0.25}
split_by: episode
float: float32
parquet:
  compression: zstd
  row_group_rows: 1000
`

// vfFrame writes one valid frame line (SPEC §1).
func vfFrame(unit, emb string, t int64, obs ...float64) string {
	parts := make([]string, len(obs))
	for i, x := range obs {
		parts[i] = fmt.Sprint(x)
	}
	return fmt.Sprintf(`{"unit":%q,"embodiment":%q,"t":%d,"obs":[%s],"act":[0.5]}`+"\n", unit, emb, t, strings.Join(parts, ","))
}

// vfSteps writes n frames of a unit 100 ms apart from t0.
func vfSteps(unit, emb string, t0 int64, n int, dims int) string {
	var b strings.Builder
	for i := range n {
		obs := make([]float64, dims)
		obs[0] = float64(i) / 10
		b.WriteString(vfFrame(unit, emb, t0+int64(i)*100_000_000, obs...))
	}
	return b.String()
}

// vfFleet is the test fleet. What becomes of each line (SPEC §3.1, §3.2):
//
//	a/u1.jsonl       14 lines: 5 frames (episode u1-1000000000), a line that is
//	                 not JSON (malformed), a NaN obs (non_finite), 7 frames
//	                 4 s later (episode u1-5000000000)
//	b/u2.jsonl        5 lines: 3 frames (episode u2-2000000000), one frame 7 s
//	                 later alone (a 1-step chunk: short_episode), an undeclared
//	                 embodiment (unknown_embodiment)
//	c/u2-copy.jsonl  the bytes of b/u2.jsonl: a duplicate object, no lines
//	d/u3.jsonl       11 lines: 10 cart frames (episode u3-3000000000), with a
//	                 repeat of the 5th frame's t after it (time_regress)
//
// So lines 14+5+11 = 30, frames 5+7+3+10 = 25, dropped 5 (one per reason).
func vfFleet() map[string][]byte {
	u1 := vfSteps("u1", "arm", 1_000_000_000, 3, 3) +
		"{not json\n" +
		vfSteps("u1", "arm", 1_300_000_000, 2, 3) +
		`{"unit":"u1","embodiment":"arm","t":1450000000,"obs":[NaN,0,0],"act":[0.5]}` + "\n" +
		vfSteps("u1", "arm", 5_000_000_000, 7, 3)
	u2 := vfSteps("u2", "arm", 2_000_000_000, 3, 3) +
		vfFrame("u2", "arm", 9_000_000_000, 1, 1, 1) +
		vfFrame("u2", "ghost", 9_100_000_000, 1, 1, 1)
	u3 := vfSteps("u3", "cart", 3_000_000_000, 5, 2) +
		vfFrame("u3", "cart", 3_400_000_000, 9, 9) + // same t as the 5th frame
		vfSteps("u3", "cart", 3_500_000_000, 5, 2)
	return map[string][]byte{
		"a/u1.jsonl":      []byte(u1),
		"b/u2.jsonl":      []byte(u2),
		"c/u2-copy.jsonl": []byte(u2),
		"d/u3.jsonl":      []byte(u3),
	}
}

// vfExtra is the object the second version of the diff test adds: one arm
// episode of 4 steps.
func vfExtra() map[string][]byte {
	return map[string][]byte{"e/u5.jsonl": []byte(vfSteps("u5", "arm", 7_000_000_000, 4, 3))}
}

// vfEpisode is one episode the fleet must give.
type vfEpisode struct {
	id, unit, emb string
	steps         int64
}

func vfEpisodes() []vfEpisode {
	return []vfEpisode{
		{"u1-1000000000", "u1", "arm", 5},
		{"u1-5000000000", "u1", "arm", 7},
		{"u2-2000000000", "u2", "arm", 3},
		{"u3-3000000000", "u3", "cart", 10},
	}
}

var vfExtraEpisode = vfEpisode{"u5-7000000000", "u5", "arm", 4}

// vfPartition is SPEC §3.4: BE_uint64(sha256(unit)[0:8]) mod partitions.
func vfPartition(unit string) int {
	h := sha256.Sum256([]byte(unit))
	return int(binary.BigEndian.Uint64(h[:8]) % 2)
}

// vfSplit is SPEC §3.4 for train 1/2, val 1/4, test 1/4: u < 1/2 is
// x < 2^63, u < 3/4 is x < 3·2^62 (exact in integers).
func vfSplit(id string) string {
	h := sha256.Sum256([]byte(id))
	x := binary.BigEndian.Uint64(h[:8])
	switch {
	case x < 1<<63:
		return "train"
	case x < 3<<62:
		return "val"
	}
	return "test"
}

// vfPairs is the pairs of an episode of T steps (SPEC §3.3): steps 0…T−2
// each get future goals and one final goal.
func vfPairs(e vfEpisode, future int64) int64 { return (future + 1) * (e.steps - 1) }

// vfFileModel is a file the model expects: rows and episodes.
type vfFileModel struct{ rows, episodes int64 }

// vfFiles lays the episodes out as SPEC §4 says: one frames and one pairs
// file per (split, partition) with episodes.
func vfFiles(eps []vfEpisode, future int64) map[string]vfFileModel {
	out := map[string]vfFileModel{}
	for _, e := range eps {
		for _, table := range []string{"frames", "pairs"} {
			p := fmt.Sprintf("%s/split=%s/part-%05d.parquet", table, vfSplit(e.id), vfPartition(e.unit))
			f := out[p]
			f.episodes++
			if table == "frames" {
				f.rows += e.steps
			} else {
				f.rows += vfPairs(e, future)
			}
			out[p] = f
		}
	}
	return out
}

// vfWriteTree writes files under root.
func vfWriteTree(t *testing.T, root string, files map[string][]byte) {
	t.Helper()
	for k, b := range files {
		p := filepath.Join(root, filepath.FromSlash(k))
		if err := os.MkdirAll(filepath.Dir(p), 0o755); err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(p, b, 0o644); err != nil {
			t.Fatal(err)
		}
	}
}

// vfRun adds files to dir/src, writes the config with goals.future, runs
// every stage into version and opens it.
func vfRun(t *testing.T, dir string, files map[string][]byte, future int, version string) *pipeline.Version {
	t.Helper()
	return vfRunConfig(t, dir, files, fmt.Sprintf(vfConfigYAML, future), version)
}

// vfRunConfig is vfRun with the config text given whole.
func vfRunConfig(t *testing.T, dir string, files map[string][]byte, config, version string) *pipeline.Version {
	t.Helper()
	vfWriteTree(t, filepath.Join(dir, "src"), files)
	cfgPath := filepath.Join(dir, "hindcast.yaml")
	if err := os.WriteFile(cfgPath, []byte(config), 0o644); err != nil {
		t.Fatal(err)
	}
	cfg, err := pipeline.LoadConfig(cfgPath)
	if err != nil {
		t.Fatalf("load config: %v", err)
	}
	ctx := context.Background()
	if _, err := pipeline.Execute(ctx, cfg, stages.All(), pipeline.Options{Version: version, Parallel: 2}); err != nil {
		t.Fatalf("run pipeline: %v", err)
	}
	v, err := pipeline.OpenVersion(ctx, filepath.Join(dir, "out", "inspect-test", version), pipeline.StorageConfig{})
	if err != nil {
		t.Fatalf("open version: %v", err)
	}
	return v
}

// vfBase runs the fleet once with goals.future 1 and returns the version
// and its local folder.
func vfBase(t *testing.T) (*pipeline.Version, string) {
	t.Helper()
	dir := t.TempDir()
	v := vfRun(t, dir, vfFleet(), 1, "v1")
	return v, filepath.Join(dir, "out", "inspect-test", "v1")
}

// TestShowCounts checks Show on a real run against the fleet's model.
func TestShowCounts(t *testing.T) {
	v, _ := vfBase(t)
	r := Show(v)
	fleet := vfFleet()

	var srcBytes int64
	for _, b := range fleet {
		srcBytes += int64(len(b))
	}
	wantSrc := ShowSources{Objects: 4, Bytes: srcBytes, Duplicates: 1, Incomplete: 0, IncompleteKeys: []string{}}
	if !vfEqualJSON(r.Sources, wantSrc) {
		t.Errorf("sources %+v, want %+v", r.Sources, wantSrc)
	}

	// Funnel: every reason in the order of the one list (pipeline.Reasons);
	// see vfFleet.
	drops := map[string]int64{"malformed": 1, "non_finite": 1, "unknown_embodiment": 1, "time_regress": 1, "short_episode": 1}
	order := pipeline.Reasons()
	var reasons []ShowReason
	for _, name := range order {
		reasons = append(reasons, ShowReason{Reason: name, Count: drops[name], Share: float64(drops[name]) / 30})
	}
	wantFunnel := ShowFunnel{Lines: 30, Frames: 25, FramesShare: 25.0 / 30, Dropped: 5, DropShare: 5.0 / 30,
		Reasons: reasons, Episodes: 4, Pairs: 2 * (4 + 6 + 2 + 9)}
	if !vfEqualJSON(r.Funnel, wantFunnel) {
		t.Errorf("funnel\n got %+v\nwant %+v", r.Funnel, wantFunnel)
	}
	// The same numbers as the manifest's own funnel.
	mf := v.Manifest.Funnel
	if r.Funnel.Lines != mf.Lines || r.Funnel.Frames != mf.Frames || r.Funnel.Pairs != mf.Pairs || r.Funnel.Episodes != mf.Episodes {
		t.Errorf("funnel %+v disagrees with the manifest's %+v", r.Funnel, mf)
	}

	// Counts per (embodiment, split), embodiments by name, splits train, val, test.
	cells := map[[2]string]*pipeline.Count{}
	for _, e := range vfEpisodes() {
		k := [2]string{e.emb, vfSplit(e.id)}
		if cells[k] == nil {
			cells[k] = &pipeline.Count{Embodiment: e.emb, Split: k[1]}
		}
		cells[k].Episodes++
		cells[k].Frames += e.steps
		cells[k].Pairs += vfPairs(e, 1)
	}
	var wantCounts []pipeline.Count
	for _, emb := range []string{"arm", "cart"} {
		for _, split := range []string{"train", "val", "test"} {
			if c := cells[[2]string{emb, split}]; c != nil {
				wantCounts = append(wantCounts, *c)
			}
		}
	}
	if !vfEqualJSON(r.Counts, wantCounts) {
		t.Errorf("counts %+v, want %+v", r.Counts, wantCounts)
	}

	// Lengths: arm 3, 5, 7 steps; nearest rank (N=3): p10 rank 1, p50 rank
	// ⌈1.5⌉=2, p90 rank ⌈2.7⌉=3. cart: one episode of 10.
	wantLengths := []ShowLengths{
		{Embodiment: "arm", Episodes: 3, P0: 3, P10: 3, P50: 5, P90: 7, P100: 7},
		{Embodiment: "cart", Episodes: 1, P0: 10, P10: 10, P50: 10, P90: 10, P100: 10},
	}
	if !vfEqualJSON(r.Lengths, wantLengths) {
		t.Errorf("lengths %+v, want %+v", r.Lengths, wantLengths)
	}

	// Files per (table, split), from the layout model, with bytes from disk.
	model := vfFiles(vfEpisodes(), 1)
	groups := map[[2]string]*ShowFileGroup{}
	var total ShowFiles
	for p, f := range model {
		table, rest, _ := strings.Cut(p, "/split=")
		split, _, _ := strings.Cut(rest, "/")
		info, err := os.Stat(filepath.Join(strings.TrimPrefix(v.URI, "file://"), p))
		if err != nil {
			t.Fatalf("model file %s: %v", p, err)
		}
		k := [2]string{table, split}
		if groups[k] == nil {
			groups[k] = &ShowFileGroup{Table: table, Split: split}
		}
		groups[k].Count++
		groups[k].Rows += f.rows
		groups[k].Bytes += info.Size()
		total.Count++
		total.Rows += f.rows
		total.Bytes += info.Size()
	}
	for _, table := range []string{"frames", "pairs"} {
		for _, split := range []string{"train", "val", "test"} {
			if g := groups[[2]string{table, split}]; g != nil {
				total.Groups = append(total.Groups, *g)
			}
		}
	}
	if !vfEqualJSON(r.Files, total) {
		t.Errorf("files %+v, want %+v", r.Files, total)
	}
	if len(r.Notes) != 0 {
		t.Errorf("notes %q, want none", r.Notes)
	}

	var buf bytes.Buffer
	if err := r.WriteText(&buf); err != nil {
		t.Fatal(err)
	}
	text := buf.String()
	sp := func(n int) string { return strings.Repeat(" ", n) }
	// Aligned columns (house style of ui.go printSummary): names left, numbers right.
	for _, line := range []string{
		"  embodiment  episodes  p0  p10  p50  p90  p100\n",
		"  arm                3   3    3    5    7     7\n",
		"  cart               1  10   10   10   10    10\n",
		// After the two-space indent: the name column is 20 wide ("  unknown_embodiment",
		// reasons indented by two within it), count 5 ("count"), share 8 ("of
		// lines"), two spaces between columns.
		"  lines" + sp(15+2+3) + "30" + sp(2+1) + "100.00%\n",
		"  frames kept" + sp(9+2+3) + "25" + sp(2+2) + "83.33%\n",
		"    malformed" + sp(9+2+4) + "1" + sp(2+3) + "3.33%\n",
		"    oversize" + sp(10+2+4) + "0" + sp(2+3) + "0.00%\n",
		"sources   4 objects, " + shBytes(srcBytes) + ", 1 duplicate, 0 incomplete\n",
		"episodes  4   pairs 42\n",
	} {
		if !strings.Contains(text, line) {
			t.Errorf("text lacks %q:\n%s", line, text)
		}
	}
}

// TestShowHandMade checks Show on a manifest written by hand: quantiles of
// hand-made histograms (expected values worked out by the nearest-rank
// rule, rank ⌈p/100·N⌉), source tallies, file groups in table and split
// order, and a reason this build does not know.
func TestShowHandMade(t *testing.T) {
	dupOf := "a.jsonl"
	m := &pipeline.Manifest{
		Dataset: "hand", Version: "h1",
		Sources: []pipeline.Source{
			{Key: "a.jsonl", Bytes: 10},
			{Key: "b.jsonl", Bytes: 20, DuplicateOf: &dupOf},
			{Key: "c.jsonl.gz", Bytes: 30, Incomplete: true},
			{Key: "d.jsonl.zst", Bytes: 40, Incomplete: true},
		},
		Funnel: pipeline.Funnel{Lines: 200, Frames: 190, Episodes: 3, Pairs: 7,
			Dropped: map[string]int64{"malformed": 4, "short_episode": 3, "mystery": 2, "another": 1}},
		EpisodeSteps: map[string]map[string]int64{
			// N=10 sorted 2 2 2 4 9 9 9 9 9 12: p10 rank 1 → 2, p50 rank 5 → 9,
			// p90 rank 9 → 9, p100 rank 10 → 12.
			"a": {"2": 3, "4": 1, "9": 5, "12": 1},
			// N=7 of 1…7: p10 rank ⌈0.7⌉=1 → 1, p50 rank ⌈3.5⌉=4 → 4, p90 rank ⌈6.3⌉=7 → 7.
			"b": {"1": 1, "2": 1, "3": 1, "4": 1, "5": 1, "6": 1, "7": 1},
			// N=20 of 1…20: p10 rank 2 → 2, p50 rank 10 → 10, p90 rank 18 → 18.
			"d": {},
			"c": {"5": 20},
			// A key that is not a length: noted, left out (N=2 of 4).
			"f": {"x": 3, "4": 2},
			// No episodes: not listed.
			"e": {},
		},
		Files: []pipeline.File{
			{Path: "pairs/split=val/part-00001.parquet", Table: "pairs", Split: "val", Rows: 5, Bytes: 500},
			{Path: "frames/split=test/part-00000.parquet", Table: "frames", Split: "test", Rows: 3, Bytes: 300},
			{Path: "frames/split=train/part-00000.parquet", Table: "frames", Split: "train", Rows: 7, Bytes: 700},
			{Path: "frames/split=train/part-00001.parquet", Table: "frames", Split: "train", Rows: 11, Bytes: 1100},
			{Path: "pairs/split=train/part-00000.parquet", Table: "pairs", Split: "train", Rows: 13, Bytes: 1300},
		},
	}
	for i := 1; i <= 20; i++ {
		m.EpisodeSteps["d"][fmt.Sprint(i)] = 1
	}
	r := Show(&pipeline.Version{URI: "file:///x/hand/h1/", Manifest: m})

	wantLengths := []ShowLengths{
		{Embodiment: "a", Episodes: 10, P0: 2, P10: 2, P50: 9, P90: 9, P100: 12},
		{Embodiment: "b", Episodes: 7, P0: 1, P10: 1, P50: 4, P90: 7, P100: 7},
		{Embodiment: "c", Episodes: 20, P0: 5, P10: 5, P50: 5, P90: 5, P100: 5},
		{Embodiment: "d", Episodes: 20, P0: 1, P10: 2, P50: 10, P90: 18, P100: 20},
		{Embodiment: "f", Episodes: 2, P0: 4, P10: 4, P50: 4, P90: 4, P100: 4},
	}
	if !vfEqualJSON(r.Lengths, wantLengths) {
		t.Errorf("lengths\n got %+v\nwant %+v", r.Lengths, wantLengths)
	}
	if len(r.Notes) != 1 || !strings.Contains(r.Notes[0], `episode_steps.f`) || !strings.Contains(r.Notes[0], `"x"`) {
		t.Errorf("notes %q, want one naming episode_steps.f entry \"x\"", r.Notes)
	}

	wantSrc := ShowSources{Objects: 4, Bytes: 100, Duplicates: 1, Incomplete: 2, IncompleteKeys: []string{"c.jsonl.gz", "d.jsonl.zst"}}
	if !vfEqualJSON(r.Sources, wantSrc) {
		t.Errorf("sources %+v, want %+v", r.Sources, wantSrc)
	}

	// Every known reason in SPEC order, then the unknown ones by name.
	var names []string
	for _, x := range r.Funnel.Reasons {
		names = append(names, x.Reason)
		if want := map[string]int64{"malformed": 4, "short_episode": 3, "mystery": 2, "another": 1}[x.Reason]; x.Count != want {
			t.Errorf("reason %s: %d, want %d", x.Reason, x.Count, want)
		}
	}
	wantNames := append(pipeline.Reasons(), "another", "mystery")
	if !slices.Equal(names, wantNames) {
		t.Errorf("reasons %q, want %q", names, wantNames)
	}
	if r.Funnel.Dropped != 10 || r.Funnel.DropShare != 0.05 || r.Funnel.FramesShare != 0.95 {
		t.Errorf("dropped %d (%v), frames share %v; want 10 (0.05), 0.95", r.Funnel.Dropped, r.Funnel.DropShare, r.Funnel.FramesShare)
	}

	wantFiles := ShowFiles{Count: 5, Bytes: 3900, Rows: 39, Groups: []ShowFileGroup{
		{Table: "frames", Split: "train", Count: 2, Bytes: 1800, Rows: 18},
		{Table: "frames", Split: "test", Count: 1, Bytes: 300, Rows: 3},
		{Table: "pairs", Split: "train", Count: 1, Bytes: 1300, Rows: 13},
		{Table: "pairs", Split: "val", Count: 1, Bytes: 500, Rows: 5},
	}}
	if !vfEqualJSON(r.Files, wantFiles) {
		t.Errorf("files\n got %+v\nwant %+v", r.Files, wantFiles)
	}

	var buf bytes.Buffer
	if err := r.WriteText(&buf); err != nil {
		t.Fatal(err)
	}
	for _, line := range []string{
		"  incomplete c.jsonl.gz\n",
		"  table   split  files  rows   bytes\n",
		"  frames  train      2    18  1.8 kB\n",
		"  pairs   val        1     5   500 B\n",
		"note: episode_steps.f: ",
	} {
		if !strings.Contains(buf.String(), line) {
			t.Errorf("text lacks %q:\n%s", line, buf.String())
		}
	}
}

// vfEqualJSON compares two values through their JSON form (what --json prints).
func vfEqualJSON(got, want any) bool {
	a, err1 := json.Marshal(got)
	b, err2 := json.Marshal(want)
	return err1 == nil && err2 == nil && bytes.Equal(a, b)
}

// vfCopy copies a version folder file by file into a fresh folder, so that
// damaging the copy cannot touch the original (committed files can be hard
// links to the work area's).
func vfCopy(t *testing.T, src string) string {
	t.Helper()
	dst := filepath.Join(t.TempDir(), "v")
	err := filepath.WalkDir(src, func(p string, d os.DirEntry, err error) error {
		if err != nil || d.IsDir() {
			return err
		}
		rel, _ := filepath.Rel(src, p)
		b, err := os.ReadFile(p)
		if err != nil {
			return err
		}
		out := filepath.Join(dst, rel)
		if err := os.MkdirAll(filepath.Dir(out), 0o755); err != nil {
			return err
		}
		return os.WriteFile(out, b, 0o644)
	})
	if err != nil {
		t.Fatal(err)
	}
	return dst
}

// vfOpen opens a local version folder.
func vfOpen(t *testing.T, dir string) *pipeline.Version {
	t.Helper()
	v, err := pipeline.OpenVersion(context.Background(), dir, pipeline.StorageConfig{})
	if err != nil {
		t.Fatalf("open %s: %v", dir, err)
	}
	return v
}

// vfProblems is a result's problems as "subject check" strings, sorted.
func vfProblems(r *VerifyResult) []string {
	var out []string
	for _, p := range r.Problems {
		out = append(out, p.Subject+" "+p.Check)
	}
	sort.Strings(out)
	return out
}

// vfEditManifest rewrites manifest.json through generic JSON (numbers kept
// as written, so nothing else changes).
func vfEditManifest(t *testing.T, dir string, edit func(m map[string]any)) {
	t.Helper()
	p := filepath.Join(dir, "manifest.json")
	raw, err := os.ReadFile(p)
	if err != nil {
		t.Fatal(err)
	}
	dec := json.NewDecoder(bytes.NewReader(raw))
	dec.UseNumber()
	var m map[string]any
	if err := dec.Decode(&m); err != nil {
		t.Fatal(err)
	}
	edit(m)
	out, err := json.MarshalIndent(m, "", "  ")
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(p, out, 0o644); err != nil {
		t.Fatal(err)
	}
}

func TestVerify(t *testing.T) {
	ctx := context.Background()
	base, dir := vfBase(t)
	model := vfFiles(vfEpisodes(), 1)
	paths := slices.Sorted(maps.Keys(model))
	var framesPath, pairsPath string
	for _, p := range paths {
		if framesPath == "" && strings.HasPrefix(p, "frames/") {
			framesPath = p
		}
		if pairsPath == "" && strings.HasPrefix(p, "pairs/") {
			pairsPath = p
		}
	}

	t.Run("clean", func(t *testing.T) {
		r, err := Verify(ctx, base)
		if err != nil {
			t.Fatal(err)
		}
		if !r.OK() || len(r.Problems) != 0 {
			t.Fatalf("clean version has problems: %+v", r.Problems)
		}
		// Every model file, with its size, SHA-256 and footer rows computed here.
		var got []string
		var bytesTotal int64
		for _, f := range r.Files {
			got = append(got, f.Path)
			b, err := os.ReadFile(filepath.Join(dir, f.Path))
			if err != nil {
				t.Fatal(err)
			}
			sum := sha256.Sum256(b)
			if !f.OK || !f.Present || f.Bytes != int64(len(b)) || f.SHA256 != fmt.Sprintf("%x", sum) || f.Rows != model[f.Path].rows {
				t.Errorf("file %+v, want %d bytes, sha256 %x, %d rows", f, len(b), sum, model[f.Path].rows)
			}
			bytesTotal += int64(len(b))
		}
		if !slices.Equal(got, paths) {
			t.Errorf("files %q, want %q", got, paths)
		}
		if r.Bytes != bytesTotal || r.DigestComputed != base.Manifest.Digest {
			t.Errorf("bytes %d digest %s, want %d and %s", r.Bytes, r.DigestComputed, bytesTotal, base.Manifest.Digest)
		}
		var buf bytes.Buffer
		if err := r.WriteText(&buf); err != nil {
			t.Fatal(err)
		}
		if !strings.Contains(buf.String(), "OK: the version matches its manifest\n") {
			t.Errorf("text:\n%s", buf.String())
		}
	})

	// Each damage, and exactly the problems it must cause.
	cases := []struct {
		name   string
		damage func(t *testing.T, dir string)
		want   []string
	}{
		{"truncated file", func(t *testing.T, dir string) {
			p := filepath.Join(dir, pairsPath)
			b, _ := os.ReadFile(p)
			if err := os.WriteFile(p, b[:len(b)/2], 0o644); err != nil {
				t.Fatal(err)
			}
		}, []string{pairsPath + " bytes", pairsPath + " footer", pairsPath + " sha256"}},
		{"one changed byte", func(t *testing.T, dir string) {
			// Byte 4 follows the leading "PAR1" magic: it is in the first
			// page, not the footer, so the file still opens.
			p := filepath.Join(dir, framesPath)
			b, _ := os.ReadFile(p)
			b[4] ^= 0x01
			if err := os.WriteFile(p, b, 0o644); err != nil {
				t.Fatal(err)
			}
		}, []string{framesPath + " sha256"}},
		{"missing file", func(t *testing.T, dir string) {
			if err := os.Remove(filepath.Join(dir, framesPath)); err != nil {
				t.Fatal(err)
			}
		}, []string{framesPath + " missing"}},
		{"extra file", func(t *testing.T, dir string) {
			vfWriteTree(t, dir, map[string][]byte{"frames/split=train/part-00099.parquet": []byte("stray")})
		}, []string{"frames/split=train/part-00099.parquet extra"}},
		{"funnel count edited", func(t *testing.T, dir string) {
			vfEditManifest(t, dir, func(m map[string]any) {
				m["funnel"].(map[string]any)["lines"] = 31
			})
			// lines = frames + Σ dropped and lines = Σ sources lines both break.
		}, []string{"funnel conservation", "funnel conservation"}},
		{"file sha256 edited", func(t *testing.T, dir string) {
			vfEditManifest(t, dir, func(m map[string]any) {
				for _, f := range m["files"].([]any) {
					if f := f.(map[string]any); f["path"] == framesPath {
						f["sha256"] = strings.Repeat("0", 64)
					}
				}
			})
		}, []string{"digest digest", framesPath + " sha256"}},
		{"source kept edited", func(t *testing.T, dir string) {
			vfEditManifest(t, dir, func(m map[string]any) {
				m["sources"].([]any)[0].(map[string]any)["kept"] = 13 // 12 + 1
			})
		}, []string{"source a/u1.jsonl conservation"}},
		{"duplicate_of edited", func(t *testing.T, dir string) {
			vfEditManifest(t, dir, func(m map[string]any) {
				m["sources"].([]any)[2].(map[string]any)["duplicate_of"] = "d/u3.jsonl" // a later key, other content
			})
		}, []string{"source c/u2-copy.jsonl duplicate_of"}},
		{"sources out of order", func(t *testing.T, dir string) {
			vfEditManifest(t, dir, func(m map[string]any) {
				src := m["sources"].([]any)
				src[0], src[3] = src[3], src[0]
			})
			// d/u3.jsonl first: b/u2.jsonl then comes after a later key, and
			// a/u1.jsonl after c/u2-copy.jsonl; the digest sorts and stays.
		}, []string{"source a/u1.jsonl order", "source b/u2.jsonl order"}},
		{"pairs rows edited", func(t *testing.T, dir string) {
			vfEditManifest(t, dir, func(m map[string]any) {
				for _, f := range m["files"].([]any) {
					if f := f.(map[string]any); f["path"] == pairsPath {
						f["rows"] = model[pairsPath].rows + 1
					}
				}
			})
			// The footer disagrees, and pairs files no longer sum to funnel.pairs.
		}, []string{"files conservation", pairsPath + " rows"}},
		{"counts edited", func(t *testing.T, dir string) {
			vfEditManifest(t, dir, func(m map[string]any) {
				m["counts"].([]any)[0].(map[string]any)["episodes"] = 9
			})
		}, []string{"counts conservation"}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			d := vfCopy(t, dir)
			c.damage(t, d)
			r, err := Verify(ctx, vfOpen(t, d))
			if err != nil {
				t.Fatalf("Verify: %v", err)
			}
			if got := vfProblems(r); r.OK() || !slices.Equal(got, c.want) {
				t.Fatalf("problems %q, want %q\n%+v", got, c.want, r.Problems)
			}
			vfCheckFailedText(t, r, len(c.want))
		})
	}

	t.Run("funnel details", func(t *testing.T) {
		d := vfCopy(t, dir)
		vfEditManifest(t, d, func(m map[string]any) { m["funnel"].(map[string]any)["lines"] = 31 })
		r, err := Verify(ctx, vfOpen(t, d))
		if err != nil {
			t.Fatal(err)
		}
		var details []string
		for _, p := range r.Problems {
			details = append(details, p.Detail)
		}
		want := []string{"lines 31 ≠ frames 25 + Σ dropped 5 = 30", "lines 31 ≠ Σ sources lines 30"}
		if !slices.Equal(details, want) {
			t.Errorf("details %q, want %q", details, want)
		}
	})

	t.Run("missing file entry", func(t *testing.T) {
		d := vfCopy(t, dir)
		os.Remove(filepath.Join(d, pairsPath))
		r, err := Verify(ctx, vfOpen(t, d))
		if err != nil {
			t.Fatal(err)
		}
		for _, f := range r.Files {
			if f.Path == pairsPath && (f.Present || f.OK || f.Rows != -1 || f.SHA256 != "") {
				t.Errorf("missing file reported as %+v", f)
			}
		}
	})

	t.Run("quarantine folder", func(t *testing.T) {
		d := vfCopy(t, dir)
		vfWriteTree(t, d, map[string][]byte{"quarantine/a.jsonl": []byte("x\n")})
		r, err := Verify(ctx, vfOpen(t, d))
		if err != nil {
			t.Fatal(err)
		}
		if got := vfProblems(r); !slices.Equal(got, []string{"quarantine/a.jsonl extra"}) || r.Quarantine != nil {
			t.Errorf("unlisted quarantine: problems %q, quarantine %+v", got, r.Quarantine)
		}
		// A quarantine entry names one file; it does not excuse the
		// whole quarantine/ folder.
		vfEditManifest(t, d, func(m map[string]any) { m["quarantine"] = map[string]any{"lines": 1} })
		r, err = Verify(ctx, vfOpen(t, d))
		if err != nil {
			t.Fatal(err)
		}
		if got, want := vfProblems(r), []string{"quarantine layout", "quarantine quarantine_rows", "quarantine/a.jsonl extra"}; !slices.Equal(got, want) {
			t.Errorf("quarantine without a path: problems %q, want %q", got, want)
		}
	})
}

// vfBaseQuarantine runs the fleet with goals.future 1 and quarantine: true
// and returns the version and its local folder.
func vfBaseQuarantine(t *testing.T) (*pipeline.Version, string) {
	t.Helper()
	dir := t.TempDir()
	v := vfRunConfig(t, dir, vfFleet(), fmt.Sprintf(vfConfigYAML, 1)+"quarantine: true\n", "v1")
	return v, filepath.Join(dir, "out", "inspect-test", "v1")
}

// TestVerifyQuarantine checks the quarantine file like a shard: the
// manifest's digest does not cover it (SPEC §5), so only its own bytes,
// SHA-256 and footer say whether it is the file the run wrote.
func TestVerifyQuarantine(t *testing.T) {
	ctx := context.Background()
	base, dir := vfBaseQuarantine(t)
	q := pipeline.QuarantinePath
	if base.Manifest.Quarantine == nil || base.Manifest.Quarantine.Path != q {
		t.Fatalf("manifest quarantine %+v, want a file at %s", base.Manifest.Quarantine, q)
	}

	t.Run("clean", func(t *testing.T) {
		r, err := Verify(ctx, base)
		if err != nil {
			t.Fatal(err)
		}
		if !r.OK() {
			t.Fatalf("clean version with quarantine has problems %q", vfProblems(r))
		}
		b, err := os.ReadFile(filepath.Join(dir, q))
		if err != nil {
			t.Fatal(err)
		}
		// The fleet drops 5 lines, one per reason (see vfFleet); the
		// duplicate object's lines are not counted, so not quarantined.
		want := VerifyFile{Path: q, Present: true, Bytes: int64(len(b)), SHA256: fmt.Sprintf("%x", sha256.Sum256(b)), Rows: 5, OK: true}
		if r.Quarantine == nil || *r.Quarantine != want {
			t.Errorf("quarantine %+v, want %+v", r.Quarantine, want)
		}
		var shards int64
		for _, f := range r.Files {
			shards += f.Bytes
		}
		if r.Bytes != shards+int64(len(b)) {
			t.Errorf("bytes hashed %d, want shards %d + quarantine %d", r.Bytes, shards, len(b))
		}
		var buf bytes.Buffer
		if err := r.WriteText(&buf); err != nil {
			t.Fatal(err)
		}
		for _, line := range []string{
			fmt.Sprintf("quarantine %s: %s, 5 rows\n", q, shBytes(int64(len(b)))),
			"OK: the version matches its manifest\n",
		} {
			if !strings.Contains(buf.String(), line) {
				t.Errorf("text lacks %q:\n%s", line, buf.String())
			}
		}
	})

	edit := func(f func(q map[string]any)) func(t *testing.T, dir string) {
		return func(t *testing.T, dir string) {
			vfEditManifest(t, dir, func(m map[string]any) { f(m["quarantine"].(map[string]any)) })
		}
	}
	cases := []struct {
		name   string
		damage func(t *testing.T, dir string)
		want   []string
		detail string // of the first problem, when set
	}{
		{"four bytes overwritten", func(t *testing.T, dir string) {
			// Bytes 4–7 follow the leading "PAR1": the first page, not
			// the footer, so the file still opens with its 5 rows.
			p := filepath.Join(dir, q)
			b, _ := os.ReadFile(p)
			copy(b[4:8], []byte{0xde, 0xad, 0xbe, 0xef})
			if err := os.WriteFile(p, b, 0o644); err != nil {
				t.Fatal(err)
			}
		}, []string{q + " sha256"}, ""},
		{"truncated", func(t *testing.T, dir string) {
			p := filepath.Join(dir, q)
			b, _ := os.ReadFile(p)
			if err := os.WriteFile(p, b[:len(b)/2], 0o644); err != nil {
				t.Fatal(err)
			}
		}, []string{q + " bytes", q + " footer", q + " sha256"}, ""},
		{"missing", func(t *testing.T, dir string) {
			if err := os.Remove(filepath.Join(dir, q)); err != nil {
				t.Fatal(err)
			}
		}, []string{q + " missing"}, "the manifest's quarantine file, not in the folder"},
		{"extra file under quarantine/", func(t *testing.T, dir string) {
			vfWriteTree(t, dir, map[string][]byte{"quarantine/extra.bin": []byte("stray")})
		}, []string{"quarantine/extra.bin extra"}, "in the folder (5 bytes), not in the manifest"},
		// Also no longer one row per dropped line (5 in the funnel).
		{"rows edited", edit(func(q map[string]any) { q["rows"] = 6 }),
			[]string{q + " quarantine_rows", q + " rows"}, "footer says 5 rows, manifest 6"},
		{"sha256 edited", edit(func(q map[string]any) { q["sha256"] = strings.Repeat("0", 64) }),
			[]string{q + " sha256"}, ""},
		{"bytes edited", edit(func(q map[string]any) { q["bytes"] = 1 }),
			[]string{q + " bytes"}, ""},
		{"path edited", edit(func(q map[string]any) { q["path"] = "quarantine/part-00001.parquet" }),
			// Listed elsewhere: not the pipeline's path, not in the folder,
			// and the file that is there is no longer listed.
			[]string{q + " extra", "quarantine/part-00001.parquet layout", "quarantine/part-00001.parquet missing"}, ""},
		{"a shard in its place, manifest updated to match", func(t *testing.T, dir string) {
			// Bytes, SHA-256 and rows all agree: only the footer's table
			// says this is not a quarantine file.
			var shard string
			for _, f := range base.Manifest.Files {
				if f.Table == "frames" {
					shard = f.Path
					break
				}
			}
			b, err := os.ReadFile(filepath.Join(dir, shard))
			if err != nil {
				t.Fatal(err)
			}
			vfWriteTree(t, dir, map[string][]byte{q: b})
			edit(func(qm map[string]any) {
				for _, f := range base.Manifest.Files {
					if f.Path == shard {
						qm["rows"], qm["bytes"], qm["sha256"] = f.Rows, f.Bytes, f.SHA256
					}
				}
			})(t, dir)
		}, []string{q + " footer_metadata", q + " quarantine_rows"}, `footer table "frames", manifest "quarantine"`},
		{"quarantine removed from the manifest", func(t *testing.T, dir string) {
			vfEditManifest(t, dir, func(m map[string]any) { m["quarantine"] = nil })
		}, []string{q + " extra"}, ""},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			d := vfCopy(t, dir)
			c.damage(t, d)
			r, err := Verify(ctx, vfOpen(t, d))
			if err != nil {
				t.Fatalf("Verify: %v", err)
			}
			if got := vfProblems(r); r.OK() || !slices.Equal(got, c.want) {
				t.Fatalf("problems %q, want %q\n%+v", got, c.want, r.Problems)
			}
			if c.detail != "" && r.Problems[0].Detail != c.detail {
				t.Errorf("detail %q, want %q", r.Problems[0].Detail, c.detail)
			}
			vfCheckFailedText(t, r, len(c.want))
		})
	}

	t.Run("missing entry", func(t *testing.T) {
		d := vfCopy(t, dir)
		if err := os.Remove(filepath.Join(d, q)); err != nil {
			t.Fatal(err)
		}
		r, err := Verify(ctx, vfOpen(t, d))
		if err != nil {
			t.Fatal(err)
		}
		if want := (VerifyFile{Path: q, Rows: -1}); r.Quarantine == nil || *r.Quarantine != want {
			t.Errorf("missing quarantine reported as %+v, want %+v", r.Quarantine, want)
		}
		var buf bytes.Buffer
		if err := r.WriteText(&buf); err != nil {
			t.Fatal(err)
		}
		if line := "quarantine " + q + ": not found\n"; !strings.Contains(buf.String(), line) {
			t.Errorf("text lacks %q:\n%s", line, buf.String())
		}
	})
}

// vfCountingStore records the offsets of every Open.
type vfCountingStore struct {
	pipeline.Store
	offsets []int64
}

func (s *vfCountingStore) Open(ctx context.Context, key string, off int64) (io.ReadCloser, error) {
	s.offsets = append(s.offsets, off)
	return s.Store.Open(ctx, key, off)
}

// The footer reader reads at offsets through Store.Open, the way an S3
// object is read (a ranged GET from the offset), and ends at the size with
// io.EOF as io.ReaderAt requires (io package docs: "If n < len(p), ... err
// explains why"; at the end it is io.EOF).
func TestVerifyReaderAt(t *testing.T) {
	dir := t.TempDir()
	vfWriteTree(t, dir, map[string][]byte{"k": []byte("0123456789")})
	st := &vfCountingStore{Store: pipeline.NewLocalStore(dir)}
	r := &vfReaderAt{ctx: context.Background(), store: st, key: "k", size: 10}
	p := make([]byte, 4)
	if n, err := r.ReadAt(p, 3); n != 4 || err != nil || string(p) != "3456" {
		t.Errorf("ReadAt(4, 3) = %d %v %q, want 4 nil \"3456\"", n, err, p)
	}
	if n, err := r.ReadAt(p, 8); n != 2 || err != io.EOF || string(p[:2]) != "89" {
		t.Errorf("ReadAt(4, 8) = %d %v %q, want 2 EOF \"89\"", n, err, p[:n])
	}
	if n, err := r.ReadAt(p, 10); n != 0 || err != io.EOF {
		t.Errorf("ReadAt(4, 10) = %d %v, want 0 EOF", n, err)
	}
	if !slices.Equal(st.offsets, []int64{3, 8}) {
		t.Errorf("Open offsets %v, want [3 8]", st.offsets)
	}
	if r.err != nil {
		t.Errorf("no storage error expected, kept %v", r.err)
	}
	gone := &vfReaderAt{ctx: context.Background(), store: st, key: "gone", size: 10}
	if _, err := gone.ReadAt(p, 0); !errors.Is(err, pipeline.ErrNotFound) || !errors.Is(gone.err, pipeline.ErrNotFound) {
		t.Errorf("missing key: err %v kept %v, want ErrNotFound", err, gone.err)
	}
}

// config_sha256 recomputed from the manifest's config equals the one the
// pipeline wrote, and an edited config is caught.
func TestVerifyConfigSHA(t *testing.T) {
	base, dir := vfBase(t)
	got, err := vfConfigSHA(base.Manifest.Config)
	if err != nil || got != base.Manifest.ConfigSHA256 {
		t.Fatalf("recomputed %s (%v), manifest %s", got, err, base.Manifest.ConfigSHA256)
	}
	d := vfCopy(t, dir)
	vfEditManifest(t, d, func(m map[string]any) {
		m["config"].(map[string]any)["seed"] = 8
	})
	r, err := Verify(context.Background(), vfOpen(t, d))
	if err != nil {
		t.Fatal(err)
	}
	if got := vfProblems(r); !slices.Equal(got, []string{"config_sha256 config_sha256"}) {
		t.Errorf("problems %q, want the config_sha256 mismatch", got)
	}
	// Moving the storage does not change config_sha256 (SPEC §5).
	d2 := vfCopy(t, dir)
	vfEditManifest(t, d2, func(m map[string]any) {
		cfg := m["config"].(map[string]any)
		cfg["work"] = "s3://elsewhere/work/"
		cfg["source"].(map[string]any)["uri"] = "s3://elsewhere/logs/"
	})
	r, err = Verify(context.Background(), vfOpen(t, d2))
	if err != nil || !r.OK() {
		t.Errorf("moved storage: %v %q", err, vfProblems(r))
	}
}

func TestOpenVersionErrors(t *testing.T) {
	ctx := context.Background()
	empty := t.TempDir()
	if _, err := pipeline.OpenVersion(ctx, empty, pipeline.StorageConfig{}); !errors.Is(err, pipeline.ErrNotVersion) {
		t.Errorf("folder without manifest: %v, want ErrNotVersion", err)
	}
	future := t.TempDir()
	vfWriteTree(t, future, map[string][]byte{"manifest.json": []byte(`{"format": 99, "dataset": "x"}`)})
	_, err := pipeline.OpenVersion(ctx, future, pipeline.StorageConfig{})
	if err == nil || !strings.Contains(err.Error(), "format 99") {
		t.Errorf("format 99: %v, want an error naming format 99", err)
	}
}

// TestDiff compares a version with one made from a config with goals.future
// 2 and one more source object.
func TestDiff(t *testing.T) {
	dir := t.TempDir()
	a := vfRun(t, dir, vfFleet(), 1, "v1")
	b := vfRun(t, dir, vfExtra(), 2, "v2")
	r := Diff(a, b)

	wantConfig := []DiffConfig{{Key: "goals.future", Change: "changed", A: json.RawMessage("1"), B: json.RawMessage("2")}}
	if !vfEqualJSON(r.Config, wantConfig) {
		t.Errorf("config %+v, want %+v", r.Config, wantConfig)
	}
	wantSources := DiffSources{Added: []string{"e/u5.jsonl"}, Removed: []string{}, Changed: []DiffSHA256{}}
	if !vfEqualJSON(r.Sources, wantSources) {
		t.Errorf("sources %+v, want %+v", r.Sources, wantSources)
	}
	if len(r.Dropped) != 0 {
		t.Errorf("dropped %+v, want no change (the new object is clean)", r.Dropped)
	}

	// Per split: A has future 1 on the four episodes; B future 2 on them and
	// on u5's episode.
	type cell struct{ e, f, p int64 }
	sa, sb := map[string]cell{}, map[string]cell{}
	for _, e := range vfEpisodes() {
		for _, s := range []string{vfSplit(e.id), "total"} {
			sa[s] = cell{sa[s].e + 1, sa[s].f + e.steps, sa[s].p + vfPairs(e, 1)}
			sb[s] = cell{sb[s].e + 1, sb[s].f + e.steps, sb[s].p + vfPairs(e, 2)}
		}
	}
	for _, s := range []string{vfSplit(vfExtraEpisode.id), "total"} {
		e := vfExtraEpisode
		sb[s] = cell{sb[s].e + 1, sb[s].f + e.steps, sb[s].p + vfPairs(e, 2)}
	}
	var wantSplits []DiffSplit
	for _, s := range []string{"train", "val", "test", "total"} {
		x, y := sa[s], sb[s]
		if x != y {
			wantSplits = append(wantSplits, DiffSplit{Split: s,
				Episodes: DiffDelta{x.e, y.e, y.e - x.e}, Frames: DiffDelta{x.f, y.f, y.f - x.f}, Pairs: DiffDelta{x.p, y.p, y.p - x.p}})
		}
	}
	if !vfEqualJSON(r.Splits, wantSplits) {
		t.Errorf("splits\n got %+v\nwant %+v", r.Splits, wantSplits)
	}
	// Pairs total: A 2·(4+6+2+9) = 42; B 3·(4+6+2+9+3) = 72.
	if last := r.Splits[len(r.Splits)-1]; last.Split != "total" || last.Pairs != (DiffDelta{42, 72, 30}) {
		t.Errorf("total %+v, want pairs 42 → 72 (+30)", last)
	}

	// Files: every file of A is in B with other bytes, since each footer
	// carries config_sha256 (SPEC §4), which goals.future changes; B adds
	// the files of u5's (split, partition) if A had none there.
	fa, fb := vfFiles(vfEpisodes(), 1), vfFiles(append(vfEpisodes(), vfExtraEpisode), 2)
	var changed, added []string
	for _, p := range slices.Sorted(maps.Keys(fb)) {
		if _, ok := fa[p]; ok {
			changed = append(changed, p)
		} else {
			added = append(added, p)
		}
	}
	var gotChanged []string
	for _, c := range r.Files.Changed {
		gotChanged = append(gotChanged, c.Name)
	}
	if !slices.Equal(gotChanged, changed) || !slices.Equal(r.Files.Added, added) || len(r.Files.Removed) != 0 {
		t.Errorf("files changed %q added %q removed %q; want %q, %q, none", gotChanged, r.Files.Added, r.Files.Removed, changed, added)
	}
	if r.Empty() || r.SameDigest {
		t.Errorf("different versions reported empty (%v) or same digest (%v)", r.Empty(), r.SameDigest)
	}

	var buf bytes.Buffer
	if err := r.WriteText(&buf); err != nil {
		t.Fatal(err)
	}
	for _, line := range []string{
		"  key           change   a  b\n",
		"  goals.future  changed  1  2\n",
		"  added  e/u5.jsonl\n",
		"sources: 1 added, 0 removed, 0 changed\n",
	} {
		if !strings.Contains(buf.String(), line) {
			t.Errorf("text lacks %q:\n%s", line, buf.String())
		}
	}

	// The other way round, everything swaps.
	back := Diff(b, a)
	if !slices.Equal(back.Sources.Removed, []string{"e/u5.jsonl"}) || len(back.Sources.Added) != 0 ||
		!slices.Equal(back.Files.Removed, added) || back.Splits[len(back.Splits)-1].Pairs != (DiffDelta{72, 42, -30}) {
		t.Errorf("reverse diff %+v", back)
	}

	// A version against itself: nothing.
	same := Diff(a, a)
	empty := &DiffResult{A: same.A, B: same.A, SameDigest: true, Config: []DiffConfig{},
		Sources: DiffSources{Added: []string{}, Removed: []string{}, Changed: []DiffSHA256{}},
		Dropped: []DiffReason{}, Splits: []DiffSplit{},
		Files: DiffFiles{Added: []string{}, Removed: []string{}, Changed: []DiffSHA256{}}, Drift: []Drift{}, Moved: []DiffMove{}}
	if !same.Empty() || !vfEqualJSON(same, empty) {
		t.Errorf("self diff %+v, want empty", same)
	}
	buf.Reset()
	if err := same.WriteText(&buf); err != nil || !strings.Contains(buf.String(), "no differences (same digest)\n") {
		t.Errorf("self diff text (%v):\n%s", err, buf.String())
	}
}

// Diff on hand-made manifests: a source whose content changed, one
// removed, drop reasons (one this build does not know), a removed file.
func TestDiffHandMade(t *testing.T) {
	a := &pipeline.Manifest{Dataset: "d", Version: "a", Config: json.RawMessage(`{"seed":7}`), Digest: "da",
		Sources: []pipeline.Source{{Key: "k1", SHA256: "s1"}, {Key: "k2", SHA256: "s2"}, {Key: "k3", SHA256: "s3"}},
		Funnel:  pipeline.Funnel{Dropped: map[string]int64{"malformed": 2, "conflict": 1}},
		Counts:  []pipeline.Count{{Embodiment: "x", Split: "val", Episodes: 2, Frames: 20, Pairs: 40}},
		Files: []pipeline.File{{Path: "frames/split=val/part-00000.parquet", SHA256: "f1"},
			{Path: "pairs/split=val/part-00000.parquet", SHA256: "f2"}}}
	b := &pipeline.Manifest{Dataset: "d", Version: "b", Config: json.RawMessage(`{"seed":7}`), Digest: "db",
		Sources: []pipeline.Source{{Key: "k1", SHA256: "s1"}, {Key: "k3", SHA256: "s3x"}},
		Funnel:  pipeline.Funnel{Dropped: map[string]int64{"malformed": 2, "conflict": 0, "mystery": 4}},
		Counts: []pipeline.Count{{Embodiment: "x", Split: "val", Episodes: 2, Frames: 20, Pairs: 40},
			{Embodiment: "x", Split: "test", Episodes: 1, Frames: 5, Pairs: 8}},
		Files: []pipeline.File{{Path: "frames/split=val/part-00000.parquet", SHA256: "f1"}}}
	r := Diff(&pipeline.Version{URI: "a/", Manifest: a}, &pipeline.Version{URI: "b/", Manifest: b})
	want := &DiffResult{
		A:      DiffSide{Dataset: "d", Version: "a", URI: "a/", Digest: "da"},
		B:      DiffSide{Dataset: "d", Version: "b", URI: "b/", Digest: "db"},
		Config: []DiffConfig{},
		Sources: DiffSources{Added: []string{}, Removed: []string{"k2"},
			Changed: []DiffSHA256{{Name: "k3", A: "s3", B: "s3x"}}},
		Dropped: []DiffReason{{Reason: "conflict", A: 1, B: 0, Delta: -1}, {Reason: "mystery", A: 0, B: 4, Delta: 4}},
		Splits: []DiffSplit{
			{Split: "test", Episodes: DiffDelta{0, 1, 1}, Frames: DiffDelta{0, 5, 5}, Pairs: DiffDelta{0, 8, 8}},
			{Split: "total", Episodes: DiffDelta{2, 3, 1}, Frames: DiffDelta{20, 25, 5}, Pairs: DiffDelta{40, 48, 8}},
		},
		Files: DiffFiles{Added: []string{}, Removed: []string{"pairs/split=val/part-00000.parquet"}, Changed: []DiffSHA256{}},
		Drift: []Drift{}, Moved: []DiffMove{},
	}
	if !vfEqualJSON(r, want) {
		got, _ := json.Marshal(r)
		exp, _ := json.Marshal(want)
		t.Errorf("diff\n got %s\nwant %s", got, exp)
	}
}

// Config flattening: nested keys dotted, arrays compared whole, numbers by
// value (0.99 = 0.990, 1 = 1.0; an int64 seed keeps every digit), keys
// added and removed.
func TestDiffConfigFlatten(t *testing.T) {
	a := json.RawMessage(`{"goals":{"future":2,"gamma":0.99,"horizon":1},"source":{"include":["a","b"]},"seed":9007199254740993,"old":true,"e":{}}`)
	b := json.RawMessage(`{"goals":{"future":3,"gamma":0.990,"horizon":1.0},"source":{"include":["a"]},"seed":9007199254740992,"new":"x<y","e":{}}`)
	got := dfConfig(a, b)
	want := []DiffConfig{
		{Key: "goals.future", Change: "changed", A: json.RawMessage("2"), B: json.RawMessage("3")},
		{Key: "new", Change: "added", B: json.RawMessage(`"x<y"`)},
		{Key: "old", Change: "removed", A: json.RawMessage("true")},
		// 2^53+1 and 2^53 are one float64; as integers they differ.
		{Key: "seed", Change: "changed", A: json.RawMessage("9007199254740993"), B: json.RawMessage("9007199254740992")},
		{Key: "source.include", Change: "changed", A: json.RawMessage(`["a","b"]`), B: json.RawMessage(`["a"]`)},
	}
	if !vfEqualJSON(got, want) {
		t.Errorf("config diff\n got %+v\nwant %+v", got, want)
	}
}

// Verify over S3 (a real S3 server, see internal/s3test): the footer is read
// through ranged reads of the store, and a damaged object is reported as on
// a local folder.
func TestVerifyS3(t *testing.T) {
	const bucket = "hc-inspect"
	srv := s3test.Start(t, bucket)
	none := filepath.Join(t.TempDir(), "none")
	for k, val := range map[string]string{
		"AWS_ACCESS_KEY_ID": srv.AccessKey, "AWS_SECRET_ACCESS_KEY": srv.SecretKey, "AWS_REGION": srv.Region,
		"AWS_SESSION_TOKEN": "", "AWS_PROFILE": "", "AWS_ENDPOINT_URL": "", "AWS_ENDPOINT_URL_S3": "",
		"AWS_EC2_METADATA_DISABLED": "true", "AWS_CONFIG_FILE": none, "AWS_SHARED_CREDENTIALS_FILE": none,
	} {
		t.Setenv(k, val)
	}
	ctx := context.Background()
	c := srv.Client()
	put := func(key string, b []byte) {
		t.Helper()
		if _, err := c.PutObject(ctx, &s3.PutObjectInput{Bucket: aws.String(bucket), Key: aws.String(key), Body: bytes.NewReader(b)}); err != nil {
			t.Fatalf("put %s: %v", key, err)
		}
	}
	_, dir := vfBase(t)
	err := filepath.WalkDir(dir, func(p string, d os.DirEntry, err error) error {
		if err != nil || d.IsDir() {
			return err
		}
		rel, _ := filepath.Rel(dir, p)
		b, err := os.ReadFile(p)
		if err != nil {
			return err
		}
		put("ds/v1/"+filepath.ToSlash(rel), b)
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	storage := pipeline.StorageConfig{Endpoint: srv.Endpoint}
	v, err := pipeline.OpenVersion(ctx, "s3://"+bucket+"/ds/v1", storage)
	if err != nil {
		t.Fatal(err)
	}
	r, err := Verify(ctx, v)
	if err != nil {
		t.Fatal(err)
	}
	if !r.OK() || len(r.Files) != len(vfFiles(vfEpisodes(), 1)) {
		t.Fatalf("clean version on S3: %d files, problems %q", len(r.Files), vfProblems(r))
	}
	for _, f := range r.Files {
		if f.Rows != vfFiles(vfEpisodes(), 1)[f.Path].rows {
			t.Errorf("%s: %d rows on S3, want %d", f.Path, f.Rows, vfFiles(vfEpisodes(), 1)[f.Path].rows)
		}
	}

	// Ranged reads through the S3 store.
	put("ds/v1/probe", []byte("0123456789"))
	ra := &vfReaderAt{ctx: ctx, store: v.Store, key: "probe", size: 10}
	p := make([]byte, 4)
	if n, err := ra.ReadAt(p, 3); n != 4 || err != nil || string(p) != "3456" {
		t.Errorf("S3 ReadAt(4, 3) = %d %v %q", n, err, p)
	}
	if n, err := ra.ReadAt(p, 8); n != 2 || err != io.EOF || string(p[:2]) != "89" {
		t.Errorf("S3 ReadAt(4, 8) = %d %v %q", n, err, p[:n])
	}

	// A truncated object, and the probe is an extra one.
	var pairsPath string
	for _, f := range r.Files {
		if strings.HasPrefix(f.Path, "pairs/") {
			pairsPath = f.Path
			break
		}
	}
	b, err := os.ReadFile(filepath.Join(dir, pairsPath))
	if err != nil {
		t.Fatal(err)
	}
	put("ds/v1/"+pairsPath, b[:len(b)-100])
	r, err = Verify(ctx, v)
	if err != nil {
		t.Fatal(err)
	}
	want := []string{pairsPath + " bytes", pairsPath + " footer", pairsPath + " sha256", "probe extra"}
	if got := vfProblems(r); !slices.Equal(got, want) {
		t.Errorf("problems %q, want %q", got, want)
	}
}

// vfCheckFailedText checks verify's text for a failed version: the count of
// problems, and the subject of the first.
func vfCheckFailedText(t *testing.T, r *VerifyResult, problems int) {
	t.Helper()
	var buf bytes.Buffer
	if err := r.WriteText(&buf); err != nil {
		t.Fatal(err)
	}
	word := "problems"
	if problems == 1 {
		word = "problem"
	}
	if !strings.Contains(buf.String(), fmt.Sprintf("FAILED: %d %s\n", problems, word)) ||
		!strings.Contains(buf.String(), r.Problems[0].Subject) {
		t.Errorf("text:\n%s", buf.String())
	}
}
