package pipeline

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"math/rand/v2"
	"testing"

	"hindcast/schemas"
)

// openCounter is a store that counts its Opens, to see how often an
// ImageReader goes back to the store.
type openCounter struct {
	Store
	opens int
}

func (c *openCounter) Open(ctx context.Context, key string, offset int64) (io.ReadCloser, error) {
	c.opens++
	return c.Store.Open(ctx, key, offset)
}

// imageFrames stores frames with random camera bytes (1 to 3 cameras,
// 0 to 40 KB each) through ImageWriters, spread over objs objects in
// turn, and returns the frames (bytes cleared, places set) with their
// bytes kept apart.
func imageFrames(t *testing.T, ctx context.Context, s Store, objs, n int) ([]schemas.Frame, [][][]byte) {
	t.Helper()
	rng := rand.New(rand.NewPCG(1, 2))
	ws := make([]*ImageWriter, objs)
	for i := range ws {
		ws[i] = NewImageWriter(ctx, s, fmt.Sprintf("ingest/k%d/images.bin", i))
	}
	frames := make([]schemas.Frame, n)
	want := make([][][]byte, n)
	for i := range frames {
		for range 1 + rng.IntN(3) {
			b := make([]byte, rng.IntN(40<<10))
			for j := range b {
				b[j] = byte(rng.Uint32())
			}
			want[i] = append(want[i], b)
		}
		frames[i].Img = append([][]byte(nil), want[i]...)
		if err := ws[i%objs].Put(&frames[i]); err != nil {
			t.Fatal(err)
		}
		if len(frames[i].Img) != 0 || len(frames[i].ImgAt) != len(want[i]) {
			t.Fatalf("frame %d after Put: %d images in the frame, %d places; want 0 and %d", i, len(frames[i].Img), len(frames[i].ImgAt), len(want[i]))
		}
	}
	for _, w := range ws {
		if err := w.Commit(); err != nil {
			t.Fatal(err)
		}
	}
	return frames, want
}

// TestImagesRoundTrip: camera bytes put by ImageWriter come back exactly
// from ImageReader, in the order written, shuffled, and spread over more
// objects than the reader keeps open; each object holds exactly the bytes
// put in it, one after the other.
func TestImagesRoundTrip(t *testing.T) {
	ctx := context.Background()
	s := &openCounter{Store: NewLocalStore(t.TempDir())}
	const objs, n = 6, 300
	frames, want := imageFrames(t, ctx, s, objs, n)
	for o := range objs {
		var total int64
		for i := o; i < n; i += objs {
			for j, at := range frames[i].ImgAt {
				if at.Off != total || at.Len != int64(len(want[i][j])) {
					t.Fatalf("frame %d camera %d at %+v, want offset %d length %d", i, j, at, total, len(want[i][j]))
				}
				total += at.Len
			}
		}
		info, err := s.Stat(ctx, fmt.Sprintf("ingest/k%d/images.bin", o))
		if err != nil {
			t.Fatal(err)
		}
		if info.Size != total {
			t.Errorf("object %d holds %d bytes, want the %d put in it", o, info.Size, total)
		}
	}
	check := func(name string, order []int) {
		r := NewImageReader(ctx, s)
		defer r.Close()
		var f schemas.Frame
		for _, i := range order {
			f.CopyFrom(&frames[i])
			if err := r.Load(&f); err != nil {
				t.Fatalf("%s: frame %d: %v", name, i, err)
			}
			if len(f.Img) != len(want[i]) {
				t.Fatalf("%s: frame %d: %d images, want %d", name, i, len(f.Img), len(want[i]))
			}
			for j := range want[i] {
				if !bytes.Equal(f.Img[j], want[i][j]) {
					t.Fatalf("%s: frame %d camera %d: bytes differ", name, i, j)
				}
			}
		}
	}
	// Written order, one object after the other: each object is opened
	// once and read straight through.
	var seq []int
	for o := range objs {
		for i := o; i < n; i += objs {
			seq = append(seq, i)
		}
	}
	s.opens = 0
	check("in order", seq)
	if s.opens != objs {
		t.Errorf("reading in order opened objects %d times, want %d (once each)", s.opens, objs)
	}
	// Interleaved over 6 objects with 4 kept open, and shuffled: every
	// jump is served, whatever it costs.
	all := make([]int, n)
	for i := range all {
		all[i] = i
	}
	check("interleaved", all)
	rand.New(rand.NewPCG(3, 4)).Shuffle(n, func(i, j int) { all[i], all[j] = all[j], all[i] })
	check("shuffled", all)
}

// TestFrameWriterRefusesImageBytes: intermediates carry where camera bytes
// are, never the bytes; a frame still holding them is an error, not a
// silent loss.
func TestFrameWriterRefusesImageBytes(t *testing.T) {
	var buf bytes.Buffer
	fw := NewFrameWriter(&buf, true)
	f := schemas.Frame{Unit: "u", Obs: []float64{1}, ImgRef: []string{"a.png"}, Img: [][]byte{[]byte("png")}}
	if err := fw.Write(&f); !errors.Is(err, ErrImagesInFrame) {
		t.Fatalf("Write of a frame with image bytes: %v, want ErrImagesInFrame", err)
	}
	f.Img = nil
	f.ImgObj, f.ImgAt = "ingest/k/images.bin", []schemas.ImageAt{{Off: 7, Len: 3}}
	if err := fw.Write(&f); err != nil {
		t.Fatal(err)
	}
	if err := fw.Close(); err != nil {
		t.Fatal(err)
	}
	fr, err := NewFrameReader(&buf)
	if err != nil {
		t.Fatal(err)
	}
	defer fr.Release()
	var g schemas.Frame
	if !fr.Next(&g) {
		t.Fatalf("no frame read back: %v", fr.Err())
	}
	if g.ImgObj != f.ImgObj || len(g.ImgAt) != 1 || g.ImgAt[0] != f.ImgAt[0] || len(g.Img) != 0 || len(g.ImgRef) != 1 || g.ImgRef[0] != "a.png" {
		t.Errorf("read back %q %+v %d images, refs %q; want %q %+v 0 images, refs [a.png]", g.ImgObj, g.ImgAt, len(g.Img), g.ImgRef, f.ImgObj, f.ImgAt)
	}
	if fr.Next(&g) {
		t.Errorf("a second frame read back, want one")
	}
}
