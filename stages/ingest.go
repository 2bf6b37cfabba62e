package stages

import (
	"bufio"
	"bytes"
	"compress/gzip"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"fmt"
	"hash"
	"io"
	"slices"
	"strings"

	"github.com/klauspost/compress/zstd"

	"hindcast/pipeline"
	"hindcast/schemas"
	"hindcast/stages/jsonl"
)

// Ingest reads each source object once, decides for every line whether it is
// kept (SPEC §3.1), and writes the kept frames as runs sorted by (unit, t),
// one set per partition, so the episodes stage only merges.
type Ingest struct{}

// Name implements pipeline.Stage.
func (Ingest) Name() string { return "ingest" }

// ingestEmbodiment is the part of an embodiment that decides acceptance.
type ingestEmbodiment struct {
	Obs     int       `json:"obs"`
	Act     int       `json:"act"`
	ObsLow  []float64 `json:"obs_low"`
	ObsHigh []float64 `json:"obs_high"`
	ActLow  []float64 `json:"act_low"`
	ActHigh []float64 `json:"act_high"`
	Cameras []string  `json:"cameras"`
	// Frames decides how a recording's topics become frames (SPEC §7.3).
	Frames *pipeline.FramesConfig `json:"frames,omitempty"`
}

// Reads implements pipeline.Stage: what decides which lines are kept, how
// values are rounded and how frames are spread over partitions.
func (Ingest) Reads(cfg *pipeline.Config) any {
	embs := map[string]ingestEmbodiment{}
	for name, e := range cfg.Embodiments {
		embs[name] = ingestEmbodiment{e.Obs, e.Act, e.ObsLow, e.ObsHigh, e.ActLow, e.ActHigh, e.Cameras, e.Frames}
	}
	return map[string]any{
		"recordings":      cfg.Recordings,
		"image_roots":     cfg.Source.ImageRoots,
		"max_image_bytes": cfg.Source.MaxImageBytes,
		"max_line_bytes":  cfg.Source.MaxLineBytes,
		"embodiments":     embs,
		"float":           cfg.Float,
		"partitions":      cfg.Partitions,
		"quarantine":      cfg.Quarantine,
	}
}

// Items implements pipeline.Stage: one item per selected object, keyed by the
// object's identity (key, size, ETag) so an unchanged object is never reread.
func (Ingest) Items(ctx context.Context, env *pipeline.Env, ckey string, _ map[string][]pipeline.Sealed) ([]pipeline.Item, error) {
	objs, err := ListSource(ctx, env)
	if err != nil {
		return nil, err
	}
	items := make([]pipeline.Item, len(objs))
	for i, o := range objs {
		items[i] = pipeline.Item{ID: o.Key, Key: pipeline.HashParts(ckey, o.Key, o.Size, o.ETag), Bytes: o.Size, Meta: o}
	}
	return items, nil
}

// ListSource lists the source objects selected by include and exclude, in
// byte order of their keys.
func ListSource(ctx context.Context, env *pipeline.Env) ([]pipeline.ObjectInfo, error) {
	src := env.Config.Source
	var objs []pipeline.ObjectInfo
	err := env.Source.List(ctx, "", func(o pipeline.ObjectInfo) error {
		if pipeline.Selected(o.Key, src.Include, src.Exclude) {
			objs = append(objs, o)
		}
		return nil
	})
	if err != nil {
		return nil, err
	}
	if len(objs) == 0 {
		// A version of nothing is almost always a wrong source.uri or
		// include pattern; a nightly run must not publish it quietly.
		return nil, fmt.Errorf("no object under %s matches include %q (exclude %q)", env.Source.URI(), src.Include, src.Exclude)
	}
	return objs, nil
}

// chunkBytes bounds the frames an ingest item holds before it sorts them and
// writes them out as runs.
const chunkBytes = 32 << 20

// Do implements pipeline.Stage.
func (st Ingest) Do(ctx context.Context, env *pipeline.Env, it pipeline.Item) (any, error) {
	obj := it.Meta.(pipeline.ObjectInfo)
	uri := pipeline.JoinURI(env.Source.URI(), obj.Key)
	in := &ingester{
		env: env, obj: obj, dir: pipeline.ItemDir(st.Name(), it.Key), uri: uri,
		sum: pipeline.IngestSummary{Key: obj.Key, ETag: obj.ETag, Version: obj.Version,
			Dropped: map[string]int64{}, DroppedByUnit: map[string]map[string]int64{}, Runs: map[string][]string{},
			PartFrames: map[string]int64{}},
		parts: map[string]int{},
	}
	in.q = newQuarantine(ctx, env, in.dir+"quarantine.arrow")
	defer in.q.abort()
	if err := in.run(ctx); err != nil {
		return nil, fmt.Errorf("ingest %s: %w", uri, err)
	}
	var err error
	if in.sum.Quarantine, err = in.q.close(); err != nil {
		return nil, fmt.Errorf("ingest %s: %w", uri, err)
	}
	return in.sum, nil
}

type ingester struct {
	env   *pipeline.Env
	obj   pipeline.ObjectInfo
	dir   string
	uri   string
	sum   pipeline.IngestSummary
	parts map[string]int // partition per unit

	chunk     []schemas.Frame
	chunkSize int
	runs      int
	floats    schemas.Floats

	// The line being decided, for the quarantine.
	q       *quarantine
	lineNo  int64
	raw     []byte
	parsedT int64
}

// sourceReader counts and hashes the stored bytes as they are read, and keeps
// the store's own read error apart from a decompressor's complaint: the
// first is a failed run, the second a damaged object.
type sourceReader struct {
	r     io.Reader
	h     hash.Hash
	n     int64
	err   error
	prog  func(int64)
	since int64
}

func (s *sourceReader) Read(p []byte) (int, error) {
	n, err := s.r.Read(p)
	s.h.Write(p[:n])
	s.n += int64(n)
	s.since += int64(n)
	if s.since >= 1<<20 && s.prog != nil {
		s.prog(s.since)
		s.since = 0
	}
	if err != nil && err != io.EOF {
		s.err = err
	}
	return n, err
}

func (in *ingester) run(ctx context.Context) error {
	rc, err := in.env.Source.Open(ctx, in.obj.Key, 0)
	if err != nil {
		return err
	}
	defer rc.Close()
	if v, ok := rc.(interface{ VersionID() string }); ok && v.VersionID() != "" {
		in.sum.Version = v.VersionID()
	}
	// The item is keyed by the listing's size and ETag: content read from
	// another version of the object would be sealed under the wrong key.
	if e, ok := rc.(interface{ ETag() string }); ok && in.obj.ETag != "" && e.ETag() != "" && e.ETag() != in.obj.ETag {
		return fmt.Errorf("%s changed since it was listed (ETag %s, listed %s); run again", in.uri, e.ETag(), in.obj.ETag)
	}
	src := &sourceReader{r: rc, h: sha256.New()}
	if in.env.Progress != nil {
		src.prog = func(n int64) { in.env.Progress.Advance("ingest", 0, n) }
	}
	raw := bufio.NewReaderSize(src, 256<<10)
	body, err := decompress(raw)
	if err != nil {
		if src.err != nil {
			return src.err
		}
		// A header that does not decode: the object is damaged from its
		// first byte; it contributes no lines.
		in.sum.Incomplete = true
		body = bytes.NewReader(nil)
	}
	if err := in.lines(ctx, body, src); err != nil {
		return err
	}
	if c, ok := body.(io.Closer); ok {
		c.Close()
	}
	// Hash every stored byte, also those a decompressor did not need.
	if _, err := io.Copy(io.Discard, raw); err != nil {
		return err
	}
	if src.err != nil {
		return src.err
	}
	if in.env.Progress != nil {
		in.env.Progress.Advance("ingest", 0, src.since)
	}
	if src.n != in.obj.Size {
		return fmt.Errorf("%s changed since it was listed (%d bytes read, %d listed); run again", in.uri, src.n, in.obj.Size)
	}
	in.sum.Bytes = src.n
	in.sum.SHA256 = hex.EncodeToString(src.h.Sum(nil))
	return in.flush(ctx)
}

// decompress picks the decoder by the stream's magic bytes, whatever the
// object's name says: gzip (RFC 1952: 1f 8b) or zstd (RFC 8878: 28 b5 2f fd).
func decompress(r *bufio.Reader) (io.Reader, error) {
	magic, _ := r.Peek(4)
	switch {
	case len(magic) >= 2 && magic[0] == 0x1f && magic[1] == 0x8b:
		return gzip.NewReader(r)
	case len(magic) == 4 && bytes.Equal(magic, []byte{0x28, 0xb5, 0x2f, 0xfd}):
		// A frame may declare a window of up to 3.75 TB (RFC 8878 §3.1.1.1.2),
		// which decoding may hold; the zstd tool itself refuses more than
		// 128 MiB unless told otherwise (its --long default, from memory).
		// A larger one makes the object incomplete, not the worker run out
		// of memory.
		d, err := zstd.NewReader(r, zstd.WithDecoderConcurrency(1), zstd.WithDecoderLowmem(true), zstd.WithDecoderMaxWindow(zstdMaxWindow))
		if err != nil {
			return nil, err
		}
		return zstdCloser{d}, nil
	}
	return r, nil
}

// zstdMaxWindow is the largest zstd window an ingest item decodes with.
const zstdMaxWindow = 128 << 20

type zstdCloser struct{ *zstd.Decoder }

func (z zstdCloser) Close() error { z.Decoder.Close(); return nil }

// drop counts the current line as dropped, and quarantines it when asked.
func (in *ingester) drop(reason, unit string) {
	in.sum.Dropped[reason]++
	pipeline.AddCount(in.sum.DroppedByUnit, unit, reason, 1)
	if in.q != nil {
		d := schemas.Dropped{Src: in.obj.Key, SrcLine: in.lineNo, Reason: reason, Stage: "ingest", Unit: unit}
		if unit != "" {
			d.T, d.HasT = in.parsedT, true
		}
		if in.raw != nil {
			d.Line = append([]byte{}, in.raw[:min(len(in.raw), schemas.QuarantineLineBytes)]...)
		}
		in.q.add(&d)
	}
}

// lines reads the decompressed stream line by line.
func (in *ingester) lines(ctx context.Context, body io.Reader, src *sourceReader) error {
	cfg := in.env.Config
	maxLen := cfg.Source.MaxLineBytes
	// A byte-order mark starts the object, not its first line: drop it
	// before lines are measured (SPEC §1).
	br := bufio.NewReaderSize(body, 64<<10)
	if bom, _ := br.Peek(3); bytes.Equal(bom, []byte("\xef\xbb\xbf")) {
		br.Discard(3)
	}
	lr := newLineReader(br, maxLen)
	var parsed jsonl.Line
	fe := &imageFetcher{env: in.env}
	c := &lineCtx{line: &parsed, cfg: cfg, f32: cfg.Float == "float32", fetch: fe.fetch, lastT: map[string]int64{}}
	checks := lineChecks()
	var frame schemas.Frame
	var lineNo, frames int64
	for {
		if lineNo%4096 == 0 {
			if err := ctx.Err(); err != nil {
				return err
			}
		}
		line, eol, oversize, rerr := lr.next()
		if rerr != nil && src.err != nil {
			return src.err
		}
		broken := rerr != nil && rerr != io.EOF
		if rerr == io.EOF && len(line) == 0 && !oversize {
			break
		}
		lineNo++
		in.lineNo, in.raw = lineNo, line
		if !oversize && isBlank(line) {
			if broken {
				in.sum.Incomplete = true
				break
			}
			continue
		}
		in.sum.Lines++
		switch {
		case oversize:
			in.drop(pipeline.Oversize, "")
		case broken:
			// The stream was cut: what was decoded of this line is partial.
			in.drop(pipeline.Truncated, "")
		default:
			if err := jsonl.Parse(line, &parsed); err != nil {
				if !eol {
					in.drop(pipeline.Truncated, "")
				} else {
					in.drop(pipeline.Malformed, "")
				}
				break
			}
			in.parsedT = parsed.T
			reason, err := runChecks(ctx, checks, c)
			if err != nil {
				return fmt.Errorf("line %d: %w", lineNo, err)
			}
			if reason != "" {
				in.drop(reason, parsed.Unit)
				break
			}
			c.lastT[parsed.Unit] = parsed.T
			toFrame(&frame, c, in.obj.Key, lineNo)
			if err := in.add(ctx, &frame); err != nil {
				return err
			}
			in.sum.Kept++
			frames++
			if frames%8192 == 0 && in.env.Progress != nil {
				in.env.Progress.Advance("ingest", 8192, 0)
			}
		}
		if broken {
			in.sum.Incomplete = true
			break
		}
		if !eol {
			break
		}
	}
	if in.env.Progress != nil {
		in.env.Progress.Advance("ingest", frames%8192, 0)
	}
	return nil
}

func runChecks(ctx context.Context, checks []check, c *lineCtx) (string, error) {
	for _, ch := range checks {
		ok, err := ch.fn(ctx, c)
		if err != nil {
			return "", err
		}
		if !ok {
			return ch.reason, nil
		}
	}
	return "", nil
}

func isBlank(b []byte) bool {
	for _, c := range b {
		switch c {
		case ' ', '\t', '\r', '\v', '\f':
		default:
			return false
		}
	}
	return true
}

// add keeps a copy of f in the current chunk, writing runs out when the
// chunk is full.
func (in *ingester) add(ctx context.Context, f *schemas.Frame) error {
	in.chunk = append(in.chunk, schemas.Frame{})
	in.floats.CopyInto(&in.chunk[len(in.chunk)-1], f)
	in.chunkSize += frameOverhead + 8*(len(f.Obs)+len(f.Act)) + len(f.Task)
	for _, b := range f.Img {
		in.chunkSize += len(b)
	}
	if in.chunkSize >= chunkBytes {
		return in.flush(ctx)
	}
	return nil
}

// flush sorts the chunk by (partition, unit, t) and writes one run per
// partition present. Within an object (unit, t) is unique after the
// time_regress check, so the order is total.
func (in *ingester) flush(ctx context.Context) error {
	if len(in.chunk) == 0 {
		return nil
	}
	n := in.env.Config.Partitions
	part := func(unit string) int {
		p, ok := in.parts[unit]
		if !ok {
			p = pipeline.PartitionOf(unit, n)
			in.parts[unit] = p
		}
		return p
	}
	slices.SortFunc(in.chunk, func(a, b schemas.Frame) int {
		if c := part(a.Unit) - part(b.Unit); c != 0 {
			return c
		}
		if c := strings.Compare(a.Unit, b.Unit); c != 0 {
			return c
		}
		switch {
		case a.T < b.T:
			return -1
		case a.T > b.T:
			return 1
		}
		return 0
	})
	for i := 0; i < len(in.chunk); {
		p := part(in.chunk[i].Unit)
		j := i
		for j < len(in.chunk) && part(in.chunk[j].Unit) == p {
			j++
		}
		name := pipeline.PartName(p)
		key := fmt.Sprintf("%sp%s-r%04d.arrow", in.dir, name, in.runs)
		if err := writeFrames(ctx, in.env.Work, key, in.chunk[i:j], in.env.Config.Float == "float32"); err != nil {
			return err
		}
		in.sum.Runs[name] = append(in.sum.Runs[name], key)
		in.sum.PartFrames[name] += int64(j - i)
		i = j
	}
	in.runs++
	in.chunk = in.chunk[:0]
	in.chunkSize = 0
	return nil
}

// writeFrames writes frames as one sealed object of the work store.
func writeFrames(ctx context.Context, work pipeline.Store, key string, frames []schemas.Frame, f32 bool) error {
	return storeFrames(ctx, work, key, f32, func(put func(*schemas.Frame) error) error {
		for i := range frames {
			if err := put(&frames[i]); err != nil {
				return err
			}
		}
		return nil
	})
}

// storeFrames writes the frames that emit hands to put as one sealed work
// object: complete and visible on success, absent on any failure.
func storeFrames(ctx context.Context, work pipeline.Store, key string, f32 bool, emit func(put func(*schemas.Frame) error) error) error {
	up, err := work.Create(ctx, key)
	if err != nil {
		return err
	}
	fw := pipeline.NewFrameWriter(up, f32)
	if err := emit(fw.Write); err != nil {
		up.Abort()
		return fmt.Errorf("write %s: %w", key, err)
	}
	if err := fw.Close(); err != nil {
		up.Abort()
		return fmt.Errorf("write %s: %w", key, err)
	}
	return up.Commit(false)
}

// lineReader splits a stream into physical lines without ever holding more
// than maxLen+2 bytes of one: a longer line is skipped to its end and
// reported as oversize, unless it held only white space (it is then
// returned empty, a blank line).
type lineReader struct {
	br     *bufio.Reader
	maxLen int
	buf    []byte
}

func newLineReader(r io.Reader, maxLen int) *lineReader {
	br, ok := r.(*bufio.Reader)
	if !ok {
		br = bufio.NewReaderSize(r, 64<<10)
	}
	return &lineReader{br: br, maxLen: maxLen}
}

// next returns the next line without its line end ("\n", or "\r\n"), whether
// it had a line end, and whether it was too long. err is io.EOF after the
// last line, or the stream's error; line then holds what was read of a
// partial line.
func (lr *lineReader) next() (line []byte, eol, oversize bool, err error) {
	lr.buf = lr.buf[:0]
	// A line of only white space is skipped whatever its length (SPEC §1),
	// so a skipped oversize line is watched for anything else.
	blank := true
	for {
		chunk, e := lr.br.ReadSlice('\n')
		if !oversize {
			if len(lr.buf)+len(chunk) > lr.maxLen+2 {
				oversize = true
				blank = isBlank(lr.buf)
			} else {
				lr.buf = append(lr.buf, chunk...)
			}
		}
		if oversize && blank {
			blank = isBlank(bytes.TrimSuffix(chunk, []byte("\n")))
		}
		if e == bufio.ErrBufferFull {
			continue
		}
		if e == nil {
			eol = true
			break
		}
		err = e
		break
	}
	if oversize {
		if blank {
			return lr.buf[:0], eol, false, err
		}
		return nil, eol, true, err
	}
	b := lr.buf
	if eol {
		b = b[:len(b)-1]
		b = bytes.TrimSuffix(b, []byte("\r"))
	}
	if len(b) > lr.maxLen && !isBlank(b) {
		return nil, eol, true, err
	}
	return b, eol, false, err
}
