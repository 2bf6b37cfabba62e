package pipeline_test

import (
	"context"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"hindcast/pipeline"
	"hindcast/stages"
)

const gatesRunYAML = `dataset: gated
source:
  uri: logs
partitions: 2
seed: 3
embodiments:
  arm:
    obs: 2
    goal_tolerance: 0.05
episodes:
  max_gap: 1s
  min_steps: 2
  max_steps: 100
goals:
  future: 1
  gamma: 0.5
`

// gatesLog is n frames of unit u, one every 100 ms from t0, obs [base+i, 1].
func gatesLog(u string, t0 int64, n int, base float64) string {
	var b strings.Builder
	for i := range n {
		fmt.Fprintf(&b, `{"unit":%q,"embodiment":"arm","t":%d,"obs":[%g,1]}`+"\n", u, t0+int64(i)*100e6, base+float64(i))
	}
	return b.String()
}

func gatesWrite(t *testing.T, dir, name, body string) {
	t.Helper()
	p := filepath.Join(dir, "logs", name)
	if err := os.MkdirAll(filepath.Dir(p), 0o755); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(p, []byte(body), 0o644); err != nil {
		t.Fatal(err)
	}
}

// TestGatesRun: a failed gate commits nothing and keeps the stages' work,
// so a rerun with the gate waived reruns no stage; the manifest records
// every gate checked; the drift gate compares with the latest version, or
// the one named.
func TestGatesRun(t *testing.T) {
	ctx := context.Background()
	dir := t.TempDir()
	for i, u := range []string{"u1", "u2", "u3", "u4", "u5", "u6"} {
		gatesWrite(t, dir, u+".jsonl", gatesLog(u, 1_700_000_000_000_000_000+int64(i)*1e12, 10, 0))
	}
	cfg, err := pipeline.ParseConfig([]byte(gatesRunYAML), dir, "gated.yaml")
	if err != nil {
		t.Fatal(err)
	}
	cfg.Gates = &pipeline.GatesConfig{MinEpisodes: map[string]int64{"train": 1000}}
	committed := func(v string) bool {
		_, err := os.Stat(filepath.Join(dir, "datasets", "gated", v, "manifest.json"))
		return err == nil
	}

	_, err = pipeline.Execute(ctx, cfg, stages.All(), pipeline.Options{Version: "v1", Parallel: 1})
	var ge *pipeline.GateError
	if !errors.As(err, &ge) || len(ge.Failed) != 1 || ge.Failed[0].Name != "min_episodes.train" || ge.Failed[0].Threshold != 1000 {
		t.Fatalf("error %v, want min_episodes.train failed", err)
	}
	if committed("v1") {
		t.Fatal("a failed gate committed v1")
	}
	if _, err := os.Stat(filepath.Join(dir, "datasets", "gated", "v1")); !errors.Is(err, os.ErrNotExist) {
		t.Errorf("version folder v1 exists after a failed gate: %v", err)
	}

	// The same run with the gate waived: every stage cached, committed,
	// and the gate recorded as waived with its measured value.
	m, err := pipeline.Execute(ctx, cfg, stages.All(), pipeline.Options{Version: "v1", Parallel: 1,
		Gates: pipeline.GateOptions{Waive: []string{"min_episodes.train"}}})
	if err != nil {
		t.Fatalf("waived: %v", err)
	}
	for _, s := range m.Stages {
		if !s.Cached {
			t.Errorf("stage %s reran after a failed gate", s.Name)
		}
	}
	var train int64
	for _, c := range m.Counts {
		if c.Split == "train" {
			train += c.Episodes
		}
	}
	if len(m.Gates) != 2 || m.Gates[0] != (pipeline.Gate{Name: "min_frames_total", Threshold: 1, Value: 60, Result: "pass"}) ||
		m.Gates[1] != (pipeline.Gate{Name: "min_episodes.train", Threshold: 1000, Value: float64(train), Result: "waived"}) {
		t.Errorf("manifest gates %+v (train episodes %d)", m.Gates, train)
	}
	if !committed("v1") {
		t.Fatal("v1 not committed")
	}
	raw, err := os.ReadFile(filepath.Join(dir, "datasets", "gated", "v1", "manifest.json"))
	if err != nil || !strings.Contains(string(raw), `"name": "min_episodes.train"`) {
		t.Errorf("manifest.json does not record the gate (%v)", err)
	}

	// Drift against the latest version (v1), same data: no drift.
	cfg.Gates = &pipeline.GatesConfig{MaxDrift: func() *float64 { v := 0.5; return &v }()}
	drift := func(base, cur map[string]pipeline.EmbodimentStats) (float64, string) {
		// Mean shift of obs[0] in the baseline's std: the measure of
		// inspect.MaxDrift, kept here to test the gate's wiring alone.
		b, c := base["arm"].Obs, cur["arm"].Obs
		return (c.Mean[0] - b.Mean[0]) / b.Std[0], "arm obs[0]"
	}
	m, err = pipeline.Execute(ctx, cfg, stages.All(), pipeline.Options{Version: "v2", Parallel: 1, Drift: drift})
	if err != nil {
		t.Fatalf("v2: %v", err)
	}
	if g := m.Gates[1]; g.Name != "max_drift" || g.Value != 0 || g.Subject != "arm obs[0] against v1" || g.Result != "pass" {
		t.Errorf("v2 drift gate %+v", g)
	}
	// New logs far above the others move obs[0]'s train mean: the gate
	// fails against the named baseline, and v3 is not committed.
	for i, u := range []string{"w1", "w2", "w3", "w4", "w5", "w6"} {
		gatesWrite(t, dir, u+".jsonl", gatesLog(u, 1_700_100_000_000_000_000+int64(i)*1e12, 10, 1000))
	}
	_, err = pipeline.Execute(ctx, cfg, stages.All(), pipeline.Options{Version: "v3", Parallel: 1, Drift: drift,
		Gates: pipeline.GateOptions{Baseline: "v2"}})
	if !errors.As(err, &ge) || ge.Failed[0].Name != "max_drift" || ge.Failed[0].Subject != "arm obs[0] against v2" || ge.Failed[0].Value <= 0.5 {
		t.Fatalf("v3: %v, want max_drift failed against v2", err)
	}
	if committed("v3") {
		t.Error("v3 committed after a failed drift gate")
	}
}
