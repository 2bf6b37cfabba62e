package fleet

import (
	"bytes"
	"image/jpeg"
	"io/fs"
	"math/rand/v2"
	"os"
	"path/filepath"
	"testing"
)

// The camera pool holds valid JPEGs (decoded by image/jpeg) of 30–60 KB.
func TestBenchJPEGPool(t *testing.T) {
	pool, err := jpegPool(rand.New(rand.NewPCG(1, 0x6c61726b)), benchPoolSize)
	if err != nil {
		t.Fatal(err)
	}
	if len(pool) != benchPoolSize {
		t.Fatalf("%d frames, want %d", len(pool), benchPoolSize)
	}
	for i, b := range pool {
		if len(b) < 30<<10 || len(b) > 60<<10 {
			t.Errorf("frame %d: %d bytes, want 30–60 KB", i, len(b))
		}
		im, err := jpeg.Decode(bytes.NewReader(b))
		if err != nil || im.Bounds().Dx() != benchFrameW {
			t.Errorf("frame %d: %v", i, err)
		}
	}
}

// One benchmark recording: per-topic counts at their rates, no damaged
// message, and the same bytes on a second run.
func TestBenchRecordings(t *testing.T) {
	dir := t.TempDir()
	recs, ticks, size, err := BenchRecordings(dir, BenchRecordingOptions{Bytes: 1, Seed: 3})
	if err != nil {
		t.Fatal(err)
	}
	if recs != 1 || ticks != int64(perSecs(cameraPeriod, benchRecSecs)) {
		t.Fatalf("%d recordings, %d ticks; want 1, %d", recs, ticks, perSecs(cameraPeriod, benchRecSecs))
	}
	var files []string
	filepath.WalkDir(dir, func(p string, d fs.DirEntry, err error) error {
		if err == nil && !d.IsDir() {
			files = append(files, p)
		}
		return err
	})
	if len(files) != 1 {
		t.Fatalf("files %v", files)
	}
	data, err := os.ReadFile(files[0])
	if err != nil || int64(len(data)) != size {
		t.Fatalf("%d bytes on disk, reported %d (%v)", len(data), size, err)
	}
	rb := read(t, data)
	if rb.err != nil || len(rb.faults) != 0 || rb.behind != 0 {
		t.Fatalf("err %v, damaged %v, %d out of time order", rb.err, rb.faults, rb.behind)
	}
	want := map[string]int{
		topicJoints: perSecs(jointsPeriod, benchRecSecs), topicPose: perSecs(posePeriod, benchRecSecs),
		topicCommand: perSecs(commandPeriod, benchRecSecs), topicCamera: perSecs(cameraPeriod, benchRecSecs),
		topicEvent: 2, topicTask: 1, topicOutcome: 1,
	}
	for topic, n := range want {
		if rb.counts[topic] != n {
			t.Errorf("%d messages on %s, want %d", rb.counts[topic], topic, n)
		}
	}
	again := t.TempDir()
	if _, _, _, err := BenchRecordings(again, BenchRecordingOptions{Bytes: 1, Seed: 3}); err != nil {
		t.Fatal(err)
	}
	rel, _ := filepath.Rel(dir, files[0])
	b, err := os.ReadFile(filepath.Join(again, rel))
	if err != nil || !bytes.Equal(b, data) {
		t.Errorf("two runs differ (%v)", err)
	}
}

// BenchmarkBenchRecordings times writing one two-minute benchmark recording
// (about 29 MB), the JPEG pool encoded first included; MB/s is recording
// bytes written.
func BenchmarkBenchRecordings(b *testing.B) {
	dir := b.TempDir()
	for b.Loop() {
		_, _, n, err := BenchRecordings(dir, BenchRecordingOptions{Bytes: 1, Seed: 1})
		if err != nil {
			b.Fatal(err)
		}
		b.SetBytes(n)
	}
}
