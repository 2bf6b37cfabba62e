package inspect

import (
	"bytes"
	"fmt"
	"maps"
	"slices"
	"strings"
	"testing"

	"hindcast/pipeline"
)

// rcManifest is a hand-made manifest of a mixed version (SPEC §7.6): a JSON
// Lines log, two read recordings (one incomplete), a duplicate recording
// and two skipped ones.
func rcManifest() *pipeline.Manifest {
	dup := "r/a.mcap"
	return &pipeline.Manifest{
		Dataset: "mixed", Version: "m1",
		Sources: []pipeline.Source{
			{Key: "l/u1.jsonl", Lines: 10, Kept: 9, Dropped: map[string]int64{"malformed": 1}},
			{Key: "r/a.mcap", Lines: 20, Kept: 14, Dropped: map[string]int64{"stale": 5, "short_episode": 1},
				Recording: &pipeline.RecordingSummary{Unit: "u1", Embodiment: "arm", Ticks: 20,
					Messages: map[string]int64{"/joints": 200}, Undecodable: map[string]int64{"/cmd": 2},
					StaleBy: map[string]int64{"/joints": 3, "/cmd": 2}}},
			{Key: "r/b.mcap", Lines: 4, Kept: 3, Incomplete: true, Dropped: map[string]int64{"stale": 1},
				Recording: &pipeline.RecordingSummary{Unit: "u2", Embodiment: "arm", Ticks: 4,
					Messages: map[string]int64{"/joints": 40}, Undecodable: map[string]int64{},
					StaleBy: map[string]int64{"/joints": 1}}},
			{Key: "r/c.mcap", DuplicateOf: &dup, Dropped: map[string]int64{}},
			{Key: "r/d.mcap", Skipped: pipeline.SkipNoUnit, Dropped: map[string]int64{}},
			{Key: "r/e.mcap", Skipped: pipeline.SkipUnreadable, Dropped: map[string]int64{}},
		},
		Funnel: pipeline.Funnel{Objects: 6, DuplicateObjects: 1, Lines: 34, Frames: 26,
			Dropped:        map[string]int64{"malformed": 1, "stale": 6, "short_episode": 1},
			SkippedObjects: map[string]int64{"unreadable": 1, "no_unit": 1, "unknown_embodiment": 0}},
	}
}

func TestShowRecordings(t *testing.T) {
	r := Show(&pipeline.Version{Manifest: rcManifest()})
	got := r.Recordings
	if got == nil {
		t.Fatalf("no recordings section")
	}
	if got.Read != 2 || got.Ticks != 24 || got.Kept != 17 {
		t.Errorf("read %d ticks %d kept %d, want 2, 24, 17", got.Read, got.Ticks, got.Kept)
	}
	if want := map[string]int64{"unreadable": 1, "no_unit": 1, "unknown_embodiment": 0}; !maps.Equal(got.Skipped, want) {
		t.Errorf("skipped %v, want %v", got.Skipped, want)
	}
	if want := map[string]int64{"/joints": 4, "/cmd": 2}; !maps.Equal(got.StaleBy, want) {
		t.Errorf("stale_by %v, want %v", got.StaleBy, want)
	}
	if want := map[string]int64{"/cmd": 2}; !maps.Equal(got.Undecodable, want) {
		t.Errorf("undecodable %v, want %v", got.Undecodable, want)
	}
	var keys []string
	for _, x := range got.Recordings {
		keys = append(keys, x.Key+":"+x.Skipped)
	}
	// The duplicate has no entry (SPEC §7.6), the JSON Lines log is not a
	// recording.
	if want := []string{"r/a.mcap:", "r/b.mcap:", "r/d.mcap:no_unit", "r/e.mcap:unreadable"}; !slices.Equal(keys, want) {
		t.Errorf("recordings %q, want %q", keys, want)
	}
	var b bytes.Buffer
	if err := r.WriteText(&b); err != nil {
		t.Fatal(err)
	}
	for _, want := range []string{
		"recordings 2 read, 24 ticks, 17 kept; skipped: 1 unreadable, 1 no_unit",
		"stale 5, short_episode 1",
		"r/b.mcap (incomplete)",
		"skipped: no_unit",
	} {
		if !strings.Contains(b.String(), want) {
			t.Errorf("show text lacks %q:\n%s", want, b.String())
		}
	}
	// A version without recordings has no section.
	if Show(&pipeline.Version{Manifest: &pipeline.Manifest{}}).Recordings != nil {
		t.Errorf("a version without recordings has a recordings section")
	}
}

func TestVerifyRecordings(t *testing.T) {
	if ps := rcProblems(rcManifest()); len(ps) != 0 {
		t.Fatalf("the hand-made manifest has problems: %v", ps)
	}
	cases := []struct {
		name string
		edit func(m *pipeline.Manifest)
		want string
	}{
		{"ticks other than lines", func(m *pipeline.Manifest) { m.Sources[1].Recording.Ticks = 19 }, "ticks 19 ≠ lines 20"},
		{"stale_by not the stale drops", func(m *pipeline.Manifest) { m.Sources[1].Recording.StaleBy["/cmd"] = 1 }, "Σ stale_by 4 ≠ dropped stale 5"},
		{"skipped with lines", func(m *pipeline.Manifest) { m.Sources[4].Lines = 1 }, "skipped as no_unit but has 1 lines"},
		{"recording and skipped", func(m *pipeline.Manifest) { m.Sources[2].Skipped = pipeline.SkipNoUnit }, "has both a recording entry and skipped"},
		{"duplicate with a recording", func(m *pipeline.Manifest) {
			m.Sources[3].Recording = &pipeline.RecordingSummary{}
		}, "a duplicate object has a recording entry"},
		{"skipped_objects off", func(m *pipeline.Manifest) { m.Funnel.SkippedObjects["no_unit"] = 2 }, "skipped_objects no_unit 2 ≠ 1"},
		{"skipped_objects without a source", func(m *pipeline.Manifest) { m.Funnel.SkippedObjects["unknown_embodiment"] = 1 }, "skipped_objects unknown_embodiment 1, no source"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			m := rcManifest()
			c.edit(m)
			ps := rcProblems(m)
			found := false
			for _, p := range ps {
				found = found || strings.Contains(p, c.want)
			}
			if !found {
				t.Errorf("problems %q lack %q", ps, c.want)
			}
		})
	}
}

func rcProblems(m *pipeline.Manifest) []string {
	var out []string
	vfRecordings(m, func(subject, check, format string, a ...any) {
		out = append(out, subject+": "+fmt.Sprintf(format, a...))
	})
	return out
}

func TestDiffSkippedRecordings(t *testing.T) {
	a, b := rcManifest(), rcManifest()
	b.Funnel.SkippedObjects["no_unit"] = 3
	r := Diff(&pipeline.Version{Manifest: a}, &pipeline.Version{Manifest: b})
	if want := []DiffReason{{Reason: "no_unit", A: 1, B: 3, Delta: 2}}; !slices.Equal(r.Skipped, want) {
		t.Errorf("skipped %+v, want %+v", r.Skipped, want)
	}
	if r.Empty() {
		t.Errorf("a diff of skips is empty")
	}
	if r := Diff(&pipeline.Version{Manifest: a}, &pipeline.Version{Manifest: rcManifest()}); len(r.Skipped) != 0 {
		t.Errorf("equal versions differ in skips: %+v", r.Skipped)
	}
}

func TestReportRecordingRows(t *testing.T) {
	rows, stale := rpRecordings(rcManifest())
	want := [][6]string{
		{"r/a.mcap", "u1", "arm", rpInt(20), rpInt(14), "stale 5, short_episode 1"},
		{"r/b.mcap (incomplete)", "u2", "arm", rpInt(4), rpInt(3), "stale 1"},
		{"r/d.mcap", "", "", "", "", "skipped: no_unit"},
		{"r/e.mcap", "", "", "", "", "skipped: unreadable"},
	}
	if !slices.Equal(rows, want) {
		t.Errorf("rows\n%q\nwant\n%q", rows, want)
	}
	if wantStale := []rpKV{{"/cmd", rpInt(2)}, {"/joints", rpInt(4)}}; !slices.Equal(stale, wantStale) {
		t.Errorf("stale %q, want %q", stale, wantStale)
	}
	if c := rpReasonColor(pipeline.Stale); c == rpReasonColor("not a reason") {
		t.Errorf("stale has the colour of unknown reasons")
	}
}

// TestReasonColorsCoverTheList checks that every reason of the one list
// has a colour of its own in the report.
func TestReasonColorsCoverTheList(t *testing.T) {
	seen := map[string]string{}
	for _, r := range pipeline.Reasons() {
		c := rpReasonColor(r)
		if c == rpReasonColor("not a reason") {
			t.Errorf("%s has the colour of unknown reasons", r)
		}
		if o, ok := seen[c]; ok {
			t.Errorf("%s and %s share the colour %s", r, o, c)
		}
		seen[c] = r
	}
}

func TestTraceTextSaysTicks(t *testing.T) {
	m := rcManifest()
	res := &TraceResult{Kind: TraceKindEpisode, Query: TraceQuery{Episode: "u1-1"},
		Episodes: []TraceEpisode{{ID: "u1-1", Unit: "u1", Steps: []TraceStep{
			{Step: 0, Src: "r/a.mcap", SrcLine: 1}, {Step: 1, Src: "r/a.mcap", SrcLine: 2},
			{Step: 2, Src: "l/u1.jsonl", SrcLine: 7}}}}}
	res.TickSources = trTickSources(m, res)
	if want := []string{"r/a.mcap"}; !slices.Equal(res.TickSources, want) {
		t.Fatalf("tick sources %q, want %q", res.TickSources, want)
	}
	var b bytes.Buffer
	if err := res.WriteText(&b); err != nil {
		t.Fatal(err)
	}
	for _, want := range []string{"steps 0-1: r/a.mcap ticks 1-2", "step 2: l/u1.jsonl line 7"} {
		if !strings.Contains(b.String(), want) {
			t.Errorf("trace text lacks %q:\n%s", want, b.String())
		}
	}
}
