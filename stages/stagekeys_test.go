package stages

import (
	"strings"
	"testing"

	"hindcast/pipeline"
)

// stageKeysConfig has an embodiment fed by recordings (frames) and JSON
// Lines alike; the tests below edit it.
const stageKeysConfig = `dataset: demo
source:
  uri: logs
embodiments:
  picker6:
    obs: 3
    act: 2
    goal_tolerance: 0.1
    frames:
      rate: 10
      max_age: 150ms
      obs: [{topic: /arm/joints, field: "position[0:3]"}]
      act: [{topic: /arm/command, field: velocity}]
`

func stageKeys(t *testing.T, yaml string) map[string]string {
	t.Helper()
	cfg, err := pipeline.ParseConfig([]byte(yaml), t.TempDir(), "fleet.yaml")
	if err != nil {
		t.Fatal(err)
	}
	keys := map[string]string{}
	for _, st := range All() {
		keys[st.Name()] = pipeline.ConfigKey(st, cfg, "code")
	}
	return keys
}

// TestGatesChangeNoStageKey: a gate decides whether a version is committed,
// never its bytes, so a rerun with a changed gate finds every stage cached.
func TestGatesChangeNoStageKey(t *testing.T) {
	base := stageKeys(t, stageKeysConfig)
	gated := stageKeys(t, stageKeysConfig+"gates:\n  max_dropped: 0.01\n  min_episodes: {train: 5}\n")
	for name, k := range base {
		if gated[name] != k {
			t.Errorf("stage %s: key changed with a gate (%s -> %s)", name, k, gated[name])
		}
	}
	if len(base) != 4 {
		t.Errorf("compared %d stages, want 4", len(base))
	}
}

// TestRecordingSettingsChangeIngestKey: what decides a recording's frames
// (frames, recordings, the image settings) is in ingest's key.
func TestRecordingSettingsChangeIngestKey(t *testing.T) {
	base := stageKeys(t, stageKeysConfig)["ingest"]
	edits := map[string]string{
		"frames.max_age":         strings.Replace(stageKeysConfig, "max_age: 150ms", "max_age: 200ms", 1),
		"frames align":           strings.Replace(stageKeysConfig, "field: velocity}", "field: velocity, align: next}", 1),
		"recordings.time":        stageKeysConfig + "recordings: {time: publish_time}\n",
		"recordings.unit":        stageKeysConfig + "recordings:\n  unit: {path: '^units/([^/]+)/'}\n",
		"source.image_roots":     strings.Replace(stageKeysConfig, "  uri: logs\n", "  uri: logs\n  image_roots: ['s3://fleet-images/']\n", 1),
		"source.max_image_bytes": strings.Replace(stageKeysConfig, "  uri: logs\n", "  uri: logs\n  max_image_bytes: 1024\n", 1),
	}
	for name, yaml := range edits {
		if got := stageKeys(t, yaml)["ingest"]; got == base {
			t.Errorf("%s changed, the ingest key did not (%s)", name, got)
		}
	}
}
