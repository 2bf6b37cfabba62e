package pipeline

import (
	"slices"
	"testing"
)

// subsequence reports whether want appears in list in order.
func subsequence(list, want []string) bool {
	i := 0
	for _, x := range list {
		if i < len(want) && x == want[i] {
			i++
		}
	}
	return i == len(want)
}

// TestReasonDefsFollowSPEC holds the one list of reasons to SPEC's tables:
// every reason once; §3.1's and §7.4's orders kept; a reason marked for
// lines exactly when §3.1 or §3.2 names it, for ticks exactly when §7.4 or
// §3.2 does; and the skip reasons in §7.1's order.
func TestReasonDefsFollowSPEC(t *testing.T) {
	// The reason tables of SPEC, copied from its text: §3.1 (a line's
	// checks, in order), §7.4 (a tick's checks, in order), §3.2 (the
	// episode stage's drops) and §7.1 (skips, in the order they apply).
	spec31 := []string{"oversize", "truncated", "malformed", "unknown_embodiment", "dim_mismatch", "non_finite",
		"out_of_range", "image_missing", "image_corrupt", "time_regress"}
	spec74 := []string{"stale", "malformed", "dim_mismatch", "non_finite", "out_of_range", "image_corrupt"}
	spec32 := []string{"duplicate", "conflict", "short_episode"}
	spec71 := []string{"unreadable", "no_unit", "unknown_embodiment"}
	names := Reasons()
	if c := slices.Compact(slices.Sorted(slices.Values(names))); len(c) != len(names) {
		t.Errorf("a reason is listed twice: %v", names)
	}
	for _, c := range []struct {
		table string
		want  []string
	}{{"§3.1", spec31}, {"§7.4", spec74}, {"§3.2", spec32}} {
		if !subsequence(names, c.want) {
			t.Errorf("Reasons() %v does not keep SPEC %s's order %v", names, c.table, c.want)
		}
	}
	lines := slices.Concat(spec31, spec32)
	ticks := slices.Concat(spec74, spec32)
	for _, d := range ReasonDefs() {
		if d.Lines != slices.Contains(lines, d.Name) {
			t.Errorf("%s: Lines %v, SPEC §3.1/§3.2 says %v", d.Name, d.Lines, !d.Lines)
		}
		if d.Ticks != slices.Contains(ticks, d.Name) {
			t.Errorf("%s: Ticks %v, SPEC §7.4/§3.2 says %v", d.Name, d.Ticks, !d.Ticks)
		}
		if want := map[bool]string{true: StageEpisodes, false: StageIngest}[slices.Contains(spec32, d.Name)]; d.Stage != want {
			t.Errorf("%s: stage %s, want %s", d.Name, d.Stage, want)
		}
	}
	if n := len(slices.Compact(slices.Sorted(slices.Values(slices.Concat(lines, ticks))))); n != len(names) {
		t.Errorf("SPEC names %d reasons, the list has %d", n, len(names))
	}
	if !slices.Equal(SkipReasons(), spec71) {
		t.Errorf("SkipReasons() %v, want SPEC §7.1's %v", SkipReasons(), spec71)
	}
}
