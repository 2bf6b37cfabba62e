package inspect

import (
	"bytes"
	"strings"
	"testing"
)

// TestDiffCountsSplitsNotTheTotalRow: the "total" row of the splits table is
// not a split, so one differing split reads "1 split differs".
func TestDiffCountsSplitsNotTheTotalRow(t *testing.T) {
	r := &DiffResult{Splits: []DiffSplit{
		{Split: "train", Episodes: DiffDelta{A: 3, B: 4, Delta: 1}},
		{Split: "total", Episodes: DiffDelta{A: 3, B: 4, Delta: 1}},
	}}
	var b bytes.Buffer
	if err := r.WriteText(&b); err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(b.String(), "\nsplits: 1 split differs\n") {
		t.Errorf("diff text:\n%s\nwant \"splits: 1 split differs\"", b.String())
	}
}

// TestTraceSourceSingular: one line, one frame, one episode are said in
// the singular.
func TestTraceSourceSingular(t *testing.T) {
	r := &TraceResult{
		Kind:     TraceKindSource,
		Source:   &TraceSource{Key: "a.jsonl", URI: "file:///x/a.jsonl", Lines: 1, Kept: 1},
		Files:    []TraceFile{{Path: "frames/train/p0.parquet"}},
		Episodes: []TraceEpisode{{ID: "e1", Steps: []TraceStep{{Step: 0, Src: "a.jsonl", SrcLine: 1}}}},
	}
	var b bytes.Buffer
	if err := r.WriteText(&b); err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(b.String(), "\n  1 line, 1 frame kept in 1 episode\n") {
		t.Errorf("trace text:\n%s\nwant \"1 line, 1 frame kept in 1 episode\"", b.String())
	}
}

// TestRpSourceDepth: drops are grouped at the shallowest folder depth that
// separates the sources, not always the first segment.
func TestRpSourceDepth(t *testing.T) {
	for _, c := range []struct {
		keys []string
		want int
		one  string // the group of keys[0]
	}{
		{[]string{"2026/12/01/u1/a.jsonl", "2026/12/02/u2/b.jsonl", "2026/12/02/u3/c.jsonl"}, 3, "2026/12/01"},
		{[]string{"a/x.jsonl", "b/y.jsonl"}, 1, "a"},
		{[]string{"logs/x.jsonl", "logs/y.jsonl"}, 2, "logs/x.jsonl"},
		{[]string{"top.jsonl"}, 1, "top.jsonl"},
	} {
		d := rpSourceDepth(c.keys)
		if d != c.want || rpSourcePrefix(c.keys[0], d) != c.one {
			t.Errorf("%q: depth %d, group %q; want %d, %q", c.keys, d, rpSourcePrefix(c.keys[0], d), c.want, c.one)
		}
	}
}
