package inspect

import (
	"bytes"
	"regexp"
	"testing"
)

// TestShowGates: show prints every gate the manifest records, with value,
// threshold and result. vfFleet keeps 25 frames and has no gates section,
// so the built-in gate alone: 25 frames, at least 1.
func TestShowGates(t *testing.T) {
	v, _ := vfBase(t)
	r := Show(v)
	if len(r.Gates) != 1 || r.Gates[0].Name != "min_frames_total" || r.Gates[0].Value != 25 || r.Gates[0].Threshold != 1 || r.Gates[0].Result != "pass" {
		t.Fatalf("gates %+v", r.Gates)
	}
	var buf bytes.Buffer
	if err := r.WriteText(&buf); err != nil {
		t.Fatal(err)
	}
	if !regexp.MustCompile(`(?m)^gates\n.*gate +value +threshold +result.*\n +min_frames_total +25 +1 +pass`).MatchString(buf.String()) {
		t.Errorf("text has no gates table:\n%s", buf.String())
	}
}
