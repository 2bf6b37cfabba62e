package inspect

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/binary"
	"fmt"
	"math"
	"regexp"
	"slices"
	"strings"
	"testing"

	"hindcast/pipeline"
)

// TestDrifts: shift = (mean − base_mean) / base_std and ratio = std /
// base_std, worked by hand per dimension:
//
//	obs[0]: base 1 ± 2, now 2 ± 1 → shift (2−1)/2 = 0.5, ratio 1/2 = 0.5
//	obs[1]: base 5 ± 0, now 5 ± 0 → constant and unchanged: shift 0, ratio 1
//	obs[2]: base 2 ± 0, now 3 ± 1 → constant, moved up: shift +Inf, ratio +Inf
//	obs[3]: base 4 ± 0.5, now 1.5 ± 0.5 → shift (1.5−4)/0.5 = −5, ratio 1
//	act[0]: base 0 ± 4, now 2 ± 8 → shift 2/4 = 0.5, ratio 8/4 = 2
//
// Order: |shift| descending (obs[2], obs[3]), then |ln ratio| (act[0] and
// obs[0] tie at ln 2, broken by vector name: act first), then obs[1].
func TestDrifts(t *testing.T) {
	base := map[string]pipeline.EmbodimentStats{"arm": {
		Obs: pipeline.VectorStats{Count: 10, Mean: []float64{1, 5, 2, 4}, Std: []float64{2, 0, 0, 0.5}},
		Act: pipeline.VectorStats{Count: 10, Mean: []float64{0}, Std: []float64{4}},
	}}
	cur := map[string]pipeline.EmbodimentStats{"arm": {
		Obs: pipeline.VectorStats{Count: 12, Mean: []float64{2, 5, 3, 1.5}, Std: []float64{1, 0, 1, 0.5}},
		Act: pipeline.VectorStats{Count: 12, Mean: []float64{2}, Std: []float64{8}},
	}}
	want := []struct {
		vec          string
		dim          int
		shift, ratio float64
	}{
		{"obs", 2, math.Inf(1), math.Inf(1)},
		{"obs", 3, -5, 1},
		{"act", 0, 0.5, 2},
		{"obs", 0, 0.5, 0.5},
		{"obs", 1, 0, 1},
	}
	got := Drifts(base, cur)
	if len(got) != len(want) {
		t.Fatalf("%d drifts, want %d: %+v", len(got), len(want), got)
	}
	for i, w := range want {
		g := got[i]
		if g.Embodiment != "arm" || g.Vector != w.vec || g.Dim != w.dim || g.Shift != w.shift || g.StdRatio != w.ratio {
			t.Errorf("drift %d: %s[%d] shift %v ratio %v, want %s[%d] %v %v", i, g.Vector, g.Dim, g.Shift, g.StdRatio, w.vec, w.dim, w.shift, w.ratio)
		}
		if math.IsNaN(g.Shift) || math.IsNaN(g.StdRatio) {
			t.Errorf("drift %d is NaN", i)
		}
	}
	if v, where := MaxDrift(base, cur); !math.IsInf(v, 1) || where != "arm obs[2]: mean 2 → 3, std 0 → 1" {
		t.Errorf("max drift %v at %q", v, where)
	}
	// A constant dimension that moved down is −Inf.
	if s, r := DriftOf(2, 0, 1, 0); !math.IsInf(s, -1) || r != 1 {
		t.Errorf("moved down: %v %v", s, r)
	}
}

// TestDiffDriftNamesFiveStd: a dimension whose mean moved by 5 of the
// baseline's std is named first: obs[1] base 10 ± 2, now 20 ± 2 →
// (20 − 10) / 2 = +5; obs[0] unchanged is not listed.
func TestDiffDriftNamesFiveStd(t *testing.T) {
	stats := func(m1 float64) map[string]pipeline.EmbodimentStats {
		return map[string]pipeline.EmbodimentStats{"arm": {Obs: pipeline.VectorStats{Count: 4, Mean: []float64{0, m1}, Std: []float64{1, 2}}}}
	}
	a := &pipeline.Manifest{Dataset: "d", Version: "a", Stats: stats(10)}
	b := &pipeline.Manifest{Dataset: "d", Version: "b", Stats: stats(20)}
	r := Diff(&pipeline.Version{URI: "a/", Manifest: a}, &pipeline.Version{URI: "b/", Manifest: b})
	if len(r.Drift) != 1 || r.Drift[0].Dim != 1 || r.Drift[0].Vector != "obs" || r.Drift[0].Shift != 5 || r.Drift[0].StdRatio != 1 {
		t.Fatalf("drift %+v, want obs[1] +5", r.Drift)
	}
	var buf bytes.Buffer
	if err := r.WriteText(&buf); err != nil {
		t.Fatal(err)
	}
	if !regexp.MustCompile(`(?m)^drift: 1 dimension differs.*\n.*\n +arm +obs\[1\] +\+5 +1 +10 +20 +2 +2$`).MatchString(buf.String()) {
		t.Errorf("text:\n%s", buf.String())
	}
}

// TestDiffMoves: the same logs run with splits 1/2, 1/4, 1/4 and then 1/4,
// 1/4, 1/2: the episodes whose split changed, by SPEC §3.4 computed here
// (u < 1/4 is x < 2^62, u < 1/2 is x < 2^63).
func TestDiffMoves(t *testing.T) {
	ctx := context.Background()
	dir := t.TempDir()
	a := vfRun(t, dir, vfFleet(), 1, "a")
	cfgB := strings.Replace(fmt.Sprintf(vfConfigYAML, 1), "splits: {train: 0.5, val: 0.25, test: 0.25}", "splits: {train: 0.25, val: 0.25, test: 0.5}", 1)
	b := vfRunConfig(t, dir, vfFleet(), cfgB, "b")
	splitB := func(id string) string {
		h := sha256.Sum256([]byte(id))
		x := binary.BigEndian.Uint64(h[:8])
		switch {
		case x < 1<<62:
			return "train"
		case x < 1<<63:
			return "val"
		}
		return "test"
	}
	want := []DiffMove{}
	for _, e := range vfEpisodes() { // sorted by id
		if vfSplit(e.id) != splitB(e.id) {
			want = append(want, DiffMove{e.id, vfSplit(e.id), splitB(e.id)})
		}
	}
	if len(want) == 0 {
		t.Fatal("fixture: no episode changes split")
	}
	r := Diff(a, b)
	if err := DiffMoves(ctx, r, a, b); err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(r.Moved, want) {
		t.Errorf("moved %+v, want %+v", r.Moved, want)
	}
	var buf bytes.Buffer
	if err := r.WriteText(&buf); err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(buf.String(), fmt.Sprintf("episodes that changed split: %d\n", len(want))) {
		t.Errorf("text:\n%s", buf.String())
	}
}
