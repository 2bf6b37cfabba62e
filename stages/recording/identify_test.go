package recording

import (
	"errors"
	"testing"

	"hindcast/pipeline"
)

func TestIdentify(t *testing.T) {
	cfg := &pipeline.Config{
		Embodiments: map[string]*pipeline.Embodiment{
			"picker6": {Obs: 1, Frames: &pipeline.FramesConfig{Rate: 10}},
			"jsonl":   {Obs: 1}, // declared without frames
		},
		Recordings: &pipeline.RecordingsConfig{
			Unit:       pipeline.IdentityRule{Metadata: "robot", Key: "unit"},
			Embodiment: pipeline.IdentityRule{Metadata: "robot", Key: "model"},
		},
	}
	byPath := &pipeline.Config{Embodiments: cfg.Embodiments, Recordings: &pipeline.RecordingsConfig{
		Unit:       pipeline.IdentityRule{Path: `^fleet/([^/]+)/`},
		Embodiment: pipeline.IdentityRule{Path: `^fleet/[^/]+/([a-z0-9]+)-`},
	}}
	md := func(m map[string]string) func(string) (map[string]string, error) {
		return func(name string) (map[string]string, error) {
			if name != "robot" {
				return nil, nil
			}
			return m, nil
		}
	}
	long := "u0123456789012345678901234567890123456789012345678901234567890123" // 65 chars
	cases := []struct {
		name string
		cfg  *pipeline.Config
		key  string
		md   map[string]string
		want Identity
	}{
		{"metadata", cfg, "a.mcap", map[string]string{"unit": "arm-07", "model": "picker6"}, Identity{Unit: "arm-07", Embodiment: "picker6"}},
		{"no metadata", cfg, "a.mcap", nil, Identity{Skip: pipeline.SkipNoUnit}},
		{"no unit key", cfg, "a.mcap", map[string]string{"model": "picker6"}, Identity{Skip: pipeline.SkipNoUnit}},
		// SPEC §1: a unit is ^[A-Za-z0-9._-]{1,64}$.
		{"unit breaks pattern", cfg, "a.mcap", map[string]string{"unit": "arm 07", "model": "picker6"}, Identity{Skip: pipeline.SkipNoUnit}},
		{"unit too long", cfg, "a.mcap", map[string]string{"unit": long, "model": "picker6"}, Identity{Skip: pipeline.SkipNoUnit}},
		{"empty unit", cfg, "a.mcap", map[string]string{"unit": "", "model": "picker6"}, Identity{Skip: pipeline.SkipNoUnit}},
		// no_unit comes before unknown_embodiment.
		{"no unit and unknown embodiment", cfg, "a.mcap", map[string]string{"model": "zz"}, Identity{Skip: pipeline.SkipNoUnit}},
		{"undeclared embodiment", cfg, "a.mcap", map[string]string{"unit": "arm-07", "model": "zz"},
			Identity{Unit: "arm-07", Embodiment: "zz", Skip: pipeline.SkipUnknownEmbodiment}},
		{"embodiment without frames", cfg, "a.mcap", map[string]string{"unit": "arm-07", "model": "jsonl"},
			Identity{Unit: "arm-07", Embodiment: "jsonl", Skip: pipeline.SkipUnknownEmbodiment}},
		{"no embodiment key", cfg, "a.mcap", map[string]string{"unit": "arm-07"},
			Identity{Unit: "arm-07", Skip: pipeline.SkipUnknownEmbodiment}},
		{"path", byPath, "fleet/arm-07/picker6-2026.mcap", nil, Identity{Unit: "arm-07", Embodiment: "picker6"}},
		{"path no match", byPath, "other/arm-07/picker6-2026.mcap", nil, Identity{Skip: pipeline.SkipNoUnit}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			got, err := identify(c.key, c.cfg, md(c.md))
			if err != nil {
				t.Fatal(err)
			}
			if got != c.want {
				t.Fatalf("got %+v want %+v", got, c.want)
			}
		})
	}
	// A store error is an error, not a skip.
	boom := errors.New("boom")
	if _, err := identify("a", cfg, func(string) (map[string]string, error) { return nil, boom }); !errors.Is(err, boom) {
		t.Fatalf("err %v", err)
	}
}
