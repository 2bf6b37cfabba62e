package pipeline

import (
	"context"
	"encoding/json"
	"errors"
	"math"
	"reflect"
	"slices"
	"testing"
)

// The tests of Moments, the accumulator behind the manifest's stats (SPEC
// §5: count, and per dimension mean, population std, min, max), against a
// two-pass computation worked out by hand on a small data set.

// momentsData is eight 3-dimensional vectors. By hand, two passes:
//
//	dim 0: 2 4 4 4 5 5 7 9; sum 40, mean 5; deviations −3 −1 −1 −1 0 0 2 4,
//	       squares 9 1 1 1 0 0 4 16, Σ = 32; variance 32/8 = 4, std 2;
//	       min 2, max 9.
//	dim 1: −1.5 0.25 3 −2 0.5 1 −0.25 7; sum 8, mean 1; deviations
//	       −2.5 −0.75 2 −3 −0.5 0 −1.25 6, squares 6.25 0.5625 4 9 0.25 0
//	       1.5625 36, Σ = 57.625; variance 57.625/8 = 7.203125,
//	       std 2.683863819…; min −2, max 7.
//	dim 2: 1e9 + 1 … 1e9 + 8 (a large offset, where a one-pass Σx² loses
//	       every digit); mean 1e9 + 4.5; deviations ±0.5 ±1.5 ±2.5 ±3.5,
//	       Σ squares = 2·(0.25 + 2.25 + 6.25 + 12.25) = 42; variance 5.25;
//	       min 1e9 + 1, max 1e9 + 8.
func momentsData() [][]float64 {
	d0 := []float64{2, 4, 4, 4, 5, 5, 7, 9}
	d1 := []float64{-1.5, 0.25, 3, -2, 0.5, 1, -0.25, 7}
	var xs [][]float64
	for i := range d0 {
		xs = append(xs, []float64{d0[i], d1[i], 1e9 + float64(i+1)})
	}
	return xs
}

// momentsWant are the hand values above: mean, M2 (Σ squared deviations),
// min, max per dimension.
var momentsWant = struct{ mean, m2, min, max []float64 }{
	mean: []float64{5, 1, 1e9 + 4.5},
	m2:   []float64{32, 57.625, 42},
	min:  []float64{2, -2, 1e9 + 1},
	max:  []float64{9, 7, 1e9 + 8},
}

func momentsCheck(t *testing.T, what string, m *Moments) {
	t.Helper()
	if m.N != 8 {
		t.Errorf("%s: n = %d, want 8", what, m.N)
	}
	for i := range 3 {
		// Tolerances: 1e-12 relative on the mean; M2 within 1e-9 absolute
		// (dims 0, 1) and 1e-5 (dim 2, where one ulp of 1e9 is 1.2e-7).
		mtol, vtol := 1e-12*math.Abs(momentsWant.mean[i]), 1e-9
		if i == 2 {
			vtol = 1e-5
		}
		if math.Abs(m.Mean[i]-momentsWant.mean[i]) > mtol {
			t.Errorf("%s dim %d: mean %.17g, want %.17g", what, i, m.Mean[i], momentsWant.mean[i])
		}
		if math.Abs(m.M2[i]-momentsWant.m2[i]) > vtol {
			t.Errorf("%s dim %d: M2 %.17g, want %.17g (variance %v)", what, i, m.M2[i], momentsWant.m2[i], momentsWant.m2[i]/8)
		}
		if m.Min[i] != momentsWant.min[i] || m.Max[i] != momentsWant.max[i] {
			t.Errorf("%s dim %d: min %v max %v, want %v %v", what, i, m.Min[i], m.Max[i], momentsWant.min[i], momentsWant.max[i])
		}
	}
	// The manifest's std is the population std, √(M2/n).
	vs := vectorStats(m)
	for i, want := range []float64{2, math.Sqrt(7.203125), math.Sqrt(5.25)} {
		if math.Abs(vs.Std[i]-want) > 1e-6 {
			t.Errorf("%s dim %d: std %.17g, want %.17g", what, i, vs.Std[i], want)
		}
	}
	if vs.Count != 8 {
		t.Errorf("%s: stats count %d, want 8", what, vs.Count)
	}
}

func TestMomentsAdd(t *testing.T) {
	var m Moments
	for _, x := range momentsData() {
		m.Add(x)
	}
	momentsCheck(t, "Add", &m)
}

// momentsPartitions splits the data set into four partitions, one empty.
func momentsPartitions() []*Moments {
	xs := momentsData()
	parts := []*Moments{{}, {}, {}, {}}
	for i, x := range xs {
		switch {
		case i < 3:
			parts[0].Add(x)
		case i < 5:
			parts[2].Add(x)
		default:
			parts[3].Add(x)
		}
	}
	return parts
}

func TestMomentsMerge(t *testing.T) {
	var m Moments
	for _, p := range momentsPartitions() {
		m.Merge(p)
	}
	m.Merge(nil)
	momentsCheck(t, "Merge", &m)

	// Partitions of one vector each.
	var one Moments
	for _, x := range momentsData() {
		var p Moments
		p.Add(x)
		one.Merge(&p)
	}
	momentsCheck(t, "Merge of singletons", &one)

	// A lone vector: mean itself, M2 0, std 0.
	var s Moments
	s.Add([]float64{3, -4, 0.5})
	if s.N != 1 || !reflect.DeepEqual(s.Mean, []float64{3, -4, 0.5}) || !reflect.DeepEqual(s.M2, []float64{0, 0, 0}) {
		t.Errorf("one vector: %+v", s)
	}
}

func TestMomentsMergeIsDeterministic(t *testing.T) {
	// The manifest merges partitions in partition order; the same partitions
	// merged in the same order give the same bits, so stats never depend on
	// which worker finished first.
	merge := func() Moments {
		var m Moments
		for _, p := range momentsPartitions() {
			m.Merge(p)
		}
		return m
	}
	a, b := merge(), merge()
	if !reflect.DeepEqual(a, b) {
		t.Errorf("two merges in partition order differ:\n%+v\n%+v", a, b)
	}
	// Merging into an empty accumulator copies: later changes to the
	// partition do not reach the merged result.
	parts := momentsPartitions()
	var m Moments
	m.Merge(parts[0])
	before := append([]float64(nil), m.Mean...)
	parts[0].Add([]float64{100, 100, 100})
	if !reflect.DeepEqual(m.Mean, before) {
		t.Errorf("merged result aliases the partition: mean %v, was %v", m.Mean, before)
	}
	// Summaries travel as JSON: a round trip keeps every bit.
	data, err := json.Marshal(a)
	if err != nil {
		t.Fatal(err)
	}
	var back Moments
	if err := json.Unmarshal(data, &back); err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(back, a) {
		t.Errorf("JSON round trip: %+v, want %+v", back, a)
	}
}

func TestVectorStatsEmpty(t *testing.T) {
	// No rows: count 0 and empty vectors, not null (SPEC §5 lists them).
	for _, m := range []*Moments{nil, {}} {
		vs := vectorStats(m)
		if vs.Count != 0 || vs.Mean == nil || len(vs.Mean) != 0 || vs.Std == nil || vs.Min == nil || vs.Max == nil {
			t.Errorf("vectorStats(%v) = %+v", m, vs)
		}
	}
}

// TestEpisodeIndexRoundTrip: the episode list the episodes stage stores
// beside a partition comes back whole and in order; a missing list is
// ErrNotFound.
func TestEpisodeIndexRoundTrip(t *testing.T) {
	ctx := context.Background()
	s := NewLocalStore(t.TempDir())
	want := []EpisodeInfo{
		{ID: "arm-1-1000", Unit: "arm-1", Embodiment: "arm", Steps: 30},
		{ID: "neg--5000000000", Unit: "neg", Embodiment: "arm", Steps: 15},
		{ID: "u.x_9-7", Unit: "u.x_9", Embodiment: "cart", Steps: 2},
	}
	if err := WriteEpisodeIndex(ctx, s, "episodes/k/episodes.index.jsonl", want); err != nil {
		t.Fatal(err)
	}
	got, err := ReadEpisodeIndex(ctx, s, "episodes/k/episodes.index.jsonl")
	if err != nil || !slices.Equal(got, want) {
		t.Errorf("read back %+v, %v; want %+v", got, err, want)
	}
	if _, err := ReadEpisodeIndex(ctx, s, "episodes/none/episodes.index.jsonl"); !errors.Is(err, ErrNotFound) {
		t.Errorf("missing index: %v, want ErrNotFound", err)
	}
}
