package pipeline

import (
	"bufio"
	"container/heap"
	"context"
	"errors"
	"fmt"
	"io"
	"slices"
	"strings"

	"github.com/apache/arrow-go/v18/arrow"
	"github.com/apache/arrow-go/v18/arrow/array"
	"github.com/apache/arrow-go/v18/arrow/ipc"
	"github.com/apache/arrow-go/v18/arrow/memory"

	"hindcast/schemas"
)

// Intermediates between stages are Arrow IPC streams: a columnar format any
// Arrow tool can open when a stage's output needs looking at, read and written
// in record batches so no stage holds more than a batch per open stream.

// batchRows bounds one record batch. Frames carry no camera bytes (only
// where they are, see ImageWriter), so a batch of frames is a few hundred
// bytes a row, and a merge of up to maxFanIn (64) streams holds a batch of
// each.
const batchRows = 1024

// readBuffer is the read-ahead of one intermediate stream. A merge holds
// up to maxFanIn streams open, so this and a batch bound its memory.
const readBuffer = 128 << 10

// batchStream is the part every intermediate writer shares: a record
// builder whose rows go out as one record batch at a time.
type batchStream struct {
	bw   *bufio.Writer
	w    *ipc.Writer
	b    *array.RecordBuilder
	rows int
}

func newBatchStream(w io.Writer, schema *arrow.Schema, buf int) batchStream {
	bw := bufio.NewWriterSize(w, buf)
	return batchStream{bw: bw, w: ipc.NewWriter(bw, ipcOptions(schema)...), b: array.NewRecordBuilder(memory.DefaultAllocator, schema)}
}

// flush writes the rows built so far as one record batch.
func (bs *batchStream) flush() error {
	if bs.rows == 0 {
		return nil
	}
	rec := bs.b.NewRecordBatch()
	defer rec.Release()
	bs.rows = 0
	return bs.w.Write(rec)
}

// Close flushes the last batch and ends the stream; it does not close the
// underlying writer.
func (bs *batchStream) Close() error {
	defer bs.b.Release()
	if err := bs.flush(); err != nil {
		return err
	}
	if err := bs.w.Close(); err != nil {
		return err
	}
	return bs.bw.Flush()
}

// FrameWriter appends frames to an Arrow IPC stream.
type FrameWriter struct {
	batchStream
	total int64

	unit, emb, src, task, episode *array.StringBuilder
	t, line                       *array.Int64Builder
	obs, act, imgRef              *array.ListBuilder
	obsV, actV                    floatBuilder
	imgRefV, imgObj               *array.StringBuilder
	imgOff, imgLen                *array.ListBuilder
	imgOffV, imgLenV              *array.Int64Builder
	ev                            *array.Int8Builder
	success, last                 *array.BooleanBuilder
	step                          *array.Int32Builder
}

// floatBuilder appends float64 values to a float32 or float64 list child.
type floatBuilder struct {
	b32 *array.Float32Builder
	b64 *array.Float64Builder
}

func newFloatBuilder(b array.Builder) floatBuilder {
	if b32, ok := b.(*array.Float32Builder); ok {
		return floatBuilder{b32: b32}
	}
	return floatBuilder{b64: b.(*array.Float64Builder)}
}

func (fb floatBuilder) AppendValues(v []float64, _ []bool) {
	if fb.b64 != nil {
		fb.b64.AppendValues(v, nil)
		return
	}
	fb.b32.Reserve(len(v))
	for _, x := range v {
		fb.b32.UnsafeAppend(float32(x))
	}
}

// floatValues reads a float32 or float64 list child as float64.
type floatValues struct {
	v32 []float32
	v64 []float64
}

func newFloatValues(a arrow.Array) floatValues {
	if a32, ok := a.(*array.Float32); ok {
		return floatValues{v32: a32.Float32Values()}
	}
	return floatValues{v64: a.(*array.Float64).Float64Values()}
}

func (fv floatValues) appendTo(dst []float64, s, e int64) []float64 {
	if fv.v64 != nil {
		return append(dst, fv.v64[s:e]...)
	}
	for _, x := range fv.v32[s:e] {
		dst = append(dst, float64(x))
	}
	return dst
}

// ipcOptions compress every buffer with LZ4 frames: the strings (unit,
// source, episode ids) repeat row after row and shrink many times over,
// and writing fewer bytes is cheaper than compressing them.
func ipcOptions(schema *arrow.Schema) []ipc.Option {
	return []ipc.Option{ipc.WithSchema(schema), ipc.WithLZ4()}
}

// NewFrameWriter starts a frame stream on w; f32 stores vectors as float32.
func NewFrameWriter(w io.Writer, f32 bool) *FrameWriter {
	fw := &FrameWriter{batchStream: newBatchStream(w, schemas.FrameArrow(f32), 1<<20)}
	b := fw.b
	fw.unit = b.Field(0).(*array.StringBuilder)
	fw.emb = b.Field(1).(*array.StringBuilder)
	fw.t = b.Field(2).(*array.Int64Builder)
	fw.src = b.Field(3).(*array.StringBuilder)
	fw.line = b.Field(4).(*array.Int64Builder)
	fw.obs = b.Field(5).(*array.ListBuilder)
	fw.obsV = newFloatBuilder(fw.obs.ValueBuilder())
	fw.act = b.Field(6).(*array.ListBuilder)
	fw.actV = newFloatBuilder(fw.act.ValueBuilder())
	fw.ev = b.Field(7).(*array.Int8Builder)
	fw.task = b.Field(8).(*array.StringBuilder)
	fw.success = b.Field(9).(*array.BooleanBuilder)
	fw.imgRef = b.Field(10).(*array.ListBuilder)
	fw.imgRefV = fw.imgRef.ValueBuilder().(*array.StringBuilder)
	fw.imgObj = b.Field(11).(*array.StringBuilder)
	fw.imgOff = b.Field(12).(*array.ListBuilder)
	fw.imgOffV = fw.imgOff.ValueBuilder().(*array.Int64Builder)
	fw.imgLen = b.Field(13).(*array.ListBuilder)
	fw.imgLenV = fw.imgLen.ValueBuilder().(*array.Int64Builder)
	fw.episode = b.Field(14).(*array.StringBuilder)
	fw.step = b.Field(15).(*array.Int32Builder)
	fw.last = b.Field(16).(*array.BooleanBuilder)
	return fw
}

// ErrImagesInFrame is returned by FrameWriter.Write for a frame that holds
// camera bytes instead of their place in the work area (ImageWriter).
var ErrImagesInFrame = errors.New("frame holds camera bytes; intermediates carry only where they are (ImageWriter)")

// Write appends one frame. A frame with camera bytes must have them stored
// first (ImageWriter.Put): the stream carries only f.ImgObj and f.ImgAt.
func (fw *FrameWriter) Write(f *schemas.Frame) error {
	if len(f.Img) > 0 {
		return ErrImagesInFrame
	}
	fw.unit.Append(f.Unit)
	fw.emb.Append(f.Embodiment)
	fw.t.Append(f.T)
	fw.src.Append(f.Src)
	fw.line.Append(f.Line)
	fw.obs.Append(true)
	fw.obsV.AppendValues(f.Obs, nil)
	if f.HasAct {
		fw.act.Append(true)
		fw.actV.AppendValues(f.Act, nil)
	} else {
		fw.act.AppendNull()
	}
	fw.ev.Append(int8(f.Ev))
	if f.HasTask {
		fw.task.Append(f.Task)
	} else {
		fw.task.AppendNull()
	}
	if f.HasSuccess {
		fw.success.Append(f.Success)
	} else {
		fw.success.AppendNull()
	}
	fw.imgRef.Append(true)
	for _, r := range f.ImgRef {
		fw.imgRefV.Append(r)
	}
	fw.imgObj.Append(f.ImgObj)
	fw.imgOff.Append(true)
	fw.imgLen.Append(true)
	for _, at := range f.ImgAt {
		fw.imgOffV.Append(at.Off)
		fw.imgLenV.Append(at.Len)
	}
	fw.episode.Append(f.Episode)
	fw.step.Append(f.Step)
	fw.last.Append(f.Last)
	fw.rows++
	fw.total++
	if fw.rows >= batchRows {
		return fw.flush()
	}
	return nil
}

// Rows is the number of frames written so far.
func (fw *FrameWriter) Rows() int64 { return fw.total }

// FrameReader reads frames from an Arrow IPC stream one at a time.
type FrameReader struct {
	r   *ipc.Reader
	rec arrow.RecordBatch
	i   int
	n   int
	err error

	unit, emb, src, task, episode *array.String
	t, line                       *array.Int64
	obs, act, imgRef              *array.List
	obsV, actV                    floatValues
	imgRefV, imgObj               *array.String
	imgOff, imgLen                *array.List
	imgOffV, imgLenV              *array.Int64
	ev                            *array.Int8
	success, last                 *array.Boolean
	step                          *array.Int32
}

// NewFrameReader starts reading a frame stream.
func NewFrameReader(r io.Reader) (*FrameReader, error) {
	ir, err := ipc.NewReader(bufio.NewReaderSize(r, readBuffer))
	if err != nil {
		return nil, err
	}
	return &FrameReader{r: ir}, nil
}

// Next reads the next frame into f (reusing its slices); it returns false at
// the end of the stream or on an error (see Err).
func (fr *FrameReader) Next(f *schemas.Frame) bool {
	if fr.err != nil {
		return false
	}
	for fr.i >= fr.n {
		if !fr.r.Next() {
			return false
		}
		fr.bind(fr.r.RecordBatch())
	}
	i := fr.i
	fr.i++
	f.Unit = sameOrClone(f.Unit, fr.unit.Value(i))
	f.Embodiment = sameOrClone(f.Embodiment, fr.emb.Value(i))
	f.T = fr.t.Value(i)
	f.Src = sameOrClone(f.Src, fr.src.Value(i))
	f.Line = fr.line.Value(i)
	s, e := fr.obs.ValueOffsets(i)
	f.Obs = fr.obsV.appendTo(f.Obs[:0], s, e)
	f.HasAct = fr.act.IsValid(i)
	f.Act = f.Act[:0]
	if f.HasAct {
		s, e = fr.act.ValueOffsets(i)
		f.Act = fr.actV.appendTo(f.Act, s, e)
	}
	f.Ev = schemas.Event(fr.ev.Value(i))
	f.HasTask = fr.task.IsValid(i)
	f.Task = ""
	if f.HasTask {
		f.Task = sameOrClone(f.Task, fr.task.Value(i))
	}
	f.HasSuccess = fr.success.IsValid(i)
	f.Success = f.HasSuccess && fr.success.Value(i)
	s, e = fr.imgRef.ValueOffsets(i)
	f.ImgRef = f.ImgRef[:0]
	for j := s; j < e; j++ {
		f.ImgRef = append(f.ImgRef, strings.Clone(fr.imgRefV.Value(int(j))))
	}
	f.Img = f.Img[:0]
	f.ImgObj = sameOrClone(f.ImgObj, fr.imgObj.Value(i))
	s, e = fr.imgOff.ValueOffsets(i)
	f.ImgAt = f.ImgAt[:0]
	offs, lens := fr.imgOffV.Int64Values(), fr.imgLenV.Int64Values()
	ls, le := fr.imgLen.ValueOffsets(i)
	if le-ls != e-s {
		// A stream this package wrote always pairs them.
		fr.err = fmt.Errorf("frame %d: %d image offsets but %d lengths", i, e-s, le-ls)
		return false
	}
	for j := int64(0); j < e-s; j++ {
		f.ImgAt = append(f.ImgAt, schemas.ImageAt{Off: offs[s+j], Len: lens[ls+j]})
	}
	f.Episode = sameOrClone(f.Episode, fr.episode.Value(i))
	f.Step = fr.step.Value(i)
	f.Last = fr.last.Value(i)
	return true
}

// sameOrClone returns old when it already holds v (the common case: the unit
// repeats row after row) and a copy of v otherwise, so frames never point into
// a record batch that the reader is about to drop.
func sameOrClone(old, v string) string {
	if old == v {
		return old
	}
	return strings.Clone(v)
}

func (fr *FrameReader) bind(rec arrow.RecordBatch) {
	fr.rec = rec
	fr.i, fr.n = 0, int(rec.NumRows())
	fr.unit = rec.Column(0).(*array.String)
	fr.emb = rec.Column(1).(*array.String)
	fr.t = rec.Column(2).(*array.Int64)
	fr.src = rec.Column(3).(*array.String)
	fr.line = rec.Column(4).(*array.Int64)
	fr.obs = rec.Column(5).(*array.List)
	fr.obsV = newFloatValues(fr.obs.ListValues())
	fr.act = rec.Column(6).(*array.List)
	fr.actV = newFloatValues(fr.act.ListValues())
	fr.ev = rec.Column(7).(*array.Int8)
	fr.task = rec.Column(8).(*array.String)
	fr.success = rec.Column(9).(*array.Boolean)
	fr.imgRef = rec.Column(10).(*array.List)
	fr.imgRefV = fr.imgRef.ListValues().(*array.String)
	fr.imgObj = rec.Column(11).(*array.String)
	fr.imgOff = rec.Column(12).(*array.List)
	fr.imgOffV = fr.imgOff.ListValues().(*array.Int64)
	fr.imgLen = rec.Column(13).(*array.List)
	fr.imgLenV = fr.imgLen.ListValues().(*array.Int64)
	fr.episode = rec.Column(14).(*array.String)
	fr.step = rec.Column(15).(*array.Int32)
	fr.last = rec.Column(16).(*array.Boolean)
}

// Err is the first read error, if any.
func (fr *FrameReader) Err() error {
	if fr.err != nil {
		return fr.err
	}
	return fr.r.Err()
}

// Release frees the reader's buffers.
func (fr *FrameReader) Release() { fr.r.Release() }

// ImageWriter appends the camera bytes of an ingest item's frames to one
// work object, as they are: JPEG and PNG are compressed already, so a
// general-purpose codec would only cost time. Frames then carry where their
// bytes are (Frame.ImgObj, Frame.ImgAt) through every stage up to pack,
// which reads them back (ImageReader): each camera byte is written once
// and read once in the work area, whatever stages lie between.
type ImageWriter struct {
	ctx   context.Context
	store Store
	key   string
	up    Upload
	bw    *bufio.Writer
	n     int64
}

// NewImageWriter returns a writer of the image object key; the object is
// created at the first image.
func NewImageWriter(ctx context.Context, store Store, key string) *ImageWriter {
	return &ImageWriter{ctx: ctx, store: store, key: key}
}

// Put appends f's images, records where they are in f.ImgObj and f.ImgAt,
// and empties f.Img (the bytes may be reused by the caller afterwards).
func (w *ImageWriter) Put(f *schemas.Frame) error {
	f.ImgAt = f.ImgAt[:0]
	f.ImgObj = ""
	if len(f.Img) == 0 {
		return nil
	}
	if w.up == nil {
		up, err := w.store.Create(w.ctx, w.key)
		if err != nil {
			return err
		}
		w.up, w.bw = up, bufio.NewWriterSize(up, 1<<20)
	}
	for _, b := range f.Img {
		var err error
		if len(b) >= imageDirect {
			// A camera frame goes to the object as it is, without a
			// copy through the buffer.
			if err = w.bw.Flush(); err == nil {
				_, err = w.up.Write(b)
			}
		} else {
			_, err = w.bw.Write(b)
		}
		if err != nil {
			return fmt.Errorf("write %s: %w", w.key, err)
		}
		f.ImgAt = append(f.ImgAt, schemas.ImageAt{Off: w.n, Len: int64(len(b))})
		w.n += int64(len(b))
	}
	f.ImgObj = w.key
	f.Img = f.Img[:0]
	return nil
}

// Commit publishes the object, if any image was put.
func (w *ImageWriter) Commit() error {
	if w.up == nil {
		return nil
	}
	if err := w.bw.Flush(); err != nil {
		return fmt.Errorf("write %s: %w", w.key, err)
	}
	up := w.up
	w.up = nil
	return up.Commit(false)
}

// Abort drops an object not committed; after Commit it does nothing.
func (w *ImageWriter) Abort() {
	if w.up != nil {
		w.up.Abort()
		w.up = nil
	}
}

// maxOpenImages bounds the image objects an ImageReader keeps open, and
// imageSkip the gap it reads through rather than reopening the object.
const (
	maxOpenImages = 4
	imageSkip     = 1 << 20
	imageBuffer   = 256 << 10
	// imageDirect is the image size from which an image is written and
	// read without a copy through a buffer (one system call each).
	imageDirect = 16 << 10
)

// ImageReader reads frames' camera bytes back from the objects an
// ImageWriter wrote. Frames come back in about the order they were written
// (an episode is one unit's frames in time order, most often from one
// object), so it keeps a few objects open at their read position, reads
// through short gaps and reopens at the offset (a ranged read) for a jump
// back or a long one.
type ImageReader struct {
	ctx   context.Context
	store Store
	open  []*openImages
	clock uint64
}

type openImages struct {
	key  string
	rc   io.ReadCloser
	br   *bufio.Reader
	pos  int64
	used uint64
}

// NewImageReader reads image objects of store.
func NewImageReader(ctx context.Context, store Store) *ImageReader {
	return &ImageReader{ctx: ctx, store: store}
}

// Load reads f's images into f.Img (reusing its buffers) from f.ImgObj at
// f.ImgAt.
func (r *ImageReader) Load(f *schemas.Frame) error {
	f.Img = f.Img[:0]
	for _, at := range f.ImgAt {
		var b []byte
		if len(f.Img) < cap(f.Img) {
			b = f.Img[: len(f.Img)+1 : cap(f.Img)][len(f.Img)][:0]
		}
		b = slices.Grow(b, int(at.Len))[:at.Len]
		if err := r.read(f.ImgObj, at.Off, b); err != nil {
			return err
		}
		f.Img = append(f.Img, b)
	}
	return nil
}

func (r *ImageReader) read(key string, off int64, dst []byte) error {
	r.clock++
	var o *openImages
	for _, c := range r.open {
		if c.key == key {
			o = c
			break
		}
	}
	if o != nil && (off < o.pos || off-o.pos > imageSkip) {
		o.rc.Close()
		o.rc = nil
	}
	if o == nil {
		if len(r.open) == maxOpenImages {
			lru := 0
			for i, c := range r.open {
				if c.used < r.open[lru].used {
					lru = i
				}
			}
			if r.open[lru].rc != nil {
				r.open[lru].rc.Close()
			}
			r.open = slices.Delete(r.open, lru, lru+1)
		}
		o = &openImages{key: key}
		r.open = append(r.open, o)
	}
	o.used = r.clock
	if o.rc == nil {
		rc, err := r.store.Open(r.ctx, key, off)
		if err != nil {
			return fmt.Errorf("read images %s at %d: %w", key, off, err)
		}
		o.rc, o.pos = rc, off
		if o.br == nil {
			o.br = bufio.NewReaderSize(rc, imageBuffer)
		} else {
			o.br.Reset(rc)
		}
	}
	if _, err := o.br.Discard(int(off - o.pos)); err != nil {
		return fmt.Errorf("read images %s at %d: %w", key, off, err)
	}
	o.pos = off
	var src io.Reader = o.br
	if len(dst) >= imageDirect && o.br.Buffered() == 0 {
		src = o.rc
	}
	n, err := io.ReadFull(src, dst)
	o.pos += int64(n)
	if err != nil {
		return fmt.Errorf("read images %s at %d (%d bytes): %w", key, off, len(dst), err)
	}
	return nil
}

// Close closes the objects still open.
func (r *ImageReader) Close() {
	for _, o := range r.open {
		if o.rc != nil {
			o.rc.Close()
		}
	}
	r.open = nil
}

// GoalWriter appends goals to an Arrow IPC stream.
type GoalWriter struct {
	batchStream

	episode, goalEpisode    *array.StringBuilder
	step, goalStep, goalOff *array.Int32Builder
	strategy                *array.Int8Builder
	goal                    *array.ListBuilder
	goalV                   *array.Float64Builder
	reward                  *array.Float32Builder
}

// NewGoalWriter starts a goal stream on w.
func NewGoalWriter(w io.Writer) *GoalWriter {
	gw := &GoalWriter{batchStream: newBatchStream(w, schemas.GoalArrow(), 1<<20)}
	b := gw.b
	gw.episode = b.Field(0).(*array.StringBuilder)
	gw.step = b.Field(1).(*array.Int32Builder)
	gw.strategy = b.Field(2).(*array.Int8Builder)
	gw.goalEpisode = b.Field(3).(*array.StringBuilder)
	gw.goalStep = b.Field(4).(*array.Int32Builder)
	gw.goalOff = b.Field(5).(*array.Int32Builder)
	gw.goal = b.Field(6).(*array.ListBuilder)
	gw.goalV = gw.goal.ValueBuilder().(*array.Float64Builder)
	gw.reward = b.Field(7).(*array.Float32Builder)
	return gw
}

// Write appends one goal.
func (gw *GoalWriter) Write(g *schemas.Goal) error {
	gw.episode.Append(g.Episode)
	gw.step.Append(g.Step)
	gw.strategy.Append(int8(g.Strategy))
	gw.goalEpisode.Append(g.GoalEpisode)
	gw.goalStep.Append(g.GoalStep)
	gw.goalOff.Append(g.GoalOffset)
	if g.Strategy == schemas.Negative {
		gw.goal.Append(true)
		gw.goalV.AppendValues(g.Goal, nil)
	} else {
		gw.goal.AppendNull()
	}
	gw.reward.Append(g.Reward)
	gw.rows++
	if gw.rows >= 16*batchRows {
		return gw.flush()
	}
	return nil
}

// GoalReader reads goals from an Arrow IPC stream one at a time.
type GoalReader struct {
	r    *ipc.Reader
	i, n int

	episode, goalEpisode    *array.String
	step, goalStep, goalOff *array.Int32
	strategy                *array.Int8
	goal                    *array.List
	goalV                   *array.Float64
	reward                  *array.Float32
}

// NewGoalReader starts reading a goal stream.
func NewGoalReader(r io.Reader) (*GoalReader, error) {
	ir, err := ipc.NewReader(bufio.NewReaderSize(r, readBuffer), ipc.WithSchema(schemas.GoalArrow()))
	if err != nil {
		return nil, err
	}
	return &GoalReader{r: ir}, nil
}

// Next reads the next goal into g; false at the end or on error (see Err).
// g.Goal is filled for negatives only (see schemas.GoalArrow).
func (gr *GoalReader) Next(g *schemas.Goal) bool {
	for gr.i >= gr.n {
		if !gr.r.Next() {
			return false
		}
		rec := gr.r.RecordBatch()
		gr.i, gr.n = 0, int(rec.NumRows())
		gr.episode = rec.Column(0).(*array.String)
		gr.step = rec.Column(1).(*array.Int32)
		gr.strategy = rec.Column(2).(*array.Int8)
		gr.goalEpisode = rec.Column(3).(*array.String)
		gr.goalStep = rec.Column(4).(*array.Int32)
		gr.goalOff = rec.Column(5).(*array.Int32)
		gr.goal = rec.Column(6).(*array.List)
		gr.goalV = gr.goal.ListValues().(*array.Float64)
		gr.reward = rec.Column(7).(*array.Float32)
	}
	i := gr.i
	gr.i++
	g.Episode = sameOrClone(g.Episode, gr.episode.Value(i))
	g.Step = gr.step.Value(i)
	g.Strategy = schemas.Strategy(gr.strategy.Value(i))
	g.GoalEpisode = sameOrClone(g.GoalEpisode, gr.goalEpisode.Value(i))
	g.GoalStep = gr.goalStep.Value(i)
	g.GoalOffset = gr.goalOff.Value(i)
	s, e := gr.goal.ValueOffsets(i)
	g.Goal = append(g.Goal[:0], gr.goalV.Float64Values()[s:e]...)
	g.Reward = gr.reward.Value(i)
	return true
}

// Err is the first read error, if any.
func (gr *GoalReader) Err() error { return gr.r.Err() }

// Release frees the reader's buffers.
func (gr *GoalReader) Release() { gr.r.Release() }

// OpenFrames opens a frame stream stored at key.
func OpenFrames(ctx context.Context, s Store, key string) (*FrameReader, io.Closer, error) {
	rc, err := s.Open(ctx, key, 0)
	if err != nil {
		return nil, nil, err
	}
	fr, err := NewFrameReader(rc)
	if err != nil {
		rc.Close()
		return nil, nil, fmt.Errorf("read frames %s: %w", JoinURI(s.URI(), key), err)
	}
	return fr, rc, nil
}

// FrameSource is anything that yields frames in order: a FrameReader, or a
// merge of several.
type FrameSource interface {
	Next(f *schemas.Frame) bool
	Err() error
}

// Merge yields the frames of several sources, each already sorted by less,
// as one sorted sequence. Ties go to the source listed first, so a merge is
// stable and its output does not depend on timing.
type Merge struct {
	h    mergeHeap
	err  error
	init bool
}

// NewMerge merges srcs by less.
func NewMerge(less func(a, b *schemas.Frame) bool, srcs ...FrameSource) *Merge {
	m := &Merge{h: mergeHeap{less: less}}
	for i, s := range srcs {
		m.h.items = append(m.h.items, &mergeItem{src: s, idx: i})
	}
	return m
}

type mergeItem struct {
	src FrameSource
	idx int
	f   schemas.Frame
}

type mergeHeap struct {
	items []*mergeItem
	less  func(a, b *schemas.Frame) bool
}

func (h *mergeHeap) Len() int { return len(h.items) }
func (h *mergeHeap) Less(i, j int) bool {
	a, b := h.items[i], h.items[j]
	if h.less(&a.f, &b.f) {
		return true
	}
	if h.less(&b.f, &a.f) {
		return false
	}
	return a.idx < b.idx
}
func (h *mergeHeap) Swap(i, j int) { h.items[i], h.items[j] = h.items[j], h.items[i] }
func (h *mergeHeap) Push(x any)    { h.items = append(h.items, x.(*mergeItem)) }
func (h *mergeHeap) Pop() any {
	it := h.items[len(h.items)-1]
	h.items = h.items[:len(h.items)-1]
	return it
}

// Next implements FrameSource.
func (m *Merge) Next(f *schemas.Frame) bool {
	if m.err != nil {
		return false
	}
	if !m.init {
		m.init = true
		live := m.h.items[:0]
		for _, it := range m.h.items {
			if it.src.Next(&it.f) {
				live = append(live, it)
			} else if err := it.src.Err(); err != nil {
				m.err = err
				return false
			}
		}
		m.h.items = live
		heap.Init(&m.h)
	}
	if len(m.h.items) == 0 {
		return false
	}
	top := m.h.items[0]
	// Hand the frame over by swapping buffers, so neither side copies vectors.
	*f, top.f = top.f, *f
	if top.src.Next(&top.f) {
		heap.Fix(&m.h, 0)
	} else {
		if err := top.src.Err(); err != nil {
			m.err = err
			return false
		}
		heap.Pop(&m.h)
	}
	return true
}

// Err implements FrameSource.
func (m *Merge) Err() error { return m.err }

// DroppedWriter appends dropped lines to an Arrow IPC stream.
type DroppedWriter struct {
	batchStream
}

// NewDroppedWriter starts a quarantine stream on w.
func NewDroppedWriter(w io.Writer) *DroppedWriter {
	return &DroppedWriter{batchStream: newBatchStream(w, schemas.DroppedArrow(), 256<<10)}
}

// Write appends one dropped line.
func (dw *DroppedWriter) Write(d *schemas.Dropped) error {
	dw.b.Field(0).(*array.StringBuilder).Append(d.Src)
	dw.b.Field(1).(*array.Int64Builder).Append(d.SrcLine)
	dw.b.Field(2).(*array.StringBuilder).Append(d.Reason)
	dw.b.Field(3).(*array.StringBuilder).Append(d.Stage)
	if d.Unit != "" {
		dw.b.Field(4).(*array.StringBuilder).Append(d.Unit)
	} else {
		dw.b.Field(4).AppendNull()
	}
	if d.HasT {
		dw.b.Field(5).(*array.Int64Builder).Append(d.T)
	} else {
		dw.b.Field(5).AppendNull()
	}
	if d.Line != nil {
		dw.b.Field(6).(*array.BinaryBuilder).Append(d.Line)
	} else {
		dw.b.Field(6).AppendNull()
	}
	dw.rows++
	if dw.rows >= batchRows {
		return dw.flush()
	}
	return nil
}

// ReadDropped calls fn for every dropped line of the stream at key, in order.
func ReadDropped(ctx context.Context, s Store, key string, fn func(*schemas.Dropped) error) error {
	rc, err := s.Open(ctx, key, 0)
	if err != nil {
		return err
	}
	defer rc.Close()
	r, err := ipc.NewReader(bufio.NewReaderSize(rc, readBuffer), ipc.WithSchema(schemas.DroppedArrow()))
	if err != nil {
		return fmt.Errorf("read quarantine %s: %w", JoinURI(s.URI(), key), err)
	}
	defer r.Release()
	var d schemas.Dropped
	for r.Next() {
		rec := r.RecordBatch()
		src := rec.Column(0).(*array.String)
		line := rec.Column(1).(*array.Int64)
		reason := rec.Column(2).(*array.String)
		stage := rec.Column(3).(*array.String)
		unit := rec.Column(4).(*array.String)
		t := rec.Column(5).(*array.Int64)
		raw := rec.Column(6).(*array.Binary)
		for i := 0; i < int(rec.NumRows()); i++ {
			d = schemas.Dropped{Src: src.Value(i), SrcLine: line.Value(i), Reason: reason.Value(i), Stage: stage.Value(i)}
			if unit.IsValid(i) {
				d.Unit = unit.Value(i)
			}
			if t.IsValid(i) {
				d.T, d.HasT = t.Value(i), true
			}
			if raw.IsValid(i) {
				d.Line = append([]byte{}, raw.Value(i)...)
			}
			if err := fn(&d); err != nil {
				return err
			}
		}
	}
	if err := r.Err(); err != nil {
		return fmt.Errorf("read quarantine %s: %w", JoinURI(s.URI(), key), err)
	}
	return nil
}
