package stages

import (
	"bufio"
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"fmt"
	"hash"
	"io"
	"slices"
	"strings"

	"hindcast/pipeline"
	"hindcast/schemas"
	"hindcast/stages/recording/mcapread"
)

// Ingest reads each source object once, decides for every line whether it is
// kept (SPEC §3.1), and writes the kept frames as runs sorted by (unit, t),
// one set per partition, so the episodes stage only merges.
type Ingest struct {
	// ticks reads recordings; nil means MCAP (tests put a stand-in here).
	ticks tickSource
}

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

// Reads implements pipeline.Stage: what decides which lines and ticks are
// kept, how values are rounded and how frames are spread over partitions.
func (Ingest) Reads(cfg *pipeline.Config) any {
	embs := map[string]ingestEmbodiment{}
	for name, e := range cfg.Embodiments {
		embs[name] = ingestEmbodiment{e.Obs, e.Act, e.ObsLow, e.ObsHigh, e.ActLow, e.ActHigh, e.Cameras, e.Frames}
	}
	reads := map[string]any{
		"max_image_bytes": cfg.Source.MaxImageBytes,
		"max_line_bytes":  cfg.Source.MaxLineBytes,
		"embodiments":     embs,
		"float":           cfg.Float,
		"partitions":      cfg.Partitions,
		"quarantine":      cfg.Quarantine,
	}
	// How recordings name their unit and embodiment and which time they use
	// decide their ticks (SPEC §7.1), and image_roots which references are
	// read; each is left out when unset, so a config without them reads
	// what it read before.
	if cfg.Recordings != nil {
		reads["recordings"] = cfg.Recordings
	}
	if len(cfg.Source.ImageRoots) > 0 {
		reads["image_roots"] = cfg.Source.ImageRoots
	}
	return reads
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
		parts: map[string]int{}, ticks: st.ticks,
	}
	in.q = newQuarantine(ctx, env, in.dir+"quarantine.arrow")
	defer in.q.abort()
	in.images = pipeline.NewImageWriter(ctx, env.Work, in.dir+"images.bin")
	defer in.images.Abort()
	if err := in.run(ctx); err != nil {
		return nil, fmt.Errorf("ingest %s: %w", uri, err)
	}
	if err := in.images.Commit(); err != nil {
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
	// images takes the kept frames' camera bytes as they come: runs and
	// every later intermediate carry only where they are.
	images *pipeline.ImageWriter
	runs   int
	floats schemas.Floats

	q      *quarantine
	checks []check
	cc     *checkCtx
	frame  schemas.Frame
	frames int64 // accepted, for progress
	ticks  tickSource
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
	open := true
	defer func() {
		if open {
			rc.Close()
		}
	}()
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
	// What the object is, by its first bytes, never by its name (SPEC §7.1).
	if magic, _ := raw.Peek(len(mcapread.Magic)); bytes.Equal(magic, mcapread.Magic[:]) {
		// A recording is read by ranged reads of its own (its index is at
		// the end); this stream is not needed.
		open = false
		rc.Close()
		return in.recording(ctx)
	}
	if src.err != nil {
		return src.err
	}
	fe := newImageFetcher(in.env)
	defer fe.close()
	in.startChecks(fe.fetch)
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
	incomplete, err := decodeLines(ctx, body, src, in.env.Config.Source.MaxLineBytes, func(c *Candidate) error { return in.consume(ctx, c) })
	if err != nil {
		return err
	}
	in.sum.Incomplete = in.sum.Incomplete || incomplete
	in.endProgress()
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

// startChecks readies the checks for this object's candidates.
func (in *ingester) startChecks(fetch func(ctx context.Context, ref string) ([]byte, error)) {
	cfg := in.env.Config
	in.checks = candidateChecks()
	in.cc = &checkCtx{cfg: cfg, f32: cfg.Float == "float32", fetch: fetch, lastT: map[string]int64{}}
}

// consume decides one candidate, whatever its format: it is counted in
// lines and either dropped with the decoder's reason or the first failing
// check's, or kept as a frame.
func (in *ingester) consume(ctx context.Context, c *Candidate) error {
	in.sum.Lines++
	reason := c.Reason
	if reason == "" {
		in.cc.cand = c
		var err error
		if reason, err = runChecks(ctx, in.checks, in.cc); err != nil {
			return fmt.Errorf("line %d: %w", c.Line, err)
		}
	}
	if reason != "" {
		in.drop(c, reason)
		return nil
	}
	in.cc.lastT[c.Unit] = c.T
	toFrame(&in.frame, in.cc, in.obj.Key)
	if err := in.add(ctx, &in.frame); err != nil {
		return err
	}
	in.sum.Kept++
	in.frames++
	if in.frames%8192 == 0 && in.env.Progress != nil {
		in.env.Progress.Advance("ingest", 8192, 0)
	}
	return nil
}

// endProgress reports the frames not yet reported.
func (in *ingester) endProgress() {
	if in.env.Progress != nil {
		in.env.Progress.Advance("ingest", in.frames%8192, 0)
	}
}

// drop counts a candidate as dropped, and quarantines it when asked.
func (in *ingester) drop(c *Candidate, reason string) {
	in.sum.Dropped[reason]++
	pipeline.AddCount(in.sum.DroppedByUnit, c.Unit, reason, 1)
	if reason == pipeline.Stale && in.sum.Recording != nil {
		in.sum.Recording.StaleBy[c.StaleTopic]++
	}
	if in.q != nil {
		d := schemas.Dropped{Src: in.obj.Key, SrcLine: c.Line, Reason: reason, Stage: "ingest", Unit: c.Unit}
		if c.HasT {
			d.T, d.HasT = c.T, true
		}
		raw := c.Raw
		if raw == nil && in.sum.Recording != nil {
			raw = tickRecord(in.obj.Key, c, reason)
		}
		if raw != nil {
			d.Line = append([]byte{}, raw[:min(len(raw), schemas.QuarantineLineBytes)]...)
		}
		in.q.add(&d)
	}
}

// add stores f's camera bytes and keeps a copy of the rest of f in the
// current chunk, writing runs out when the chunk is full.
func (in *ingester) add(ctx context.Context, f *schemas.Frame) error {
	if err := in.images.Put(f); err != nil {
		return err
	}
	in.chunk = append(in.chunk, schemas.Frame{})
	in.floats.CopyInto(&in.chunk[len(in.chunk)-1], f)
	in.chunkSize += frameOverhead + 8*(len(f.Obs)+len(f.Act)) + len(f.Task) + 16*len(f.ImgAt)
	for _, r := range f.ImgRef {
		in.chunkSize += len(r)
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
