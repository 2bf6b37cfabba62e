package inspect

import (
	"math"
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
