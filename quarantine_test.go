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
	m := quarantineRun(t, dir, cfgText)
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

// TestQuarantineRowGroupsAreBounded: the quarantine writer buffers a row
// group in memory, so row groups are cut at 65,536 rows and at about 32 MiB
// of line text. 70,000 short malformed lines make row groups of 65,536 and
// 4,464 rows; 1,100 malformed lines of 60,000 bytes (66 MB) make row groups
// of at most 32 MiB of text each (and one line more).
func TestQuarantineRowGroupsAreBounded(t *testing.T) {
	for _, c := range []struct {
		name  string
		lines int
		size  int
	}{{"short", 70000, 40}, {"long", 1100, 60000}} {
		t.Run(c.name, func(t *testing.T) {
			dir := t.TempDir()
			logs := filepath.Join(dir, "logs")
			if err := os.MkdirAll(logs, 0o755); err != nil {
				t.Fatal(err)
			}
			var b strings.Builder
			b.WriteString(`{"unit":"u1","embodiment":"arm","t":1,"obs":[0,0]}` + "\n")
			b.WriteString(`{"unit":"u1","embodiment":"arm","t":2,"obs":[0,0]}` + "\n")
			for range c.lines {
				b.WriteString("{" + strings.Repeat("x", c.size-1) + "\n") // malformed
			}
			if err := os.WriteFile(filepath.Join(logs, "a.jsonl"), []byte(b.String()), 0o644); err != nil {
				t.Fatal(err)
			}
			cfgText := `dataset: q
source: {uri: logs, max_line_bytes: 100000}
work: work
output: out
quarantine: true
embodiments:
  arm: {obs: 2, goal_tolerance: 0.1}
episodes: {min_steps: 2}
`
			m := quarantineRun(t, dir, cfgText)
			if m.Quarantine == nil || m.Quarantine.Rows != int64(c.lines) {
				t.Fatalf("quarantine %+v, want %d rows", m.Quarantine, c.lines)
			}
			f, err := os.Open(filepath.Join(dir, "out", "q", "v1", m.Quarantine.Path))
			if err != nil {
				t.Fatal(err)
			}
			defer f.Close()
			st, _ := f.Stat()
			pf, err := parquet.OpenFile(f, st.Size())
			if err != nil {
				t.Fatal(err)
			}
			var sizes []int64
			for _, g := range pf.RowGroups() {
				sizes = append(sizes, g.NumRows())
			}
			if c.name == "short" {
				if fmt.Sprint(sizes) != "[65536 4464]" {
					t.Errorf("row groups of %v rows, want [65536 4464]", sizes)
				}
				return
			}
			// Each row of the long case carries 60,000 bytes of text: at
			// most 32 MiB / 60,000 rounded up, 560, rows per group.
			if len(sizes) < 2 {
				t.Errorf("row groups of %v rows: 66 MB of text in one", sizes)
			}
			for _, n := range sizes {
				if n > 560 {
					t.Errorf("row groups of %v rows: one holds over 32 MiB of text", sizes)
				}
			}
		})
	}
}

// quarantineRun writes the config to dir/q.yaml and runs the whole pipeline
// on it as version v1.
func quarantineRun(t *testing.T, dir, cfgText string) *pipeline.Manifest {
	t.Helper()
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
	return m
}
