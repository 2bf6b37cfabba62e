package schemas_test

import (
	"encoding/json"
	"slices"
	"testing"

	"hindcast/pipeline"
	"hindcast/schemas"
)

// TestManifestSchemaReasonsMatchTheList holds the manifest schema's reason
// and skip-reason enums (and the lists of members the funnel must carry) to
// the one Go list they come from, pipeline.ReasonDefs and
// pipeline.SkipReasons, in order: a reason added in Go and forgotten in the
// schema (or the other way round) fails here.
func TestManifestSchemaReasonsMatchTheList(t *testing.T) {
	var doc struct {
		Defs struct {
			Reason     struct{ Enum []string } `json:"reason"`
			SkipReason struct{ Enum []string } `json:"skipReason"`
			Funnel     struct {
				Properties struct {
					Dropped        struct{ Required []string } `json:"dropped"`
					SkippedObjects struct{ Required []string } `json:"skipped_objects"`
				} `json:"properties"`
			} `json:"funnel"`
		} `json:"$defs"`
	}
	if err := json.Unmarshal(schemas.ManifestSchema(), &doc); err != nil {
		t.Fatalf("reading the manifest schema: %v", err)
	}
	reasons, skips := pipeline.Reasons(), pipeline.SkipReasons()
	if len(reasons) != 14 || len(skips) != 3 {
		t.Fatalf("%d reasons and %d skip reasons, want 14 (SPEC §3.1: 10, §3.2: 3, §7.4 adds stale) and 3 (SPEC §7.1)", len(reasons), len(skips))
	}
	for _, c := range []struct {
		what      string
		got, want []string
	}{
		{"$defs.reason.enum", doc.Defs.Reason.Enum, reasons},
		{"funnel.dropped.required", doc.Defs.Funnel.Properties.Dropped.Required, reasons},
		{"$defs.skipReason.enum", doc.Defs.SkipReason.Enum, skips},
		{"funnel.skipped_objects.required", doc.Defs.Funnel.Properties.SkippedObjects.Required, skips},
	} {
		if !slices.Equal(c.got, c.want) {
			t.Errorf("%s = %q, want %q", c.what, c.got, c.want)
		}
	}
}
