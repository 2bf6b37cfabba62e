package mcapread

import (
	"context"
	"os"
	"testing"

	"github.com/foxglove/mcap/go/mcap"
)

// TestSpillRunsHaveNoName: while the spilled runs are merged (the callback
// runs), the scratch folder already holds no file, so a process killed at
// that moment (SIGKILL: no deferred clean-up) leaves nothing behind. The
// runs are open files without a name (POSIX unlink).
func TestSpillRunsHaveNoName(t *testing.T) {
	f := writeFile(t, 500, true, mcap.CompressionNone)
	scratch := t.TempDir()
	n := 0
	res, err := ReadOrdered(context.Background(), memSource(f), Options{SortBufferBytes: 1000, ScratchDir: scratch}, func(m *Message) error {
		if n%100 == 0 {
			ents, err := os.ReadDir(scratch)
			if err != nil {
				return err
			}
			if len(ents) != 0 {
				t.Errorf("message %d: %d named scratch files while merging, first %s", n, len(ents), ents[0].Name())
			}
		}
		n++
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	// 4-byte messages count 68 bytes each against the 1000-byte buffer:
	// about 34 runs were spilled and merged.
	if res.Messages != 500 || n != 500 {
		t.Fatalf("%d messages handed over, %d counted; want 500", n, res.Messages)
	}
}
