package schemas_test

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/santhosh-tekuri/jsonschema/v6"

	"hindcast/fleet"
	"hindcast/pipeline"
	"hindcast/schemas"
	"hindcast/stages"
)

// compileManifestSchema compiles the embedded schema; Compile also checks it
// against the draft 2020-12 meta-schema. Formats are asserted, so "created"
// must be an RFC 3339 date-time (RFC 3339 §5.6) and not only match the
// pattern.
func compileManifestSchema(t *testing.T) *jsonschema.Schema {
	t.Helper()
	doc, err := jsonschema.UnmarshalJSON(bytes.NewReader(schemas.ManifestSchema()))
	if err != nil {
		t.Fatalf("reading the manifest schema: %v", err)
	}
	c := jsonschema.NewCompiler()
	c.AssertFormat()
	if err := c.AddResource("manifest.schema.json", doc); err != nil {
		t.Fatalf("adding the manifest schema: %v", err)
	}
	sch, err := c.Compile("manifest.schema.json")
	if err != nil {
		t.Fatalf("compiling the manifest schema: %v", err)
	}
	return sch
}

// demoManifest runs the whole pipeline on the demo fleet (every fault class
// of SPEC §3.1 and §3.2, one duplicate object, one incomplete object) and
// returns the bytes of the manifest.json it committed.
func demoManifest(t *testing.T) []byte {
	t.Helper()
	dir := t.TempDir()
	if err := fleet.Demo(dir); err != nil {
		t.Fatalf("writing the demo fleet: %v", err)
	}
	cfg, err := pipeline.LoadConfig(filepath.Join(dir, "hindcast.yaml"))
	if err != nil {
		t.Fatalf("loading the demo config: %v", err)
	}
	_, err = pipeline.Execute(context.Background(), cfg, stages.All(), pipeline.Options{
		Version: "schema-check", Parallel: 2,
		Tool: pipeline.ToolInfo{Version: pipeline.ToolVersion, Commit: "unknown"},
		Now:  func() time.Time { return time.Date(2026, 12, 1, 3, 4, 5, 0, time.UTC) },
	})
	if err != nil {
		t.Fatalf("running the demo: %v", err)
	}
	b, err := os.ReadFile(filepath.Join(dir, "datasets", cfg.Dataset, "schema-check", pipeline.ManifestName))
	if err != nil {
		t.Fatalf("reading the manifest: %v", err)
	}
	return b
}

func decode(t *testing.T, b []byte) map[string]any {
	t.Helper()
	v, err := jsonschema.UnmarshalJSON(bytes.NewReader(b))
	if err != nil {
		t.Fatalf("decoding the manifest: %v", err)
	}
	m, ok := v.(map[string]any)
	if !ok {
		t.Fatalf("manifest is %T, not an object", v)
	}
	return m
}

// leafLocations lists the instance locations ("/a/0/b") of the innermost
// validation errors: where the schema says the manifest is wrong.
func leafLocations(err error) []string {
	var ve *jsonschema.ValidationError
	if !errors.As(err, &ve) {
		return nil
	}
	var out []string
	var walk func(e *jsonschema.ValidationError)
	walk = func(e *jsonschema.ValidationError) {
		if len(e.Causes) == 0 {
			out = append(out, "/"+strings.Join(e.InstanceLocation, "/"))
			return
		}
		for _, c := range e.Causes {
			walk(c)
		}
	}
	walk(ve)
	return out
}

func obj(t *testing.T, v any, what string) map[string]any {
	t.Helper()
	m, ok := v.(map[string]any)
	if !ok {
		t.Fatalf("%s is %T, not an object", what, v)
	}
	return m
}

func arr(t *testing.T, v any, what string) []any {
	t.Helper()
	a, ok := v.([]any)
	if !ok || len(a) == 0 {
		t.Fatalf("%s is %T (len %d), not a non-empty array", what, v, len(a))
	}
	return a
}

func TestManifestSchemaOnDemoManifest(t *testing.T) {
	sch := compileManifestSchema(t)
	raw := demoManifest(t)

	if err := sch.Validate(decode(t, raw)); err != nil {
		t.Fatalf("the demo's manifest does not match the schema: %v", err)
	}

	// Each edit breaks one rule of SPEC §5 (or of the writer's closed
	// layout); the schema must reject it, and point at the edited place.
	// "/" is the manifest itself (a missing or extra member). A bad member
	// name under propertyNames is reported by the validator on the name
	// itself, so those cases look for the message instead (says).
	bad := []struct {
		name string
		at   string
		says string
		edit func(m map[string]any)
	}{
		{"missing digest", "/", "", func(m map[string]any) { delete(m, "digest") }},
		{"missing sources", "/", "", func(m map[string]any) { delete(m, "sources") }},
		{"missing created", "/", "", func(m map[string]any) { delete(m, "created") }},
		{"extra top-level member", "/", "", func(m map[string]any) { m["comment"] = "hand-edited" }},
		{"digest 63 hex digits", "/digest", "", func(m map[string]any) { m["digest"] = strings.Repeat("a", 63) }},
		{"config_sha256 not hex", "/config_sha256", "", func(m map[string]any) { m["config_sha256"] = strings.Repeat("g", 64) }},
		{"config_sha256 upper case", "/config_sha256", "", func(m map[string]any) { m["config_sha256"] = strings.Repeat("A", 64) }},
		{"source sha256 too long", "/sources/0/sha256", "", func(m map[string]any) {
			obj(t, arr(t, m["sources"], "sources")[0], "source")["sha256"] = strings.Repeat("0", 65)
		}},
		{"file sha256 empty", "/files/0/sha256", "", func(m map[string]any) {
			obj(t, arr(t, m["files"], "files")[0], "file")["sha256"] = ""
		}},
		{"created not RFC 3339", "/created", "", func(m map[string]any) { m["created"] = "2026-12-01 03:04:05" }},
		{"created impossible date", "/created", "", func(m map[string]any) { m["created"] = "2026-13-45T03:04:05Z" }},
		{"version with a slash", "/version", "", func(m map[string]any) { m["version"] = "a/b" }},
		{"version ..", "/version", "", func(m map[string]any) { m["version"] = ".." }},
		{"version of 65 characters", "/version", "", func(m map[string]any) { m["version"] = strings.Repeat("v", 65) }},
		{"dataset upper case", "/dataset", "", func(m map[string]any) { m["dataset"] = "Larkspur" }},
		{"empty file", "/files/0/rows", "", func(m map[string]any) {
			obj(t, arr(t, m["files"], "files")[0], "file")["rows"] = 0
		}},
		{"file path outside the layout", "/files/0/path", "", func(m map[string]any) {
			obj(t, arr(t, m["files"], "files")[0], "file")["path"] = "frames/part-0.parquet"
		}},
		{"unknown drop reason", "", "invalid propertyName 'lost'", func(m map[string]any) {
			obj(t, obj(t, m["funnel"], "funnel")["dropped"], "funnel.dropped")["lost"] = 1
		}},
		{"funnel without a reason", "/funnel/dropped", "", func(m map[string]any) {
			delete(obj(t, obj(t, m["funnel"], "funnel")["dropped"], "funnel.dropped"), "short_episode")
		}},
		{"duplicate_of a number", "/sources/0/duplicate_of", "", func(m map[string]any) {
			obj(t, arr(t, m["sources"], "sources")[0], "source")["duplicate_of"] = 3
		}},
		{"source without incomplete", "/sources/0", "", func(m map[string]any) {
			delete(obj(t, arr(t, m["sources"], "sources")[0], "source"), "incomplete")
		}},
		{"negative std", "/stats/cart2/obs/std/0", "", func(m map[string]any) {
			s := obj(t, obj(t, obj(t, m["stats"], "stats")["cart2"], "stats.cart2")["obs"], "stats.cart2.obs")
			arr(t, s["std"], "std")[0] = -1
		}},
		{"unknown strategy in goal_offsets", "", "invalid propertyName 'nearest'", func(m map[string]any) {
			obj(t, m["goal_offsets"], "goal_offsets")["nearest"] = map[string]any{"1": 1}
		}},
		{"stage key not a sha256", "/stages/0/key", "", func(m map[string]any) {
			obj(t, arr(t, m["stages"], "stages")[0], "stage")["key"] = "ingest"
		}},
		{"split outside train/val/test", "/counts/0/split", "", func(m map[string]any) {
			obj(t, arr(t, m["counts"], "counts")[0], "count")["split"] = "holdout"
		}},
		{"config with an unknown key", "/config", "", func(m map[string]any) {
			obj(t, m["config"], "config")["partition"] = 4
		}},
		{"format 2", "/format", "", func(m map[string]any) { m["format"] = 2 }},
	}
	for _, c := range bad {
		t.Run(c.name, func(t *testing.T) {
			m := decode(t, raw)
			c.edit(m)
			err := sch.Validate(m)
			if err == nil {
				t.Fatalf("the edited manifest validates")
			}
			if c.says != "" {
				if !strings.Contains(err.Error(), c.says) {
					t.Errorf("error does not say %q: %v", c.says, err)
				}
			} else if locs := leafLocations(err); !slices.Contains(locs, c.at) {
				t.Errorf("errors at %v, want one at %s: %v", locs, c.at, err)
			}
		})
	}

	// A config with recordings (SPEC §7.1) and an embodiment's frames
	// (§7.3), as the Go config types write them, validates; a wrong align,
	// both rate and clock, or an unknown time does not.
	t.Run("recordings config", func(t *testing.T) {
		toAny := func(v any) any {
			b, err := json.Marshal(v)
			if err != nil {
				t.Fatal(err)
			}
			x, err := jsonschema.UnmarshalJSON(bytes.NewReader(b))
			if err != nil {
				t.Fatal(err)
			}
			return x
		}
		age := pipeline.Duration(150 * time.Millisecond)
		rec := &pipeline.RecordingsConfig{Unit: pipeline.IdentityRule{Metadata: "robot", Key: "unit"},
			Embodiment: pipeline.IdentityRule{Path: `^fleet/([^/]+)/`}, Time: "log_time"}
		frames := &pipeline.FramesConfig{Rate: 10, MaxAge: age,
			Obs:     []pipeline.FieldSource{{Topic: "/arm/joints", Field: "position", Align: pipeline.AlignHold, MaxAge: age}},
			Act:     []pipeline.FieldSource{{Topic: "/arm/cmd", Field: "velocity", Align: pipeline.AlignNext, MaxAge: age}},
			Cameras: map[string]pipeline.FieldSource{"wrist": {Topic: "/wrist/image", Field: "data", Align: pipeline.AlignNearest, MaxAge: age}},
			Events:  &pipeline.FieldRef{Topic: "/session/event", Field: "kind"}}
		with := func(edit func(rec, frames map[string]any)) map[string]any {
			m := decode(t, raw)
			cfg := obj(t, m["config"], "config")
			r, f := obj(t, toAny(rec), "recordings"), obj(t, toAny(frames), "frames")
			edit(r, f)
			cfg["recordings"] = r
			obj(t, obj(t, cfg["embodiments"], "embodiments")["cart2"], "cart2")["frames"] = f
			return m
		}
		if err := sch.Validate(with(func(_, _ map[string]any) {})); err != nil {
			t.Errorf("a manifest with recordings and frames does not validate: %v", err)
		}
		for name, edit := range map[string]func(rec, frames map[string]any){
			"align cubic": func(_, f map[string]any) {
				arr(t, f["obs"], "obs")[0].(map[string]any)["align"] = "cubic"
			},
			"rate and clock":         func(_, f map[string]any) { f["clock"] = "/arm/joints" },
			"neither rate nor clock": func(_, f map[string]any) { delete(f, "rate") },
			"time wall":              func(r, _ map[string]any) { r["time"] = "wall" },
			"unit by path and key":   func(r, _ map[string]any) { obj(t, r["unit"], "unit")["path"] = "^(.*)$" },
		} {
			if err := sch.Validate(with(edit)); err == nil {
				t.Errorf("%s: the edited manifest validates", name)
			}
		}
	})

	// Optional members stay optional: a store without entity tags writes no
	// etag, and a stage record may lack its item counts.
	t.Run("optional members left out", func(t *testing.T) {
		m := decode(t, raw)
		for _, s := range arr(t, m["sources"], "sources") {
			delete(obj(t, s, "source"), "etag")
		}
		for _, s := range arr(t, m["stages"], "stages") {
			delete(obj(t, s, "stage"), "items")
			delete(obj(t, s, "stage"), "reused")
		}
		if err := sch.Validate(m); err != nil {
			t.Errorf("a manifest without the optional members does not validate: %v", err)
		}
	})
}
