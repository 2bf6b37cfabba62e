package pipeline_test

import (
	"context"
	"testing"

	"hindcast/pipeline"
	"hindcast/stages"
)

// A changed gate reruns no stage: gates are checked on the finished work,
// so a rerun with a deliberate override is instant (issue: quality gates).
func TestGateChangeRerunsNoStage(t *testing.T) {
	ctx := context.Background()
	dir := t.TempDir()
	gatesWrite(t, dir, "u1.jsonl", gatesLog("u1", 1_700_000_000_000_000_000, 10, 0))
	cfg, err := pipeline.ParseConfig([]byte(gatesRunYAML), dir, "gated.yaml")
	if err != nil {
		t.Fatal(err)
	}
	if _, err := pipeline.Execute(ctx, cfg, stages.All(), pipeline.Options{Version: "v1", Parallel: 1}); err != nil {
		t.Fatal(err)
	}
	v := 0.9
	cfg.Gates = &pipeline.GatesConfig{MaxDropped: &v}
	m, err := pipeline.Execute(ctx, cfg, stages.All(), pipeline.Options{Version: "v2", Parallel: 1})
	if err != nil {
		t.Fatal(err)
	}
	for _, s := range m.Stages {
		if !s.Cached {
			t.Errorf("stage %s reran after a change of gates alone", s.Name)
		}
	}
}
