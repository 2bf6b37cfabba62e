package recording

import (
	"context"
	"encoding/base64"
	"fmt"
	"testing"

	"hindcast/pipeline"
)

// TestCameraBuffersReusedSafely: the aligner reuses the image buffers of
// pruned messages, so every tick must still see the bytes of the message
// it takes while the callback runs. 200 camera frames of varying length at
// 10 ms from 3 ms and rate ticks at 20 Hz (hold, so each tick takes the
// frame 7 ms before it, which stays in the window after pruning): the 39
// ticks at 50, …, 1950 ms each see that frame exactly.
func TestCameraBuffersReusedSafely(t *testing.T) {
	emb := &pipeline.Embodiment{Obs: 1, Cameras: []string{"c"}, Frames: &pipeline.FramesConfig{
		Rate: 20, MaxAge: pipeline.Duration(40e6),
		Obs:     []pipeline.FieldSource{{Topic: "/o", Field: "v"}},
		Cameras: map[string]pipeline.FieldSource{"c": {Topic: "/img", Field: "data"}},
	}}
	frame := func(i int) string {
		// Lengths vary so a reused buffer of another length shows.
		return fmt.Sprintf("frame-%03d-%s", i, string(make([]byte, i%7)))
	}
	var msgs []rec
	for i := range 200 {
		tm := int64(i)*10e6 + 3e6
		msgs = append(msgs, rec{"/o", tm, fmt.Sprintf(`{"v":[%d]}`, i)})
		msgs = append(msgs, rec{"/img", tm, fmt.Sprintf(`{"data":%q}`, base64.StdEncoding.EncodeToString([]byte(frame(i))))})
	}
	var ticks, bad int
	_, err := run(context.Background(), emb, feedOf(msgs), func(k *Tick) error {
		if k.Reason != "" {
			return fmt.Errorf("tick at %d dropped as %s", k.T, k.Reason)
		}
		want := frame(int((k.T - 3e6) / 10e6))
		if len(k.Images) != 1 || string(k.Images[0]) != want {
			bad++
			if bad <= 3 {
				t.Errorf("tick at %d: image %q, want %q", k.T, k.Images, want)
			}
		}
		ticks++
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	// Rate ticks every 50 ms from the first multiple at or after 3 ms to
	// the last at or before 1993 ms (SPEC §7.3): 50, …, 1950.
	if ticks != 39 || bad != 0 {
		t.Errorf("%d ticks, %d with the wrong image; want 39 and 0", ticks, bad)
	}
}
