package stages

import (
	"bytes"
	"fmt"
	"io/fs"
	"path/filepath"
	"testing"

	"github.com/parquet-go/parquet-go"
)

// TestCameraBytesStoredOnce: ingest stores each kept frame's camera bytes
// once, as they are, in one image object per ingest item; the
// intermediates after it carry only where they are, and pack writes the
// same bytes into the frames table. Two objects of two units each, twelve
// frames a unit, two cameras (ok.png, ok.jpg) over two partitions: two
// image objects holding exactly 48 × (PNG + JPEG) bytes, and 48 rows whose
// images equal the fixtures byte for byte.
func TestCameraBytesStoredOnce(t *testing.T) {
	imgs := fixtureImages(t)
	png, jpg := imgs["frames/ok.png"], imgs["frames/ok.jpg"]
	files := map[string][]byte{"frames/ok.png": png, "frames/ok.jpg": jpg}
	const perUnit = 12
	for o, units := range [][]string{{"c1", "c2"}, {"c3", "c4"}} {
		var lines []string
		for s := range perUnit {
			for _, u := range units {
				lines = append(lines, fmt.Sprintf(`{"unit":%q,"embodiment":"cam","t":%d,"obs":[%d,0],"img":{"front":"frames/ok.png","wrist":"frames/ok.jpg"}}`,
					u, 1_000_000_000+int64(s)*1_000_000, s))
			}
		}
		files[fmt.Sprintf("o%d.jsonl", o)] = jsonLines(lines...)
	}
	r := runPipelineAt(t, `
dataset: images-once
source: {include: ["*.jsonl"]}
partitions: 2
embodiments:
  cam: {obs: 2, cameras: [front, wrist], goal_tolerance: 0.1}
episodes: {max_gap: 1s, min_steps: 2, max_steps: 100}
goals: {future: 1, geometric: 0, final: 0, negative: 0}
splits: {train: 1}
`, files)
	const frames = 2 * 2 * perUnit
	if r.Manifest.Funnel.Frames != frames {
		t.Fatalf("funnel %+v, want %d frames", r.Manifest.Funnel, frames)
	}
	work := filepath.Join(filepath.Dir(r.Source), "work")
	var objects int
	var stored int64
	err := filepath.WalkDir(filepath.Join(work, "ingest"), func(p string, d fs.DirEntry, err error) error {
		if err != nil || d.Name() != "images.bin" {
			return err
		}
		info, err := d.Info()
		if err != nil {
			return err
		}
		objects++
		stored += info.Size()
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	if want := int64(frames * (len(png) + len(jpg))); objects != 2 || stored != want {
		t.Errorf("%d image objects holding %d bytes, want 2 holding %d (each camera byte once)", objects, stored, want)
	}
	type row struct {
		Episode string `parquet:"episode"`
		Front   []byte `parquet:"img_front,optional"`
		Wrist   []byte `parquet:"img_wrist,optional"`
	}
	var rows int
	for _, f := range r.Manifest.Files {
		if f.Table != "frames" {
			continue
		}
		got, err := parquet.ReadFile[row](filepath.Join(r.Version, filepath.FromSlash(f.Path)))
		if err != nil {
			t.Fatalf("read %s: %v", f.Path, err)
		}
		for i, g := range got {
			if !bytes.Equal(g.Front, png) || !bytes.Equal(g.Wrist, jpg) {
				t.Fatalf("%s row %d (%s): front %d bytes, wrist %d bytes; want ok.png (%d) and ok.jpg (%d)", f.Path, i, g.Episode, len(g.Front), len(g.Wrist), len(png), len(jpg))
			}
		}
		rows += len(got)
	}
	if rows != frames {
		t.Errorf("%d frame rows, want %d", rows, frames)
	}
}
