package main

import (
	"context"
	"fmt"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"testing"

	"github.com/parquet-go/parquet-go"

	"hindcast/pipeline"
	"hindcast/schemas"
	"hindcast/stages"
)

// TestQuarantineHoldsEveryDroppedLine runs a small fleet with one dropped
// line of several reasons and checks, row by row, that the quarantine file
// holds exactly those lines with their reason, object and line number, and
// the raw line where ingest had it.
func TestQuarantineHoldsEveryDroppedLine(t *testing.T) {
	dir := t.TempDir()
	logs := filepath.Join(dir, "logs")
	if err := os.MkdirAll(logs, 0o755); err != nil {
		t.Fatal(err)
	}
	good := func(unit string, t0, i int) string {
		return fmt.Sprintf(`{"unit":%q,"embodiment":"arm","t":%d,"obs":[%d,0]}`, unit, t0+i*100_000_000, i)
	}
	var a []string
	for i := range 12 {
		a = append(a, good("u1", 1_000_000_000, i))
	}
	a = append(a,
		`{"unit":"u1","embodiment":"arm","t":5,"obs":[1,2]`,             // line 13: malformed (unclosed)
		`{"unit":"u1","embodiment":"leg","t":2000000000,"obs":[1,2]}`,   // line 14: unknown_embodiment
		`{"unit":"u1","embodiment":"arm","t":2100000000,"obs":[1,2,3]}`, // line 15: dim_mismatch
		`{"unit":"u1","embodiment":"arm","t":1000000000,"obs":[9,9]}`,   // line 16: time_regress
	)
	// b re-uploads line 1 of a as its own line 1 (a duplicate frame), and
	// holds a 3-step episode (short_episode) after a gap.
	b := []string{good("u1", 1_000_000_000, 0)}
	for i := range 3 {
		b = append(b, good("u1", 9_000_000_000, i))
	}
	write := func(name string, lines []string) {
		if err := os.WriteFile(filepath.Join(logs, name), []byte(strings.Join(lines, "\n")+"\n"), 0o644); err != nil {
			t.Fatal(err)
		}
	}
	write("a.jsonl", a)
	write("b.jsonl", b)
	cfgText := `dataset: q
source: {uri: logs}
work: work
output: out
partitions: 2
quarantine: true
embodiments:
  arm: {obs: 2, goal_tolerance: 0.1}
episodes: {min_steps: 5}
`
	if err := os.WriteFile(filepath.Join(dir, "q.yaml"), []byte(cfgText), 0o644); err != nil {
		t.Fatal(err)
	}
	cfg, err := pipeline.LoadConfig(filepath.Join(dir, "q.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	m, err := pipeline.Execute(context.Background(), cfg, stages.All(), pipeline.Options{Version: "v1", Parallel: 2})
	if err != nil {
		t.Fatal(err)
	}
	if m.Quarantine == nil {
		t.Fatal("manifest has no quarantine file")
	}
	rows, err := parquet.ReadFile[schemas.QuarantineRow](filepath.Join(dir, "out", "q", "v1", m.Quarantine.Path))
	if err != nil {
		t.Fatal(err)
	}
	var got []string
	for _, r := range rows {
		raw := "-"
		if r.Line != nil {
			raw = string(r.Line)
		}
		got = append(got, fmt.Sprintf("%s:%d %s %s %s", r.Src, r.SrcLine, r.Stage, r.Reason, raw))
	}
	sort.Strings(got)
	want := []string{
		"a.jsonl:13 ingest malformed " + a[12],
		"a.jsonl:14 ingest unknown_embodiment " + a[13],
		"a.jsonl:15 ingest dim_mismatch " + a[14],
		"a.jsonl:16 ingest time_regress " + a[15],
		"b.jsonl:1 episodes duplicate -",
		"b.jsonl:2 episodes short_episode -",
		"b.jsonl:3 episodes short_episode -",
		"b.jsonl:4 episodes short_episode -",
	}
	sort.Strings(want)
	if strings.Join(got, "\n") != strings.Join(want, "\n") {
		t.Errorf("quarantine rows:\n%s\nwant:\n%s", strings.Join(got, "\n"), strings.Join(want, "\n"))
	}
	var dropped int64
	for _, n := range m.Funnel.Dropped {
		dropped += n
	}
	if m.Quarantine.Rows != dropped || dropped != int64(len(want)) {
		t.Errorf("quarantine rows %d, funnel dropped %d, want both %d", m.Quarantine.Rows, dropped, len(want))
	}
}
