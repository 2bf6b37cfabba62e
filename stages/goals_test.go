package stages

import (
	"context"
	"crypto/sha256"
	"encoding/binary"
	"fmt"
	"math"
	"math/big"
	"math/rand/v2"
	"os"
	"path/filepath"
	"reflect"
	"slices"
	"sort"
	"strings"
	"testing"

	"github.com/parquet-go/parquet-go"

	"hindcast/pipeline"
	"hindcast/schemas"
)

// The tests of SPEC §3.3 (goals). Three levels: the drawing functions
// (UniformOffset, GeometricOffset, L2, EpisodeRNG) against their laws;
// relabel on one episode's hand-made goal-dim projections; and the goals
// stage (Goals.Do) on a partition written by the test, which is where the
// negatives and the goal_dims projection live. One pipeline-level test runs
// every stage on a small fleet and checks the pairs table.

// goalsRamp is a T-step projection where every step has a different goal
// vector, so a goal vector tells which step it came from.
func goalsRamp(T int) [][]float64 {
	p := make([][]float64, T)
	for i := range p {
		p[i] = []float64{float64(i), float64(1000 + i)}
	}
	return p
}

// goalsCollect runs relabel on one episode alone (no negatives) and returns
// deep copies of its goals in emission order.
func goalsCollect(t *testing.T, cfg *pipeline.Config, emb *pipeline.Embodiment, id string, proj [][]float64) []schemas.Goal {
	t.Helper()
	all := []pipeline.EpisodeInfo{{ID: id, Unit: "u", Embodiment: "arm", Steps: len(proj)}}
	var out []schemas.Goal
	n, err := relabel(cfg, emb, id, 0, all, proj, nil, func(g *schemas.Goal) error {
		c := *g
		c.Goal = slices.Clone(g.Goal)
		out = append(out, c)
		return nil
	})
	if err != nil {
		t.Fatalf("relabel %s: %v", id, err)
	}
	if n != int64(len(out)) {
		t.Fatalf("relabel %s returned %d, emitted %d goals", id, n, len(out))
	}
	return out
}

// goalsPerStepPattern is the strategy sequence one step must get, in the
// pairs table's order: strategy (future, geometric, final, negative), then
// draw (SPEC §3.3, §4).
func goalsPerStepPattern(g pipeline.GoalConfig, negatives bool) []schemas.Strategy {
	var p []schemas.Strategy
	for range g.Future {
		p = append(p, schemas.Future)
	}
	for range g.Geometric {
		p = append(p, schemas.Geometric)
	}
	for range g.Final {
		p = append(p, schemas.Final)
	}
	if negatives {
		for range g.Negative {
			p = append(p, schemas.Negative)
		}
	}
	return p
}

// goalsCheckLayout checks that an episode of T steps got exactly the
// pattern at each of steps 0…T−2, in step order, and nothing at step T−1.
func goalsCheckLayout(t *testing.T, label, id string, T int, pattern []schemas.Strategy, goals []schemas.Goal) {
	t.Helper()
	if want := (T - 1) * len(pattern); len(goals) != want {
		t.Errorf("%s: %d goals, want (T−1)·%d = %d", label, len(goals), len(pattern), want)
		return
	}
	for i, g := range goals {
		step, k := i/len(pattern), i%len(pattern)
		if g.Episode != id || int(g.Step) != step || g.Strategy != pattern[k] {
			t.Errorf("%s: goal %d is (%s, step %d, %s), want (%s, step %d, %s)",
				label, i, g.Episode, g.Step, g.Strategy, id, step, pattern[k])
		}
	}
}

func TestGoalsCountsPerStep(t *testing.T) {
	emb := &pipeline.Embodiment{Obs: 2, GoalDims: []int{0, 1}, GoalTolerance: 0.03}
	configs := []pipeline.GoalConfig{
		{Future: 2, Geometric: 1, Final: 1, Gamma: 0.99}, // the SPEC §2 defaults
		{Future: 0, Geometric: 0, Final: 1, Gamma: 0.5},
		{Future: 3, Geometric: 0, Final: 0, Gamma: 0.5},
		{Future: 0, Geometric: 4, Final: 2, Gamma: 0.9},
	}
	for _, gc := range configs {
		for _, T := range []int{2, 3, 12, 40} {
			cfg := &pipeline.Config{Seed: 7, Goals: gc}
			id := fmt.Sprintf("u-%d", T)
			goals := goalsCollect(t, cfg, emb, id, goalsRamp(T))
			goalsCheckLayout(t, fmt.Sprintf("%+v T=%d", gc, T), id, T, goalsPerStepPattern(gc, false), goals)
		}
	}
	// A one-step episode has no step with a future: no goal at all.
	cfg := &pipeline.Config{Seed: 7, Goals: configs[0]}
	if goals := goalsCollect(t, cfg, emb, "u-1", goalsRamp(1)); len(goals) != 0 {
		t.Errorf("T=1: %d goals, want 0", len(goals))
	}
}

// goalsLimit is SPEC §3.3's n = min(horizon or ∞, T−1−step).
func goalsLimit(T, step, horizon int) int {
	n := T - 1 - step
	if horizon > 0 && horizon < n {
		n = horizon
	}
	return n
}

// goalsCheckInEpisode checks every future, geometric and final goal of one
// episode against SPEC §3.3: 1 ≤ offset ≤ n, goal_step = step + offset;
// final is the last step whatever the horizon. relabel hands out the goal
// vector, which must be the goal step's projection; the goals stage's
// stream carries no vector for in-episode goals (pack projects the goal
// frame itself, see schemas.GoalArrow), so there the vector must be absent
// and TestGoalsPipeline checks it in the pairs table.
func goalsCheckInEpisode(t *testing.T, id string, proj [][]float64, horizon int, goals []schemas.Goal, vectors bool) {
	t.Helper()
	T := len(proj)
	for _, g := range goals {
		step := int(g.Step)
		switch g.Strategy {
		case schemas.Future, schemas.Geometric:
			n := goalsLimit(T, step, horizon)
			if g.GoalOffset < 1 || int(g.GoalOffset) > n {
				t.Errorf("%s step %d %s: offset %d outside 1…%d", id, step, g.Strategy, g.GoalOffset, n)
			}
			if int(g.GoalStep) != step+int(g.GoalOffset) {
				t.Errorf("%s step %d %s: goal_step %d ≠ step + offset %d", id, step, g.Strategy, g.GoalStep, g.GoalOffset)
			}
		case schemas.Final:
			if int(g.GoalStep) != T-1 || int(g.GoalOffset) != T-1-step {
				t.Errorf("%s step %d final: (goal_step %d, offset %d), want (%d, %d)", id, step, g.GoalStep, g.GoalOffset, T-1, T-1-step)
			}
		default:
			continue
		}
		if g.GoalEpisode != id {
			t.Errorf("%s step %d %s: goal_episode %q, want its own episode", id, step, g.Strategy, g.GoalEpisode)
		}
		switch {
		case !vectors:
			if len(g.Goal) != 0 {
				t.Errorf("%s step %d %s: the goal stream carries a vector %v for an in-episode goal", id, step, g.Strategy, g.Goal)
			}
		case g.GoalStep < 0 || int(g.GoalStep) >= T:
			t.Errorf("%s step %d %s: goal_step %d outside the episode", id, step, g.Strategy, g.GoalStep)
		case !slices.Equal(g.Goal, proj[g.GoalStep]):
			t.Errorf("%s step %d %s: goal %v, want step %d's %v", id, step, g.Strategy, g.Goal, g.GoalStep, proj[g.GoalStep])
		}
	}
}

func TestGoalsOffsetsWithinBounds(t *testing.T) {
	emb := &pipeline.Embodiment{Obs: 2, GoalDims: []int{0, 1}, GoalTolerance: 0.03}
	for _, gamma := range []float64{0.5, 0.9, 0.999} {
		for _, seed := range []int64{0, 7, -3} {
			gc := pipeline.GoalConfig{Future: 4, Geometric: 4, Final: 1, Gamma: gamma}
			cfg := &pipeline.Config{Seed: seed, Goals: gc}
			proj := goalsRamp(30)
			id := fmt.Sprintf("u-%d", seed)
			goals := goalsCollect(t, cfg, emb, id, proj)
			goalsCheckInEpisode(t, id, proj, 0, goals, true)
			// The second-to-last step has one possible offset: 1.
			for _, g := range goals {
				if g.Step == 28 && g.GoalOffset != 1 {
					t.Errorf("γ=%v seed %d: step 28 %s offset %d, want 1", gamma, seed, g.Strategy, g.GoalOffset)
				}
			}
		}
	}
}

func TestGoalsHorizon(t *testing.T) {
	emb := &pipeline.Embodiment{Obs: 2, GoalDims: []int{0, 1}, GoalTolerance: 0.03}
	const T, H = 20, 3
	gc := pipeline.GoalConfig{Future: 30, Geometric: 30, Final: 1, Gamma: 0.99, Horizon: H}
	cfg := &pipeline.Config{Seed: 7, Goals: gc}
	proj := goalsRamp(T)
	goals := goalsCollect(t, cfg, emb, "u-0", proj)
	goalsCheckLayout(t, "u-0", "u-0", T, goalsPerStepPattern(gc, false), goals)
	goalsCheckInEpisode(t, "u-0", proj, H, goals, true)
	// The horizon caps, it does not shrink further: where n = H every offset
	// 1…H occurs (30 draws per step over 17 such steps; with γ = 0.99 the
	// geometric law is nearly uniform on 1…3).
	seen := map[schemas.Strategy]map[int32]bool{schemas.Future: {}, schemas.Geometric: {}}
	finalBeyondH := false
	for _, g := range goals {
		if g.Strategy == schemas.Final {
			finalBeyondH = finalBeyondH || g.GoalOffset > H
			continue
		}
		if goalsLimit(T, int(g.Step), H) == H {
			seen[g.Strategy][g.GoalOffset] = true
		}
	}
	for s, offs := range seen {
		for k := int32(1); k <= H; k++ {
			if !offs[k] {
				t.Errorf("%s: offset %d never drawn where n = %d", s, k, H)
			}
		}
	}
	// SPEC §3.3: "final: the episode's last step (the horizon does not apply)".
	if !finalBeyondH {
		t.Errorf("no final goal beyond the horizon %d: step 0's final offset must be %d", H, T-1)
	}

	// A horizon longer than the episode changes nothing but the cap: n is
	// T−1−step.
	cfg.Goals.Horizon = 100
	goals = goalsCollect(t, cfg, emb, "u-0", goalsRamp(5))
	goalsCheckInEpisode(t, "u-0", goalsRamp(5), 100, goals, true)
}

// goalsWilsonHilferty is the 0.999 quantile of the chi-square law with df
// degrees of freedom by the Wilson–Hilferty approximation (Wilson and
// Hilferty 1931): df·(1 − 2/(9df) + z·√(2/(9df)))³, with z = 3.090232 the
// standard normal 0.999 quantile (from memory).
func goalsWilsonHilferty(df int) float64 {
	const z = 3.090232
	k := float64(df)
	c := 1 - 2/(9*k) + z*math.Sqrt(2/(9*k))
	return k * c * c * c
}

func TestGoalsWilsonHilfertyThreshold(t *testing.T) {
	// Cross-check of the threshold used below against chi-square table
	// values of the 0.999 quantile (from memory): df 9 → 27.877,
	// df 2 → 13.816 (exactly −2·ln 0.001 = 13.8155, the df-2 law being
	// exponential with mean 2). Wilson–Hilferty is within 3% there and
	// errs on the high side.
	for _, c := range []struct {
		df    int
		table float64
	}{{9, 27.877}, {2, -2 * math.Log(0.001)}} {
		got := goalsWilsonHilferty(c.df)
		if got < c.table || got > c.table*1.03 {
			t.Errorf("Wilson–Hilferty df %d = %.3f, table %.3f", c.df, got, c.table)
		}
	}
}

// goalsChiSquare is Pearson's statistic of observed counts (index k−1 for
// value k) against probabilities p.
func goalsChiSquare(counts []int, p []float64, draws int) float64 {
	var x2 float64
	for i, c := range counts {
		e := p[i] * float64(draws)
		d := float64(c) - e
		x2 += d * d / e
	}
	return x2
}

// goalsTruncGeom is the truncated geometric law of SPEC §3.3, computed from
// its definition: P(k) = (1−γ)γ^(k−1) / (1−γ^n) on 1…n (C-learning,
// Eysenbach et al. 2021).
func goalsTruncGeom(gamma float64, n int) []float64 {
	z := 1 - math.Pow(gamma, float64(n))
	p := make([]float64, n)
	for k := 1; k <= n; k++ {
		p[k-1] = (1 - gamma) * math.Pow(gamma, float64(k-1)) / z
	}
	return p
}

func TestGoalsTruncGeomByHand(t *testing.T) {
	// The test's own law, checked against values worked out by hand.
	// γ = 1/2, n = 3: 1−γ³ = 7/8, so P = (1/2, 1/4, 1/8)/(7/8) = 4/7, 2/7, 1/7.
	for i, want := range []float64{4.0 / 7, 2.0 / 7, 1.0 / 7} {
		if got := goalsTruncGeom(0.5, 3)[i]; math.Abs(got-want) > 1e-15 {
			t.Errorf("γ=0.5 n=3: P(%d) = %v, want %v", i+1, got, want)
		}
	}
	// γ = 0.9, n = 10: 0.9^10 = 0.3486784401, so P(1) = 0.1/0.6513215599
	// = 0.1535339933 and P(10) = 0.1·0.9^9/0.6513215599 = 0.03874204890/
	// 0.6513215599 = 0.0594822148.
	p := goalsTruncGeom(0.9, 10)
	if math.Abs(p[0]-0.1535339933) > 1e-10 || math.Abs(p[9]-0.0594822148) > 1e-10 {
		t.Errorf("γ=0.9 n=10: P(1) = %.10f, P(10) = %.10f; want 0.1535339933, 0.0594822148", p[0], p[9])
	}
	// n = 1: P(1) = (1−γ)/(1−γ) = 1.
	if p := goalsTruncGeom(0.99, 1); p[0] != 1 {
		t.Errorf("n=1: P(1) = %v, want 1", p[0])
	}
}

func TestUniformOffsetChiSquare(t *testing.T) {
	// Andrychowicz et al. 2017, "future" strategy: offset uniform on 1…n.
	r := rand.New(rand.NewPCG(20170101, 42))
	for _, n := range []int{2, 3, 10, 37} {
		draws := 20000 * n
		counts := make([]int, n)
		for range draws {
			k := UniformOffset(r, n)
			if k < 1 || k > n {
				t.Fatalf("n=%d: offset %d outside 1…%d", n, k, n)
			}
			counts[k-1]++
		}
		p := make([]float64, n)
		for i := range p {
			p[i] = 1 / float64(n)
		}
		x2, lim := goalsChiSquare(counts, p, draws), goalsWilsonHilferty(n-1)
		if x2 > lim {
			t.Errorf("n=%d: χ² = %.1f over %d draws, above the 0.999 quantile %.1f (df %d)", n, x2, draws, lim, n-1)
		}
	}
	for range 100 {
		if k := UniformOffset(r, 1); k != 1 {
			t.Fatalf("n=1: offset %d, want 1", k)
		}
	}
}

func TestGeometricOffsetChiSquare(t *testing.T) {
	r := rand.New(rand.NewPCG(20210101, 42))
	const draws = 200000
	for _, c := range []struct {
		gamma float64
		n     int
	}{{0.9, 10}, {0.99, 500}, {0.5, 3}, {0.999, 40}, {0.3, 6}} {
		// Expected counts: the smallest, γ=0.99 n=500 P(500) = 6.7e-5, is
		// 13 draws, above the usual 5 for Pearson's test (common practice).
		p := goalsTruncGeom(c.gamma, c.n)
		counts := make([]int, c.n)
		for range draws {
			k := GeometricOffset(r, c.gamma, c.n)
			if k < 1 || k > c.n {
				t.Fatalf("γ=%v n=%d: offset %d outside 1…%d", c.gamma, c.n, k, c.n)
			}
			counts[k-1]++
		}
		x2, lim := goalsChiSquare(counts, p, draws), goalsWilsonHilferty(c.n-1)
		if x2 > lim {
			t.Errorf("γ=%v n=%d: χ² = %.1f, above the 0.999 quantile %.1f (df %d)", c.gamma, c.n, x2, lim, c.n-1)
		}
	}
	for _, gamma := range []float64{0.01, 0.5, 0.99} {
		for range 1000 {
			if k := GeometricOffset(r, gamma, 1); k != 1 {
				t.Fatalf("γ=%v n=1: offset %d, want 1", gamma, k)
			}
		}
	}

	// The test has power: an untruncated geometric clamped to n (a common
	// mistake, putting γ^(n−1) of the mass on n) fails it by far.
	counts := make([]int, 10)
	for range draws {
		k := 1
		for r.Float64() < 0.9 {
			k++
		}
		counts[min(k, 10)-1]++
	}
	if x2 := goalsChiSquare(counts, goalsTruncGeom(0.9, 10), draws); x2 < 10*goalsWilsonHilferty(9) {
		t.Errorf("a clamped geometric gives χ² = %.1f: the test cannot tell it from the truncated law", x2)
	}
}

// TestGoalsStrategiesFollowTheirLaws checks the laws where the goals stage
// draws them (relabel), not only in the drawing functions: over many
// episodes, step 0's offsets (n = T−1 = 10) follow the uniform law for
// future (Andrychowicz et al. 2017) and the truncated geometric law with the
// configured γ for geometric (Eysenbach et al. 2021), each by Pearson's
// test at the 0.999 quantile; and each sample is far from the other law,
// and from the geometric law with 1−γ, so a swapped call or parameter fails.
func TestGoalsStrategiesFollowTheirLaws(t *testing.T) {
	emb := &pipeline.Embodiment{Obs: 2, GoalDims: []int{0, 1}, GoalTolerance: 0.03}
	const T, episodes, gamma = 11, 20000, 0.7
	n := T - 1
	uniform := make([]float64, n)
	for i := range uniform {
		uniform[i] = 1 / float64(n)
	}
	geometric, flipped := goalsTruncGeom(gamma, n), goalsTruncGeom(1-gamma, n)
	proj := goalsRamp(T)
	for _, c := range []struct {
		name       string
		gc         pipeline.GoalConfig
		law, other []float64
	}{
		{"future", pipeline.GoalConfig{Future: 1, Gamma: gamma}, uniform, geometric},
		{"geometric", pipeline.GoalConfig{Geometric: 1, Gamma: gamma}, geometric, uniform},
	} {
		cfg := &pipeline.Config{Seed: 11, Goals: c.gc}
		counts := make([]int, n)
		for e := range episodes {
			id := fmt.Sprintf("u-%d", e)
			goals := goalsCollect(t, cfg, emb, id, proj)
			if len(goals) != n || goals[0].Step != 0 || goals[0].Strategy.String() != c.name {
				t.Fatalf("%s %s: %d goals, first %+v; want %d, step 0 by %s", c.name, id, len(goals), goals[0], n, c.name)
			}
			counts[goals[0].GoalOffset-1]++
		}
		lim := goalsWilsonHilferty(n - 1)
		if x2 := goalsChiSquare(counts, c.law, episodes); x2 > lim {
			t.Errorf("%s: χ² = %.1f against its law, above the 0.999 quantile %.1f (df %d); counts %v", c.name, x2, lim, n-1, counts)
		}
		if x2 := goalsChiSquare(counts, c.other, episodes); x2 < 10*lim {
			t.Errorf("%s: χ² = %.1f against the other strategy's law: the draws cannot tell them apart", c.name, x2)
		}
		if c.name == "geometric" {
			if x2 := goalsChiSquare(counts, flipped, episodes); x2 < 10*lim {
				t.Errorf("geometric: χ² = %.1f against the law with 1−γ: the draws cannot tell γ from 1−γ", x2)
			}
		}
	}
}

func TestGeometricOffsetMean(t *testing.T) {
	// The truncated law's mean in closed form: E[K] = 1/(1−γ) − nγ^n/(1−γ^n).
	// Worked out by hand:
	//   γ=0.5, n=3:    2 − 3·(1/8)/(7/8) = 2 − 3/7 = 11/7 = 1.5714285714;
	//   γ=0.9, n=10:   10 − 3.486784401/0.6513215599 = 10 − 5.3533993279 = 4.6466006721;
	//   γ=0.99, n=500: 0.99^500 = e^(500·ln 0.99) = e^(−5.0251679) = 0.0065704830,
	//                  100 − 3.2852415/0.9934295 = 100 − 3.3069699 = 96.6930301.
	r := rand.New(rand.NewPCG(2021, 7))
	const draws = 200000
	for _, c := range []struct {
		gamma float64
		n     int
		mean  float64
	}{{0.5, 3, 11.0 / 7}, {0.9, 10, 4.6466006721}, {0.99, 500, 96.6930301}} {
		closed := 1/(1-c.gamma) - float64(c.n)*math.Pow(c.gamma, float64(c.n))/(1-math.Pow(c.gamma, float64(c.n)))
		if math.Abs(closed-c.mean) > 1e-6 {
			t.Errorf("γ=%v n=%d: closed form %.10f ≠ hand value %.10f", c.gamma, c.n, closed, c.mean)
		}
		// Mean and variance by direct summation of the law.
		var m1, m2 float64
		for i, p := range goalsTruncGeom(c.gamma, c.n) {
			k := float64(i + 1)
			m1 += k * p
			m2 += k * k * p
		}
		if math.Abs(m1-c.mean) > 1e-6 {
			t.Errorf("γ=%v n=%d: Σ k·P(k) = %.10f ≠ hand value %.10f", c.gamma, c.n, m1, c.mean)
		}
		sd := math.Sqrt(m2 - m1*m1)
		var sum float64
		for range draws {
			sum += float64(GeometricOffset(r, c.gamma, c.n))
		}
		// Tolerance: 4 standard errors of the sample mean.
		if got, tol := sum/draws, 4*sd/math.Sqrt(draws); math.Abs(got-c.mean) > tol {
			t.Errorf("γ=%v n=%d: sample mean %.4f, want %.4f ± %.4f", c.gamma, c.n, got, c.mean, tol)
		}
	}
}

// goalsFixedSource is a rand.Source that returns given values, so that a
// draw's uniform input is chosen by the test.
type goalsFixedSource struct{ vals []uint64 }

func (s *goalsFixedSource) Uint64() uint64 {
	v := s.vals[0]
	s.vals = s.vals[1:]
	return v
}

// goalsWithUniform returns a generator whose next Float64 is (the float
// nearest below) u.
func goalsWithUniform(t *testing.T, u float64) *rand.Rand {
	t.Helper()
	m := uint64(math.Floor(u * (1 << 53)))
	// math/rand/v2 documents Float64 as uniform on [0, 1) with 53 bits; it
	// takes the low 53 bits of one Uint64. Check that assumption first.
	probe := rand.New(&goalsFixedSource{vals: []uint64{m}})
	if got, want := probe.Float64(), float64(m)/(1<<53); got != want {
		t.Fatalf("rand.Float64 from %d = %v, want %v: the fixed source no longer sets u", m, got, want)
	}
	return rand.New(&goalsFixedSource{vals: []uint64{m}})
}

func TestGeometricOffsetInvertsTheCDF(t *testing.T) {
	// For u uniform on [0,1), the draw must be the k with F(k−1) ≤ u < F(k),
	// F(k) = (1−γ^k)/(1−γ^n) the truncated law's CDF (computed here from its
	// definition): u just below F(k) gives k, just above gives k+1.
	for _, c := range []struct {
		gamma float64
		n     int
	}{{0.9, 10}, {0.5, 3}, {0.99, 500}} {
		z := 1 - math.Pow(c.gamma, float64(c.n))
		for k := 1; k < c.n; k++ {
			F := (1 - math.Pow(c.gamma, float64(k))) / z
			if got := GeometricOffset(goalsWithUniform(t, F-1e-9), c.gamma, c.n); got != k {
				t.Errorf("γ=%v n=%d: u = F(%d)−1e-9 gives %d, want %d", c.gamma, c.n, k, got, k)
			}
			if got := GeometricOffset(goalsWithUniform(t, F+1e-9), c.gamma, c.n); got != k+1 {
				t.Errorf("γ=%v n=%d: u = F(%d)+1e-9 gives %d, want %d", c.gamma, c.n, k, got, k+1)
			}
		}
		if got := GeometricOffset(goalsWithUniform(t, 0), c.gamma, c.n); got != 1 {
			t.Errorf("γ=%v n=%d: u = 0 gives %d, want 1", c.gamma, c.n, got)
		}
		if got := GeometricOffset(goalsWithUniform(t, 1-1.0/(1<<53)), c.gamma, c.n); got != c.n {
			t.Errorf("γ=%v n=%d: u = 1−2⁻⁵³ gives %d, want n = %d", c.gamma, c.n, got, c.n)
		}
	}
}

func TestL2(t *testing.T) {
	for _, c := range []struct {
		a, b []float64
		want float64
		tol  float64
	}{
		// √(3² + 4² + 0²) = √25 = 5.
		{[]float64{1, 2, 3}, []float64{4, 6, 3}, 5, 0},
		// √((−1−2)²) = 3.
		{[]float64{-1}, []float64{2}, 3, 0},
		// √(0.01² + 0.02²) = √(0.0001 + 0.0004) = √0.0005 = 0.022360679774997897.
		{[]float64{0.01, 0.02}, []float64{0, 0}, 0.022360679774997897, 1e-17},
		// √(0.375² + 0.5²) = √(0.140625 + 0.25) = √0.390625 = 0.625, exact in binary.
		{[]float64{1, 2}, []float64{1.375, 2.5}, 0.625, 0},
		{[]float64{}, []float64{}, 0, 0},
	} {
		if got := L2(c.a, c.b); math.Abs(got-c.want) > c.tol {
			t.Errorf("L2(%v, %v) = %.17g, want %.17g", c.a, c.b, got, c.want)
		}
	}
}

func TestGoalsRewardAtTolerance(t *testing.T) {
	// Final goals only, T = 3. Step 0: next = proj[1] = (1, 2), goal =
	// proj[2] = (1.375, 2.5), distance 0.625 exactly (see TestL2). Step 1:
	// next = goal = proj[2], distance 0. proj[0] equals the goal, so a
	// reward computed from obs instead of next_obs would be 1 at step 0.
	proj := [][]float64{{1.375, 2.5}, {1, 2}, {1.375, 2.5}}
	cfg := &pipeline.Config{Seed: 7, Goals: pipeline.GoalConfig{Final: 1, Gamma: 0.5}}
	for _, c := range []struct {
		tol  float64
		want []float32
	}{
		{0.625, []float32{1, 1}},                    // at exactly the tolerance: reached ("at most", SPEC §3.3)
		{math.Nextafter(0.625, 0), []float32{0, 1}}, // the tolerance one ulp below the distance
		{math.Nextafter(0.625, 1), []float32{1, 1}}, // one ulp above
		{0.6, []float32{0, 1}},                      // distance just above the tolerance
		{0, []float32{0, 1}},                        // distance 0 ≤ 0
		{0.03, []float32{0, 1}},                     //
		{1, []float32{1, 1}},                        //
	} {
		emb := &pipeline.Embodiment{Obs: 2, GoalDims: []int{0, 1}, GoalTolerance: c.tol}
		goals := goalsCollect(t, cfg, emb, "u-0", proj)
		var got []float32
		for _, g := range goals {
			got = append(got, g.Reward)
		}
		if !slices.Equal(got, c.want) {
			t.Errorf("tolerance %.17g: rewards %v, want %v", c.tol, got, c.want)
		}
	}
	// The brief's example: √(0.01² + 0.02²) = 0.0223607 is within 0.03,
	// not within 0.02.
	proj = [][]float64{{0, 0}, {0.01, 0.02}, {0, 0}}
	for _, c := range []struct {
		tol  float64
		want float32
	}{{0.03, 1}, {0.0224, 1}, {0.0223, 0}, {0.02, 0}} {
		emb := &pipeline.Embodiment{Obs: 2, GoalDims: []int{0, 1}, GoalTolerance: c.tol}
		if got := goalsCollect(t, cfg, emb, "u-0", proj)[0].Reward; got != c.want {
			t.Errorf("distance 0.0223607, tolerance %v: reward %v, want %v", c.tol, got, c.want)
		}
	}
}

// goalsEpisode is one episode of a test partition: its id is
// <unit>-<t0> (SPEC §3.2).
type goalsEpisode struct {
	Unit, Embodiment string
	T0               int64
	Obs              [][]float64
}

func (e goalsEpisode) id() string { return fmt.Sprintf("%s-%d", e.Unit, e.T0) }

// goalsStageRun writes one partition's episode stream (sorted by episode
// id, as the episodes stage writes it) to a work area, runs the goals stage
// on it and returns the goals it wrote, with the stage's summary.
func goalsStageRun(t *testing.T, cfg *pipeline.Config, eps []goalsEpisode) ([]schemas.Goal, pipeline.GoalsSummary) {
	t.Helper()
	ctx := context.Background()
	eps = slices.Clone(eps)
	sort.Slice(eps, func(i, j int) bool { return eps[i].id() < eps[j].id() })
	work := pipeline.NewLocalStore(t.TempDir())
	const key = "episodes/test/frames.arrow"
	up, err := work.Create(ctx, key)
	if err != nil {
		t.Fatal(err)
	}
	fw := pipeline.NewFrameWriter(up, cfg.Float == "float32")
	sum := pipeline.EpisodesSummary{Partition: 0, File: key, Index: "episodes/test/episodes.index.jsonl", Episodes: int64(len(eps))}
	var infos []pipeline.EpisodeInfo
	for _, e := range eps {
		infos = append(infos, pipeline.EpisodeInfo{ID: e.id(), Unit: e.Unit, Embodiment: e.Embodiment, Steps: len(e.Obs)})
		for i, obs := range e.Obs {
			f := schemas.Frame{Unit: e.Unit, Embodiment: e.Embodiment, T: e.T0 + int64(i)*1e6, Src: "logs/a.jsonl",
				Line: int64(i + 1), Obs: obs, Episode: e.id(), Step: int32(i), Last: i == len(e.Obs)-1}
			if err := fw.Write(&f); err != nil {
				t.Fatal(err)
			}
			sum.Frames++
		}
	}
	if err := fw.Close(); err != nil {
		t.Fatal(err)
	}
	if err := up.Commit(false); err != nil {
		t.Fatal(err)
	}
	if err := pipeline.WriteEpisodeIndex(ctx, work, sum.Index, infos); err != nil {
		t.Fatal(err)
	}
	env := &pipeline.Env{Config: cfg, Work: work, Parallel: 1}
	res, err := Goals{}.Do(ctx, env, pipeline.Item{ID: "p00000", Key: "k0", Meta: sum})
	if err != nil {
		t.Fatalf("goals stage: %v", err)
	}
	gs := res.(pipeline.GoalsSummary)
	rc, err := work.Open(ctx, gs.File, 0)
	if err != nil {
		t.Fatal(err)
	}
	defer rc.Close()
	gr, err := pipeline.NewGoalReader(rc)
	if err != nil {
		t.Fatal(err)
	}
	defer gr.Release()
	var out []schemas.Goal
	var g schemas.Goal
	for gr.Next(&g) {
		c := g
		c.Goal = slices.Clone(g.Goal)
		out = append(out, c)
	}
	if err := gr.Err(); err != nil {
		t.Fatal(err)
	}
	return out, gs
}

// goalsByEpisode groups goals by their episode.
func goalsByEpisode(goals []schemas.Goal) map[string][]schemas.Goal {
	m := map[string][]schemas.Goal{}
	for _, g := range goals {
		m[g.Episode] = append(m[g.Episode], g)
	}
	return m
}

// goalsStageConfig is a config with two embodiments: arm (obs 3, goal dims
// 0 and 2) and cart (obs 2, goal dim 1).
func goalsStageConfig(seed int64, gc pipeline.GoalConfig) *pipeline.Config {
	return &pipeline.Config{Seed: seed, Goals: gc, Embodiments: map[string]*pipeline.Embodiment{
		"arm":  {Obs: 3, GoalDims: []int{0, 2}, GoalTolerance: 0.03},
		"cart": {Obs: 2, GoalDims: []int{1}, GoalTolerance: 0.03},
	}}
}

// goalsRampObs is T obs vectors of width w where every element tells the
// episode (base) and the step.
func goalsRampObs(T, w int, base float64) [][]float64 {
	o := make([][]float64, T)
	for i := range o {
		for d := range w {
			o[i] = append(o[i], base+float64(i)+float64(d)/10)
		}
	}
	return o
}

// goalsProject is obs at dims, written independently of the stage's own.
func goalsProject(obs [][]float64, dims []int) [][]float64 {
	p := make([][]float64, len(obs))
	for i, o := range obs {
		for _, d := range dims {
			p[i] = append(p[i], o[d])
		}
	}
	return p
}

func TestGoalsNegatives(t *testing.T) {
	gc := pipeline.GoalConfig{Future: 2, Geometric: 1, Final: 1, Negative: 2, Gamma: 0.9}
	cfg := goalsStageConfig(7, gc)
	eps := []goalsEpisode{
		{"a", "arm", 100, goalsRampObs(6, 3, 100)},
		{"b", "arm", 200, goalsRampObs(4, 3, 200)},
		{"c", "cart", 300, goalsRampObs(5, 2, 300)}, // the only cart: no negatives
	}
	goals, sum := goalsStageRun(t, cfg, eps)
	// (T−1)·(4 + 2) for the arms, (T−1)·4 for the lone cart:
	// 5·6 + 3·6 + 4·4 = 30 + 18 + 16 = 64.
	if len(goals) != 64 || sum.Pairs != 64 {
		t.Errorf("%d goals, summary %d pairs; want 64", len(goals), sum.Pairs)
	}
	// future 2·(5+3+4) = 24, geometric and final 12 each, negative 2·(5+3) = 16.
	wantPer := map[string]int64{"future": 24, "geometric": 12, "final": 12, "negative": 16}
	for s, n := range wantPer {
		if sum.PerStrategy[s] != n {
			t.Errorf("summary: %s = %d, want %d", s, sum.PerStrategy[s], n)
		}
	}
	byEp := goalsByEpisode(goals)
	info := map[string]goalsEpisode{}
	for _, e := range eps {
		info[e.id()] = e
	}
	for _, e := range eps {
		id := e.id()
		emb := cfg.Embodiments[e.Embodiment]
		hasOther := e.Embodiment == "arm"
		goalsCheckLayout(t, id, id, len(e.Obs), goalsPerStepPattern(gc, hasOther), byEp[id])
		goalsCheckInEpisode(t, id, goalsProject(e.Obs, emb.GoalDims), 0, byEp[id], false)
		for _, g := range byEp[id] {
			if g.Strategy != schemas.Negative {
				continue
			}
			o, ok := info[g.GoalEpisode]
			switch {
			case g.GoalOffset != -1:
				t.Errorf("%s step %d negative: offset %d, want −1 (SPEC §4)", id, g.Step, g.GoalOffset)
			case !ok || g.GoalEpisode == id:
				t.Errorf("%s step %d negative: goal_episode %q is not another episode", id, g.Step, g.GoalEpisode)
			case o.Embodiment != e.Embodiment:
				t.Errorf("%s step %d negative: goal episode %s is a %s", id, g.Step, g.GoalEpisode, o.Embodiment)
			case g.GoalStep < 0 || int(g.GoalStep) >= len(o.Obs):
				t.Errorf("%s step %d negative: goal_step %d outside 0…%d", id, g.Step, g.GoalStep, len(o.Obs)-1)
			case !slices.Equal(g.Goal, goalsProject(o.Obs, emb.GoalDims)[g.GoalStep]):
				t.Errorf("%s step %d negative: goal %v, want %s step %d's %v", id, g.Step, g.Goal, g.GoalEpisode, g.GoalStep,
					goalsProject(o.Obs, emb.GoalDims)[g.GoalStep])
			}
		}
	}

	// An embodiment alone in its partition gets no negatives at all.
	goals, sum = goalsStageRun(t, cfg, eps[:1])
	goalsCheckLayout(t, "a-100 alone", "a-100", 6, goalsPerStepPattern(gc, false), goals)
	if sum.PerStrategy["negative"] != 0 {
		t.Errorf("alone: %d negatives, want 0", sum.PerStrategy["negative"])
	}
}

func TestGoalsNegativeDrawsAreUniform(t *testing.T) {
	// SPEC §3.3: the episode uniformly among the other episodes of the same
	// embodiment, then the step uniformly in it. Four arm episodes; a-100
	// draws 50 negatives at each of its 40 steps: 2000 draws over the three
	// others, and over the 10 steps of b-100.
	gc := pipeline.GoalConfig{Negative: 50, Gamma: 0.9}
	cfg := goalsStageConfig(11, gc)
	eps := []goalsEpisode{
		{"a", "arm", 100, goalsRampObs(41, 3, 0)},
		{"b", "arm", 100, goalsRampObs(10, 3, 100)},
		{"c", "arm", 100, goalsRampObs(7, 3, 200)},
		{"d", "arm", 100, goalsRampObs(3, 3, 300)},
	}
	goals, _ := goalsStageRun(t, cfg, eps)
	byEp := map[string]int{}
	bSteps := make([]int, 10)
	total, inB := 0, 0
	for _, g := range goals {
		if g.Episode != "a-100" {
			continue
		}
		total++
		byEp[g.GoalEpisode]++
		if g.GoalEpisode == "b-100" {
			bSteps[g.GoalStep]++
			inB++
		}
	}
	if total != 2000 {
		t.Fatalf("a-100: %d negatives, want 40·50 = 2000", total)
	}
	counts := []int{byEp["b-100"], byEp["c-100"], byEp["d-100"]}
	if x2, lim := goalsChiSquare(counts, []float64{1.0 / 3, 1.0 / 3, 1.0 / 3}, total), goalsWilsonHilferty(2); x2 > lim {
		t.Errorf("goal episodes %v (b, c, d): χ² = %.1f above %.1f", counts, x2, lim)
	}
	p := make([]float64, 10)
	for i := range p {
		p[i] = 0.1
	}
	if x2, lim := goalsChiSquare(bSteps, p, inB), goalsWilsonHilferty(9); x2 > lim {
		t.Errorf("goal steps in b-100 %v: χ² = %.1f above %.1f", bSteps, x2, lim)
	}
}

func TestGoalsGoalDimsAndReward(t *testing.T) {
	// The reward compares next_obs[goal_dims] with the goal, goal_dims in
	// their given order (SPEC §3.3). goal_dims [3, 1] of 4-wide obs; dims 0
	// and 2 move by 2 per step, so a reward taken on them would never be 1.
	//   step 0: goal = (obs₂[3], obs₂[1]) = (0.25, 0.5); next = (0.27, 0.51);
	//           distance √(0.02² + 0.01²) = √0.0005 = 0.0223607.
	//   step 1: next = goal, distance 0.
	obs := [][]float64{{9, 0.5, 9, 0.25}, {7, 0.51, 7, 0.27}, {5, 0.5, 5, 0.25}}
	for _, c := range []struct {
		tol  float64
		want []float32
	}{{0.03, []float32{1, 1}}, {0.0224, []float32{1, 1}}, {0.0223, []float32{0, 1}}, {0.02, []float32{0, 1}}} {
		cfg := &pipeline.Config{Seed: 1, Goals: pipeline.GoalConfig{Final: 1, Gamma: 0.5}, Embodiments: map[string]*pipeline.Embodiment{
			"arm": {Obs: 4, GoalDims: []int{3, 1}, GoalTolerance: c.tol},
		}}
		goals, _ := goalsStageRun(t, cfg, []goalsEpisode{{"u", "arm", 5, obs}})
		if len(goals) != 2 {
			t.Fatalf("%d goals, want 2", len(goals))
		}
		for i, g := range goals {
			if g.Reward != c.want[i] {
				t.Errorf("tolerance %v step %d: reward %v, want %v", c.tol, i, g.Reward, c.want[i])
			}
		}
	}
	// A negative carries its vector: the other episode's obs at [3, 1].
	cfg := &pipeline.Config{Seed: 1, Goals: pipeline.GoalConfig{Negative: 1, Gamma: 0.5}, Embodiments: map[string]*pipeline.Embodiment{
		"arm": {Obs: 4, GoalDims: []int{3, 1}, GoalTolerance: 0.03},
	}}
	other := [][]float64{{1, 2, 3, 4}, {5, 6, 7, 8}}
	goals, _ := goalsStageRun(t, cfg, []goalsEpisode{{"u", "arm", 5, obs}, {"v", "arm", 5, other}})
	for _, g := range goals {
		want := [][]float64{{4, 2}, {8, 6}}
		if g.Episode == "u-5" {
			if g.GoalEpisode != "v-5" || !slices.Equal(g.Goal, want[g.GoalStep]) {
				t.Errorf("u-5 step %d negative: goal %s step %d %v, want v-5's %v", g.Step, g.GoalEpisode, g.GoalStep, g.Goal, want[g.GoalStep])
			}
		}
	}
}

func TestEpisodeRNGStable(t *testing.T) {
	seq := func(seed int64, id string) []uint64 {
		r := EpisodeRNG(seed, id)
		s := make([]uint64, 64)
		for i := range s {
			s[i] = r.Uint64()
		}
		return s
	}
	a := seq(7, "u1-1700000000000000000")
	if b := seq(7, "u1-1700000000000000000"); !slices.Equal(a, b) {
		t.Error("two generators for (7, u1-…) differ")
	}
	for _, c := range []struct {
		seed int64
		id   string
	}{{8, "u1-1700000000000000000"}, {-7, "u1-1700000000000000000"}, {7, "u1-1700000000000000001"}, {7, "u2-1700000000000000000"}, {7, ""}} {
		b := seq(c.seed, c.id)
		same := 0
		for i := range a {
			if a[i] == b[i] {
				same++
			}
		}
		if same > 0 {
			t.Errorf("(%d, %q) shares %d of 64 draws with (7, u1-…)", c.seed, c.id, same)
		}
	}
}

// goalsInEpisode keeps the future, geometric and final goals: the draws
// that only involve the episode itself.
func goalsInEpisode(goals []schemas.Goal) []schemas.Goal {
	var out []schemas.Goal
	for _, g := range goals {
		if g.Strategy != schemas.Negative {
			out = append(out, g)
		}
	}
	return out
}

func goalsEqual(a, b []schemas.Goal) bool {
	return slices.EqualFunc(a, b, func(x, y schemas.Goal) bool {
		return x.Episode == y.Episode && x.Step == y.Step && x.Strategy == y.Strategy && x.GoalEpisode == y.GoalEpisode &&
			x.GoalStep == y.GoalStep && x.GoalOffset == y.GoalOffset && x.Reward == y.Reward && slices.Equal(x.Goal, y.Goal)
	})
}

func TestGoalsDependOnlyOnSeedAndEpisode(t *testing.T) {
	// SPEC §3.3: draws come from a generator seeded by (seed, episode id),
	// so an episode's goals do not depend on what else is in its partition
	// (here: episodes sorting before and after it, shifting its index).
	gc := pipeline.GoalConfig{Future: 3, Geometric: 2, Final: 1, Gamma: 0.9}
	target := goalsEpisode{"m", "arm", 500, goalsRampObs(25, 3, 0)}
	alone, _ := goalsStageRun(t, goalsStageConfig(7, gc), []goalsEpisode{target})
	crowd, _ := goalsStageRun(t, goalsStageConfig(7, gc), []goalsEpisode{
		{"a", "arm", 1, goalsRampObs(9, 3, 100)},
		{"b", "cart", 1, goalsRampObs(12, 2, 200)},
		target,
		{"z", "arm", 1, goalsRampObs(30, 3, 300)},
	})
	if got := goalsByEpisode(crowd)[target.id()]; !goalsEqual(alone, got) {
		t.Error("m-500's goals change when other episodes share its partition")
	}
	// relabel on the same projection, outside any partition, agrees.
	direct := goalsCollect(t, goalsStageConfig(7, gc), goalsStageConfig(7, gc).Embodiments["arm"], target.id(),
		goalsProject(target.Obs, []int{0, 2}))
	for i := range direct {
		direct[i].Goal = nil // the stage's stream has no in-episode vectors
	}
	if !goalsEqual(alone, direct) {
		t.Error("relabel alone and the goals stage disagree on m-500")
	}
	// Another seed, or another id, draws other offsets.
	for _, c := range []struct {
		seed int64
		ep   goalsEpisode
	}{{8, target}, {7, goalsEpisode{"m", "arm", 501, target.Obs}}} {
		other, _ := goalsStageRun(t, goalsStageConfig(c.seed, gc), []goalsEpisode{c.ep})
		same := 0
		for i := range alone {
			if alone[i].Strategy != schemas.Final && alone[i].GoalOffset == other[i].GoalOffset {
				same++
			}
		}
		// 24 steps · 5 random draws; on 1…n with n up to 24 many offsets
		// agree by chance, but not all 120.
		if same == 120 {
			t.Errorf("seed %d id %s: the same offsets as seed 7 %s", c.seed, c.ep.id(), target.id())
		}
	}
}

func TestGoalsInEpisodeDrawsIgnoreNegatives(t *testing.T) {
	// With negatives on, the future, geometric and final goals of an episode
	// must still depend only on (seed, episode id) (SPEC §3.3): adding an
	// episode of the same embodiment to the partition adds negatives, but
	// must not move the episode's in-episode goals.
	gc := pipeline.GoalConfig{Future: 2, Geometric: 1, Final: 1, Negative: 1, Gamma: 0.9}
	target := goalsEpisode{"m", "arm", 500, goalsRampObs(25, 3, 0)}
	alone, _ := goalsStageRun(t, goalsStageConfig(7, gc), []goalsEpisode{target})
	withOne, _ := goalsStageRun(t, goalsStageConfig(7, gc), []goalsEpisode{target, {"a", "arm", 1, goalsRampObs(9, 3, 100)}})
	withTwo, _ := goalsStageRun(t, goalsStageConfig(7, gc), []goalsEpisode{target, {"a", "arm", 1, goalsRampObs(9, 3, 100)},
		{"z", "arm", 1, goalsRampObs(30, 3, 300)}})
	a := goalsInEpisode(alone)
	b := goalsInEpisode(goalsByEpisode(withOne)[target.id()])
	c := goalsInEpisode(goalsByEpisode(withTwo)[target.id()])
	if !goalsEqual(b, c) {
		t.Error("m-500's in-episode goals differ between one and two other arm episodes")
	}
	if !goalsEqual(a, b) {
		t.Error("m-500's in-episode goals differ between alone and with another arm episode: " +
			"the negative draws share the generator with the in-episode draws and are skipped when the episode is alone")
	}
}

// goalsPipelineRun writes the given JSON Lines objects under a source
// folder, runs every stage with the config and returns the manifest and
// every pairs row, read back from the Parquet shards.
func goalsPipelineRun(t *testing.T, cfgYAML string, files map[string]string, parallel int) (*pipeline.Manifest, []schemas.PairRow[float64]) {
	t.Helper()
	dir := t.TempDir()
	for name, body := range files {
		p := filepath.Join(dir, "logs", name)
		if err := os.MkdirAll(filepath.Dir(p), 0o755); err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(p, []byte(body), 0o644); err != nil {
			t.Fatal(err)
		}
	}
	cfg, err := pipeline.ParseConfig([]byte(cfgYAML), dir, "goals.yaml")
	if err != nil {
		t.Fatal(err)
	}
	m, err := pipeline.Execute(context.Background(), cfg, All(), pipeline.Options{Version: "v1", Parallel: parallel})
	if err != nil {
		t.Fatalf("run: %v", err)
	}
	var rows []schemas.PairRow[float64]
	for _, f := range m.Files {
		if f.Table != "pairs" {
			continue
		}
		got, err := parquet.ReadFile[schemas.PairRow[float64]](filepath.Join(dir, "datasets", cfg.Dataset, "v1", f.Path))
		if err != nil {
			t.Fatalf("read %s: %v", f.Path, err)
		}
		rows = append(rows, got...)
	}
	return m, rows
}

// goalsPartitionOf is SPEC §3.4's partition, computed here:
// BE_uint64(sha256(unit)[0:8]) mod partitions.
func goalsPartitionOf(unit string, partitions int) int {
	h := sha256.Sum256([]byte(unit))
	return int(binary.BigEndian.Uint64(h[:8]) % uint64(partitions))
}

// goalsSplitOf is SPEC §3.4 written apart from the code: u = x / 2^64 with
// x = BE_uint64(sha256(key)[0:8]), compared exactly as rationals.
func goalsSplitOf(key string, train, val float64) string {
	h := sha256.Sum256([]byte(key))
	u := new(big.Rat).SetFrac(new(big.Int).SetUint64(binary.BigEndian.Uint64(h[:8])), new(big.Int).Lsh(big.NewInt(1), 64))
	tr := new(big.Rat).SetFloat64(train)
	switch {
	case u.Cmp(tr) < 0:
		return "train"
	case u.Cmp(new(big.Rat).SetFloat64(train+val)) < 0:
		return "val"
	}
	return "test"
}

func TestGoalsPipeline(t *testing.T) {
	const cfgYAML = `dataset: goals-test
source:
  uri: logs
partitions: 2
seed: 11
embodiments:
  arm:
    obs: 3
    goal_dims: [0, 2]
    goal_tolerance: 0.05
  cart:
    obs: 2
    goal_tolerance: 0.05
episodes:
  max_gap: 500ms
  min_steps: 2
  max_steps: 100
goals:
  future: 2
  geometric: 1
  final: 1
  negative: 1
  gamma: 0.9
float: float64
`
	// Units, embodiments and episode lengths. arm-a has two episodes (an
	// "end" event after its 6th frame). The partitions are whatever SPEC
	// §3.4 makes them; the precondition below checks that the fleet covers
	// both an arm with and an arm without another arm in its partition.
	type unit struct {
		name, emb string
		lens      []int
	}
	units := []unit{{"arm-a", "arm", []int{6, 4}}, {"arm-b", "arm", []int{7}}, {"arm-c", "arm", []int{5}},
		{"cart-a", "cart", []int{8}}, {"cart-b", "cart", []int{3}}}
	type epWant struct {
		unit, emb string
		steps     int
		part      int
		split     string
	}
	eps := map[string]epWant{}
	obsOf := map[string][][]float64{} // per episode, per step, the obs as written
	goalDims := map[string][]int{"arm": {0, 2}, "cart": {0, 1}}
	files := map[string]string{}
	for ui, u := range units {
		var b strings.Builder
		tt := int64(1_700_000_000_000_000_000) + int64(ui)*1e12
		for ei, n := range u.lens {
			if ei > 0 {
				tt += 1e9 // a gap too, to be safe: a new episode either way
			}
			id := fmt.Sprintf("%s-%d", u.name, tt)
			eps[id] = epWant{u.name, u.emb, n, goalsPartitionOf(u.name, 2), goalsSplitOf(id, 0.8, 0.1)}
			for s := range n {
				ev := ""
				if s == n-1 && ei < len(u.lens)-1 {
					ev = `,"ev":"end"`
				}
				x := float64(ui*10 + s)
				if u.emb == "arm" {
					fmt.Fprintf(&b, `{"unit":%q,"embodiment":"arm","t":%d,"obs":[%d.5,%d,%d.25]%s}`+"\n", u.name, tt, ui*10+s, ei, ui*10+s, ev)
					obsOf[id] = append(obsOf[id], []float64{x + 0.5, float64(ei), x + 0.25})
				} else {
					fmt.Fprintf(&b, `{"unit":%q,"embodiment":"cart","t":%d,"obs":[%d,%d.75]%s}`+"\n", u.name, tt, ei, ui*10+s, ev)
					obsOf[id] = append(obsOf[id], []float64{float64(ei), x + 0.75})
				}
				tt += 100e6
			}
		}
		files[u.name+".jsonl"] = b.String()
	}
	armsIn := map[int]int{}
	for _, e := range eps {
		if e.emb == "arm" {
			armsIn[e.part]++
		}
	}
	if armsIn[0] == 0 || armsIn[1] == 0 || (armsIn[0] != 1 && armsIn[1] != 1) || (armsIn[0] < 2 && armsIn[1] < 2) {
		t.Fatalf("fixture: arm episodes per partition %v; want one partition with a lone arm and one with several", armsIn)
	}
	hasOther := func(id string) bool {
		for o, e := range eps {
			if o != id && e.emb == eps[id].emb && e.part == eps[id].part && e.split == eps[id].split {
				return true
			}
		}
		return false
	}
	m, rows := goalsPipelineRun(t, cfgYAML, files, 1)
	// Pairs per episode: (T−1)·(2 + 1 + 1 + 1 if another episode of its
	// embodiment shares its partition and split; default splits 0.8/0.1/0.1).
	wantRows := map[string]int{}
	var total int64
	for id, e := range eps {
		per := 4
		if hasOther(id) {
			per++
		}
		wantRows[id] = (e.steps - 1) * per
		total += int64(wantRows[id])
	}
	if m.Funnel.Episodes != int64(len(eps)) || m.Funnel.Pairs != total {
		t.Errorf("funnel: %d episodes, %d pairs; want %d, %d", m.Funnel.Episodes, m.Funnel.Pairs, len(eps), total)
	}
	gotRows := map[string]int{}
	for _, r := range rows {
		gotRows[r.Episode]++
		e, ok := eps[r.Episode]
		if !ok {
			t.Errorf("pair of unknown episode %s", r.Episode)
			continue
		}
		if r.Reached != (r.Reward == 1) {
			t.Errorf("%s step %d: reached %v, reward %v", r.Episode, r.Step, r.Reached, r.Reward)
		}
		// obs, next_obs, goal and reward, from the lines as written: goal =
		// goal frame's obs at goal_dims; reward 1 when
		// √Σ(next_obs[d] − goal)² ≤ 0.05 (SPEC §3.3).
		if g, ok := eps[r.GoalEpisode]; ok && r.GoalStep >= 0 && int(r.GoalStep) < g.steps && int(r.Step) < e.steps-1 {
			var goal []float64
			for _, d := range goalDims[e.emb] {
				goal = append(goal, obsOf[r.GoalEpisode][r.GoalStep][d])
			}
			obs, next := obsOf[r.Episode][r.Step], obsOf[r.Episode][r.Step+1]
			var ss float64
			for i, d := range goalDims[e.emb] {
				ss += (next[d] - goal[i]) * (next[d] - goal[i])
			}
			want := float32(0)
			if math.Sqrt(ss) <= 0.05 {
				want = 1
			}
			if !slices.Equal(r.Obs, obs) || !slices.Equal(r.NextObs, next) || !slices.Equal(r.Goal, goal) || r.Reward != want {
				t.Errorf("%s step %d %s: (obs %v, next %v, goal %v, reward %v), want (%v, %v, %v, %v)",
					r.Episode, r.Step, r.Strategy, r.Obs, r.NextObs, r.Goal, r.Reward, obs, next, goal, want)
			}
		}
		switch r.Strategy {
		case "future", "geometric":
			if r.GoalEpisode != r.Episode || r.GoalOffset < 1 || int(r.GoalOffset) > e.steps-1-int(r.Step) || r.GoalStep != r.Step+r.GoalOffset {
				t.Errorf("%s step %d %s: goal (%s, %d, offset %d) outside the episode's future", r.Episode, r.Step, r.Strategy, r.GoalEpisode, r.GoalStep, r.GoalOffset)
			}
		case "final":
			if r.GoalEpisode != r.Episode || int(r.GoalStep) != e.steps-1 || int(r.GoalOffset) != e.steps-1-int(r.Step) {
				t.Errorf("%s step %d final: goal (%s, %d, offset %d)", r.Episode, r.Step, r.GoalEpisode, r.GoalStep, r.GoalOffset)
			}
		case "negative":
			o, ok := eps[r.GoalEpisode]
			if !ok || r.GoalEpisode == r.Episode || o.emb != e.emb || o.part != e.part || o.split != e.split || r.GoalOffset != -1 ||
				r.GoalStep < 0 || int(r.GoalStep) >= o.steps {
				t.Errorf("%s step %d negative: goal (%s, %d, offset %d) is not a step of another %s episode of partition %d",
					r.Episode, r.Step, r.GoalEpisode, r.GoalStep, r.GoalOffset, e.emb, e.part)
			}
		default:
			t.Errorf("%s step %d: strategy %q", r.Episode, r.Step, r.Strategy)
		}
	}
	reached := 0
	for _, r := range rows {
		if r.Reached {
			reached++
		}
	}
	// The fixture moves 1 per step, so only goals one step ahead (or equal)
	// are reached: both outcomes occur, the reward check above is not idle.
	if reached == 0 || reached == len(rows) {
		t.Errorf("%d of %d pairs reached: the fixture should give both rewards", reached, len(rows))
	}
	for id, n := range wantRows {
		if gotRows[id] != n {
			t.Errorf("%s: %d pairs, want %d", id, gotRows[id], n)
		}
	}
	// SPEC §3.3: results never depend on concurrency or worker count.
	m2, rows2 := goalsPipelineRun(t, cfgYAML, files, 2)
	if m2.Digest != m.Digest || !reflect.DeepEqual(rows, rows2) {
		t.Errorf("two workers: digest %s and %d rows, one worker: %s and %d rows", m2.Digest, len(rows2), m.Digest, len(rows))
	}
}

func TestGoalsNegativesStayInTheirSplit(t *testing.T) {
	// SPEC §3.3 (revised): a negative comes from another episode of the same
	// embodiment, partition and split. Nine arm episodes and two carts of one
	// partition, spread over the three splits by SPEC §3.4.
	gc := pipeline.GoalConfig{Future: 1, Negative: 3, Gamma: 0.9}
	cfg := goalsStageConfig(5, gc)
	cfg.Splits = pipeline.SplitConfig{Train: 0.4, Val: 0.3, Test: 0.3}
	cfg.SplitBy = "episode"
	var eps []goalsEpisode
	for i := range 9 {
		eps = append(eps, goalsEpisode{"a", "arm", int64(100 * (i + 1)), goalsRampObs(3+i, 3, float64(100*i))})
	}
	eps = append(eps, goalsEpisode{"c", "cart", 100, goalsRampObs(4, 2, 900)}, goalsEpisode{"c", "cart", 200, goalsRampObs(5, 2, 950)})
	split := map[string]string{}
	pool := map[[2]string]int{}
	emb := map[string]string{}
	for _, e := range eps {
		split[e.id()] = goalsSplitOf(e.id(), 0.4, 0.3)
		emb[e.id()] = e.Embodiment
		pool[[2]string{e.Embodiment, split[e.id()]}]++
	}
	if pool[[2]string{"arm", "train"}] == 0 || pool[[2]string{"arm", "val"}] == 0 || pool[[2]string{"arm", "test"}] == 0 {
		t.Fatalf("fixture: arm episodes per split %v; want all three splits", pool)
	}
	many := 0
	for k, n := range pool {
		if k[0] == "arm" && n >= 2 {
			many++
		}
	}
	if many == 0 {
		t.Fatalf("fixture: arm episodes per split %v; want a split with two or more", pool)
	}
	goals, sum := goalsStageRun(t, cfg, eps)
	// Negatives per episode: (T−1)·3 when another episode of its embodiment
	// shares its split, else none.
	var wantNeg int64
	wantPer := map[string]int{}
	for _, e := range eps {
		if pool[[2]string{e.Embodiment, split[e.id()]}] >= 2 {
			wantPer[e.id()] = (len(e.Obs) - 1) * 3
			wantNeg += int64(wantPer[e.id()])
		}
	}
	if sum.PerStrategy["negative"] != wantNeg {
		t.Errorf("negatives %d, want %d", sum.PerStrategy["negative"], wantNeg)
	}
	gotPer := map[string]int{}
	for _, g := range goals {
		if g.Strategy != schemas.Negative {
			continue
		}
		gotPer[g.Episode]++
		if split[g.GoalEpisode] != split[g.Episode] || emb[g.GoalEpisode] != emb[g.Episode] || g.GoalEpisode == g.Episode {
			t.Errorf("%s (%s) step %d: negative from %s (%s %s)", g.Episode, split[g.Episode], g.Step, g.GoalEpisode, emb[g.GoalEpisode], split[g.GoalEpisode])
		}
	}
	for _, e := range eps {
		if gotPer[e.id()] != wantPer[e.id()] {
			t.Errorf("%s: %d negatives, want %d", e.id(), gotPer[e.id()], wantPer[e.id()])
		}
	}
	// Determinism: the same draw again.
	again, _ := goalsStageRun(t, cfg, eps)
	if !reflect.DeepEqual(goals, again) {
		t.Errorf("a second run drew other goals")
	}
}
