package inspect

import (
	"cmp"
	"fmt"
	"math"
	"slices"

	"hindcast/pipeline"
)

// Drift is how one dimension of one embodiment's obs or act moved from a
// baseline version to another, from the manifests' stats (SPEC §5):
//
//	Shift    = (mean − base_mean) / base_std   (the mean shift in baseline std)
//	StdRatio = std / base_std
//
// A baseline std of 0 is a constant dimension: an unchanged mean is no
// drift (Shift 0), a changed mean is an infinite shift (+Inf or −Inf, its
// sign the mean's move), and StdRatio is 1 when std is 0 too, else +Inf.
// Neither is ever NaN.
type Drift struct {
	Embodiment string  `json:"embodiment"`
	Vector     string  `json:"vector"` // obs or act
	Dim        int     `json:"dim"`
	BaseMean   float64 `json:"base_mean"`
	BaseStd    float64 `json:"base_std"`
	Mean       float64 `json:"mean"`
	Std        float64 `json:"std"`
	Shift      float64 `json:"shift"`
	StdRatio   float64 `json:"std_ratio"`
}

// DriftOf computes one dimension's drift (see Drift).
func DriftOf(baseMean, baseStd, mean, std float64) (shift, ratio float64) {
	if baseStd == 0 {
		switch {
		case mean > baseMean:
			shift = math.Inf(1)
		case mean < baseMean:
			shift = math.Inf(-1)
		}
		ratio = 1
		if std != 0 {
			ratio = math.Inf(1)
		}
		return shift, ratio
	}
	return (mean - baseMean) / baseStd, std / baseStd
}

// Drifts compares the stats of two versions per embodiment, vector and
// dimension present in both, largest |shift| first (then the std ratio's
// distance from 1, then embodiment, vector and dimension, so the order is
// fixed).
func Drifts(base, cur map[string]pipeline.EmbodimentStats) []Drift {
	var out []Drift
	for emb, b := range base {
		c, ok := cur[emb]
		if !ok {
			continue
		}
		for _, v := range []struct {
			name string
			b, c pipeline.VectorStats
		}{{"obs", b.Obs, c.Obs}, {"act", b.Act, c.Act}} {
			if v.b.Count == 0 || v.c.Count == 0 {
				continue
			}
			n := min(len(v.b.Mean), len(v.c.Mean), len(v.b.Std), len(v.c.Std))
			for d := range n {
				s, r := DriftOf(v.b.Mean[d], v.b.Std[d], v.c.Mean[d], v.c.Std[d])
				out = append(out, Drift{emb, v.name, d, v.b.Mean[d], v.b.Std[d], v.c.Mean[d], v.c.Std[d], s, r})
			}
		}
	}
	slices.SortFunc(out, func(x, y Drift) int {
		if c := cmp.Compare(math.Abs(y.Shift), math.Abs(x.Shift)); c != 0 {
			return c
		}
		if c := cmp.Compare(ratioDistance(y.StdRatio), ratioDistance(x.StdRatio)); c != 0 {
			return c
		}
		return cmp.Or(cmp.Compare(x.Embodiment, y.Embodiment), cmp.Compare(x.Vector, y.Vector), cmp.Compare(x.Dim, y.Dim))
	})
	return out
}

// ratioDistance is how far a std ratio is from 1, on a log scale, so that a
// halving counts as much as a doubling.
func ratioDistance(r float64) float64 { return math.Abs(math.Log(r)) }

// MaxDrift is the drift gate's measure (pipeline.DriftFunc): the largest
// |shift| over every dimension, and where it is.
func MaxDrift(base, cur map[string]pipeline.EmbodimentStats) (float64, string) {
	ds := Drifts(base, cur)
	if len(ds) == 0 {
		return 0, "no dimension in common"
	}
	d := ds[0]
	return math.Abs(d.Shift), fmt.Sprintf("%s %s[%d]: mean %.6g → %.6g, std %.6g → %.6g", d.Embodiment, d.Vector, d.Dim, d.BaseMean, d.Mean, d.BaseStd, d.Std)
}
