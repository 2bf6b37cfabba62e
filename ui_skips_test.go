package main

import (
	"bytes"
	"strings"
	"testing"

	"hindcast/pipeline"
)

// TestSummaryCountsSkippedRecordings checks that the end-of-run summary
// says how many recordings were skipped whole and why (SPEC §7.1), in the
// order of pipeline.SkipReasons, and says nothing when none was.
func TestSummaryCountsSkippedRecordings(t *testing.T) {
	m := &pipeline.Manifest{Dataset: "d", Version: "v", Funnel: pipeline.Funnel{
		Lines: 10, Frames: 10, Dropped: map[string]int64{},
		SkippedObjects: map[string]int64{pipeline.SkipUnknownEmbodiment: 2, pipeline.SkipUnreadable: 1, pipeline.SkipNoUnit: 0},
	}}
	var b bytes.Buffer
	printSummary(&b, m, "file:///x/")
	if want := "skipped recordings: 3 (unreadable 1, unknown_embodiment 2)\n"; !strings.Contains(b.String(), want) {
		t.Errorf("summary lacks %q:\n%s", want, b.String())
	}
	m.Funnel.SkippedObjects = map[string]int64{}
	b.Reset()
	printSummary(&b, m, "file:///x/")
	if strings.Contains(b.String(), "skipped recordings") {
		t.Errorf("summary names skipped recordings when there are none:\n%s", b.String())
	}
}
