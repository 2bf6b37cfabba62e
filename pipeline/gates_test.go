package pipeline

import (
	"errors"
	"math"
	"reflect"
	"testing"
)

func gatesManifest() *Manifest {
	return &Manifest{
		Version: "v2",
		Funnel:  Funnel{Lines: 100, Frames: 80, Dropped: map[string]int64{Malformed: 15, NonFinite: 5}},
		Sources: []Source{
			{Key: "a.jsonl", Lines: 60, Kept: 57, Dropped: map[string]int64{Malformed: 3}},
			{Key: "b.jsonl", Lines: 40, Kept: 23, Dropped: map[string]int64{Malformed: 12, NonFinite: 5}, Incomplete: true},
		},
		Counts: []Count{
			{Embodiment: "arm", Split: "train", Episodes: 5, Frames: 50},
			{Embodiment: "arm", Split: "val", Episodes: 1, Frames: 10},
			{Embodiment: "arm", Split: "test", Episodes: 2, Frames: 20},
		},
	}
}

func f64(v float64) *float64 { return &v }
func intp(v int) *int        { return &v }

// TestCheckGates: each gate's value computed by hand from gatesManifest:
// dropped 20/100; malformed 15/100, non_finite 5/100; b.jsonl drops 17/40 =
// 0.425 of its lines, a.jsonl 3/60 = 0.05; one incomplete object (b.jsonl);
// 1 val episode; 20 test frames.
func TestCheckGates(t *testing.T) {
	cfg := &Config{Gates: &GatesConfig{
		MaxDropped:       f64(0.25),
		MaxDroppedBy:     map[string]float64{Malformed: 0.1, NonFinite: 0.05},
		MaxSourceDropped: f64(0.4),
		MaxIncomplete:    intp(0),
		MinEpisodes:      map[string]int64{"train": 5, "val": 2},
		MinFrames:        map[string]int64{"test": 20},
	}}
	want := []Gate{
		{"min_frames_total", 1, 80, "", GatePass},
		{"max_dropped", 0.25, 0.2, "", GatePass},
		{"max_dropped_by.malformed", 0.1, 0.15, "", GateFail},
		{"max_dropped_by.non_finite", 0.05, 0.05, "", GatePass},
		{"max_source_dropped", 0.4, 0.425, "b.jsonl", GateFail},
		{"max_incomplete", 0, 1, "b.jsonl", GateFail},
		{"min_episodes.train", 5, 5, "", GatePass},
		{"min_episodes.val", 2, 1, "", GateFail},
		{"min_frames.test", 20, 20, "", GatePass},
	}
	gates, err := CheckGates(cfg, gatesManifest(), nil, nil, GateOptions{})
	if !reflect.DeepEqual(gates, want) {
		t.Errorf("gates\n got %+v\nwant %+v", gates, want)
	}
	var ge *GateError
	if !errors.As(err, &ge) || !errors.Is(err, ErrGateFailed) || len(ge.Failed) != 4 {
		t.Fatalf("error %v, want a GateError of 4 gates", err)
	}
	if got := ge.Failed[1].Describe(); got != "max_source_dropped: 0.425, at most 0.4 (b.jsonl) — fail" {
		t.Errorf("describe: %q", got)
	}
	if got := ge.Failed[3].Describe(); got != "min_episodes.val: 1, at least 2 — fail" {
		t.Errorf("describe: %q", got)
	}

	// Waived gates are recorded as waived and stop nothing.
	gates, err = CheckGates(cfg, gatesManifest(), nil, nil, GateOptions{Waive: []string{
		"max_dropped_by.malformed", "max_source_dropped", "max_incomplete", "min_episodes.val"}})
	if err != nil {
		t.Fatalf("all failed gates waived: %v", err)
	}
	for i, g := range gates {
		w := want[i].Result
		if w == GateFail {
			w = GateWaived
		}
		if g.Result != w {
			t.Errorf("%s: %s, want %s", g.Name, g.Result, w)
		}
	}
}

// TestCheckGatesDefault: without a gates section only the built-in gate is
// checked; it fails a run without frames and cannot be waived.
func TestCheckGatesDefault(t *testing.T) {
	m := gatesManifest()
	gates, err := CheckGates(&Config{}, m, nil, nil, GateOptions{})
	if err != nil || !reflect.DeepEqual(gates, []Gate{{"min_frames_total", 1, 80, "", GatePass}}) {
		t.Errorf("gates %+v, error %v", gates, err)
	}
	m.Funnel.Frames = 0
	gates, err = CheckGates(&Config{}, m, nil, nil, GateOptions{Waive: []string{GateNoFrames}})
	if !errors.Is(err, ErrGateFailed) || !reflect.DeepEqual(gates, []Gate{{"min_frames_total", 1, 0, "", GateFail}}) {
		t.Errorf("no frames: gates %+v, error %v", gates, err)
	}
}

// TestCheckGatesDrift: the drift gate measures through the DriftFunc
// against the baseline, names it, and records an infinite shift as the
// largest float (JSON has no Inf).
func TestCheckGatesDrift(t *testing.T) {
	cfg := &Config{Gates: &GatesConfig{MaxDrift: f64(3)}}
	base := &Manifest{Version: "v1"}
	fixed := func(v float64) DriftFunc {
		return func(_, _ map[string]EmbodimentStats) (float64, string) { return v, "arm obs[2]" }
	}
	gates, err := CheckGates(cfg, gatesManifest(), base, fixed(2.5), GateOptions{})
	if err != nil || gates[1] != (Gate{"max_drift", 3, 2.5, "arm obs[2] against v1", GatePass}) {
		t.Errorf("pass: %+v, %v", gates, err)
	}
	gates, err = CheckGates(cfg, gatesManifest(), base, fixed(5), GateOptions{})
	if !errors.Is(err, ErrGateFailed) || gates[1] != (Gate{"max_drift", 3, 5, "arm obs[2] against v1", GateFail}) {
		t.Errorf("fail: %+v, %v", gates, err)
	}
	gates, _ = CheckGates(cfg, gatesManifest(), base, fixed(math.Inf(1)), GateOptions{})
	if gates[1].Value != math.MaxFloat64 || gates[1].Result != GateFail || gates[1].Subject != "infinite shift: arm obs[2] against v1" {
		t.Errorf("infinite: %+v", gates[1])
	}
	gates, err = CheckGates(cfg, gatesManifest(), nil, fixed(9), GateOptions{})
	if err != nil || gates[1] != (Gate{"max_drift", 3, 0, "no baseline", GatePass}) {
		t.Errorf("no baseline: %+v, %v", gates, err)
	}
}
