package stages

import (
	"context"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/parquet-go/parquet-go"

	"hindcast/pipeline"
)

// TestPackCutsRowGroupsByImageBytes: a frames row group is buffered in
// memory until written, so pack also cuts it, at an episode's end, once it
// holds GroupImageBytes of camera frames. Ten episodes of five frames, each
// frame one ok.png: with the cut at three episodes' bytes, the row groups
// hold 15, 15, 15 and 5 rows (row_group_rows is far above); without camera
// bytes to count (the pairs shard), one row group.
func TestPackCutsRowGroupsByImageBytes(t *testing.T) {
	png := ingestFixture(t, "frames/ok.png")
	const episodes, steps = 10, 5
	var lines []string
	for e := range episodes {
		for s := range steps {
			t0 := int64(1_000_000_000 + e*100_000_000_000) // 100 s apart: over max_gap
			lines = append(lines, fmt.Sprintf(`{"unit":"c1","embodiment":"cam","t":%d,"obs":[%d,0],"img":{"front":"frames/ok.png"}}`, t0+int64(s)*1_000_000, s))
		}
	}
	files := map[string][]byte{"a.jsonl": jsonLines(lines...), "frames/ok.png": png}
	cfgYAML := `
dataset: pack-groups
partitions: 1
embodiments:
  cam: {obs: 2, cameras: [front], goal_tolerance: 0.1}
episodes: {max_gap: 1s, min_steps: 2, max_steps: 100}
goals: {future: 1, geometric: 0, final: 0, negative: 0}
splits: {train: 1}
parquet: {row_group_rows: 65536}
`
	dir := t.TempDir()
	writeTree(t, filepath.Join(dir, "src"), files)
	cfgPath := filepath.Join(dir, "hindcast.yaml")
	if err := os.WriteFile(cfgPath, withLocations(t, cfgYAML, "src", "work", "out"), 0o644); err != nil {
		t.Fatal(err)
	}
	cfg, err := pipeline.LoadConfig(cfgPath)
	if err != nil {
		t.Fatal(err)
	}
	st := []pipeline.Stage{Ingest{}, Episodes{}, Goals{}, &Pack{GroupImageBytes: int64(3 * steps * len(png))}}
	m, err := pipeline.Execute(context.Background(), cfg, st, pipeline.Options{Version: "v1", Parallel: 2})
	if err != nil {
		t.Fatal(err)
	}
	if m.Funnel.Episodes != episodes || m.Funnel.Frames != episodes*steps {
		t.Fatalf("funnel %+v, want %d episodes of %d frames", m.Funnel, episodes, steps)
	}
	groups := func(table string) string {
		return rowGroupSizes(t, filepath.Join(dir, "out", "pack-groups", "v1", table, "split=train", "part-00000.parquet"))
	}
	if got := groups("frames"); got != "15 15 15 5" {
		t.Errorf("frames row groups of %s rows, want 15 15 15 5", got)
	}
	// Pairs carry no camera frames: one row group of 10 × 4 rows.
	if got := groups("pairs"); got != "40" {
		t.Errorf("pairs row groups of %s rows, want 40", got)
	}
}

// TestPackBoundsRowGroupsPerShard: a Parquet file holds at most 32,767 row
// groups (a 16-bit ordinal in the format's footer; from memory), so pack
// raises a shard's rows per group above parquet.row_group_rows when that
// would make more than MaxRowGroups groups (packMaxRowGroups in a run).
// With row_group_rows 1 and the bound at 10: 4 episodes of 12 frames (48
// frames, 44 future pairs) give groups of ceil(48/10) = 5 frames and
// ceil(44/10) = 5 pairs, so 10 and 9 groups.
func TestPackBoundsRowGroupsPerShard(t *testing.T) {
	const episodes, steps = 4, 12
	var lines []string
	for e := range episodes {
		for s := range steps {
			t0 := int64(1_000_000_000 + e*100_000_000_000) // 100 s apart: over max_gap
			lines = append(lines, fmt.Sprintf(`{"unit":"c1","embodiment":"arm","t":%d,"obs":[%d,0]}`, t0+int64(s)*1_000_000, s))
		}
	}
	cfgYAML := `
dataset: pack-bound
partitions: 1
embodiments:
  arm: {obs: 2, goal_tolerance: 0.1}
episodes: {max_gap: 1s, min_steps: 2, max_steps: 100}
goals: {future: 1, geometric: 0, final: 0, negative: 0}
splits: {train: 1}
parquet: {row_group_rows: 1}
`
	dir := t.TempDir()
	writeTree(t, filepath.Join(dir, "src"), map[string][]byte{"a.jsonl": jsonLines(lines...)})
	cfgPath := filepath.Join(dir, "hindcast.yaml")
	if err := os.WriteFile(cfgPath, withLocations(t, cfgYAML, "src", "work", "out"), 0o644); err != nil {
		t.Fatal(err)
	}
	cfg, err := pipeline.LoadConfig(cfgPath)
	if err != nil {
		t.Fatal(err)
	}
	st := []pipeline.Stage{Ingest{}, Episodes{}, Goals{}, &Pack{MaxRowGroups: 10}}
	m, err := pipeline.Execute(context.Background(), cfg, st, pipeline.Options{Version: "v1", Parallel: 2})
	if err != nil {
		t.Fatal(err)
	}
	if m.Funnel.Frames != episodes*steps || m.Funnel.Pairs != episodes*(steps-1) {
		t.Fatalf("funnel %+v, want %d frames, %d pairs", m.Funnel, episodes*steps, episodes*(steps-1))
	}
	for table, want := range map[string]string{"frames": "5 5 5 5 5 5 5 5 5 3", "pairs": "5 5 5 5 5 5 5 5 4"} {
		p := filepath.Join(dir, "out", "pack-bound", "v1", table, "split=train", "part-00000.parquet")
		if got := rowGroupSizes(t, p); got != want {
			t.Errorf("%s row groups of %s rows, want %s", table, got, want)
		}
	}
	// The run's bound leaves room below the format's limit.
	if packMaxRowGroups >= 32767 {
		t.Errorf("packMaxRowGroups %d, want below 32,767", packMaxRowGroups)
	}
	if got := groupRows(65536, 2_000_000_000, packMaxRowGroups); got != 66667 {
		t.Errorf("groupRows(65536, 2e9) = %d, want ceil(2e9/30000) = 66667", got)
	}
	if got := groupRows(65536, 1_000_000, packMaxRowGroups); got != 65536 {
		t.Errorf("groupRows(65536, 1e6) = %d, want 65536 (as configured)", got)
	}
}

// rowGroupSizes lists the rows of each row group of the Parquet file at p.
func rowGroupSizes(t *testing.T, p string) string {
	t.Helper()
	f, err := os.Open(p)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	info, err := f.Stat()
	if err != nil {
		t.Fatal(err)
	}
	pf, err := parquet.OpenFile(f, info.Size())
	if err != nil {
		t.Fatal(err)
	}
	var rows []string
	for _, g := range pf.RowGroups() {
		rows = append(rows, fmt.Sprint(g.NumRows()))
	}
	return strings.Join(rows, " ")
}
