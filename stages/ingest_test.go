package stages

import "testing"

func TestScratch(t *testing.T) {
	r := runPipelineAt(t, `
dataset: scratch
partitions: 1
embodiments:
  arm: {obs: 3, act: 2, goal_tolerance: 0.1}
episodes: {max_gap: 1h, min_steps: 2}
goals: {future: 1, geometric: 0, final: 0}
`, map[string][]byte{"a.jsonl": jsonLines(
		`{"unit":"u1","embodiment":"arm","t":1764489600123456789,"obs":[0.1,0.2,0.3]}`,
		`{"unit":"u1","embodiment":"arm","t":1764489600123456790,"obs":[0.1,0.2,0.3],"act":[1,2],"task":"x"}`)})
	t.Logf("%+v", r.Manifest.Funnel)
	for _, f := range readShardFrames[float32](t, r) {
		t.Logf("%+v task=%v", f, f.Task)
	}
}
