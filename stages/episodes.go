package stages

import (
	"context"
	"fmt"
	"slices"
	"strconv"
	"strings"

	"hindcast/pipeline"
	"hindcast/schemas"
)

// Episodes merges a partition's ingest runs, drops duplicate and conflicting
// frames, cuts episodes (SPEC §3.2), and writes them sorted by (episode, step).
type Episodes struct{}

// Name implements pipeline.Stage.
func (Episodes) Name() string { return "episodes" }

// Reads implements pipeline.Stage.
func (Episodes) Reads(cfg *pipeline.Config) any {
	return map[string]any{"episodes": cfg.Episodes, "partitions": cfg.Partitions, "quarantine": cfg.Quarantine}
}

// episodesInput is one partition's input: the runs of every object that is
// not a duplicate, in object key order.
type episodesInput struct {
	Partition int
	Runs      []string
}

// Items implements pipeline.Stage: one item per partition, keyed by the
// ingest items feeding it, so new objects recompute only the partitions they
// touch.
func (Episodes) Items(ctx context.Context, env *pipeline.Env, ckey string, up map[string][]pipeline.Sealed) ([]pipeline.Item, error) {
	objs, err := pipeline.Sources(up["ingest"])
	if err != nil {
		return nil, err
	}
	n := env.Config.Partitions
	inputs := make([]episodesInput, n)
	feeds := make([][]string, n)
	frames := make([]int64, n)
	for i, o := range objs {
		if o.DuplicateOf != "" {
			continue
		}
		for name, runs := range o.Runs {
			p, err := strconv.Atoi(name)
			if err != nil || p < 0 || p >= n {
				return nil, fmt.Errorf("ingest %s: bad partition %q", o.Key, name)
			}
			inputs[p].Runs = append(inputs[p].Runs, runs...)
			frames[p] += o.PartFrames[name]
			feeds[p] = append(feeds[p], o.Key, up["ingest"][i].Item.Key)
		}
	}
	items := make([]pipeline.Item, n)
	for p := range n {
		inputs[p].Partition = p
		items[p] = pipeline.Item{ID: "p" + pipeline.PartName(p), Key: pipeline.HashParts(ckey, p, feeds[p]),
			Bytes: frames[p] * frameBytes, Meta: inputs[p]}
	}
	return items, nil
}

// maxFanIn bounds how many runs one merge reads at once; more runs are merged
// in passes.
const maxFanIn = 64

// episodeBufferBytes bounds the finished episodes held before they are
// sorted by id and written out as a run.
const episodeBufferBytes = 32 << 20

// Do implements pipeline.Stage.
func (st Episodes) Do(ctx context.Context, env *pipeline.Env, it pipeline.Item) (any, error) {
	in := it.Meta.(episodesInput)
	f32 := env.Config.Float == "float32"
	dir := pipeline.ItemDir(st.Name(), it.Key)
	sum := pipeline.EpisodesSummary{Partition: in.Partition, File: dir + "episodes.arrow", Dropped: map[string]map[string]int64{},
		DroppedByUnit: map[string]map[string]int64{}, Units: map[string]int64{}}
	src, closeAll, err := openMerged(ctx, env.Work, dir+"merge/", in.Runs, byUnitTime, f32)
	if err != nil {
		return nil, err
	}
	defer closeAll()
	out := &episodeSink{ctx: ctx, work: env.Work, dir: dir, f32: f32}
	q := newQuarantine(ctx, env, dir+"quarantine.arrow")
	seg := newSegmenter(env.Config.Episodes, func(f *schemas.Frame, reason string) {
		pipeline.AddCount(sum.Dropped, f.Src, reason, 1)
		pipeline.AddCount(sum.DroppedByUnit, f.Unit, reason, 1)
		q.add(&schemas.Dropped{Src: f.Src, SrcLine: f.Line, Reason: reason, Stage: st.Name(), Unit: f.Unit, T: f.T, HasT: true})
	}, out.add)
	defer q.abort()
	var f schemas.Frame
	for src.Next(&f) {
		if err := seg.feed(&f); err != nil {
			return nil, err
		}
	}
	if err := src.Err(); err != nil {
		return nil, fmt.Errorf("read runs: %w", err)
	}
	if err := seg.finish(); err != nil {
		return nil, err
	}
	infos, frames, err := out.close(sum.File)
	if err != nil {
		return nil, err
	}
	if sum.Quarantine, err = q.close(); err != nil {
		return nil, err
	}
	sum.Episodes, sum.Frames, sum.Index = int64(len(infos)), frames, dir+"episodes.index.jsonl"
	if err := pipeline.WriteEpisodeIndex(ctx, env.Work, sum.Index, infos); err != nil {
		return nil, err
	}
	for _, e := range infos {
		sum.Units[e.Unit] += int64(e.Steps)
	}
	if err := pipeline.DeletePrefix(ctx, env.Work, dir+"merge/"); err != nil {
		return nil, err
	}
	return sum, nil
}

// byUnitTime orders frames as SPEC §3.2: (unit, t, object key, line).
func byUnitTime(a, b *schemas.Frame) bool {
	if a.Unit != b.Unit {
		return a.Unit < b.Unit
	}
	if a.T != b.T {
		return a.T < b.T
	}
	if a.Src != b.Src {
		return a.Src < b.Src
	}
	return a.Line < b.Line
}

// byEpisodeStep orders frames as the frames table (SPEC §4).
func byEpisodeStep(a, b *schemas.Frame) bool {
	if a.Episode != b.Episode {
		return a.Episode < b.Episode
	}
	if a.Step != b.Step {
		return a.Step < b.Step
	}
	return a.Unit < b.Unit
}

// segmenter applies SPEC §3.2 to one partition's frames in (unit, t) order.
// It holds at most one chunk (max_steps frames) and the last kept frame.
type segmenter struct {
	maxGap   uint64
	min, max int
	drop     func(f *schemas.Frame, reason string)
	emit     func(ep []schemas.Frame) error

	unit    string
	started bool
	prev    schemas.Frame // last kept frame of the unit
	prevEnd bool
	cur     []schemas.Frame
	floats  schemas.Floats // vectors of the frames in cur, and of episodes emitted
}

func newSegmenter(c pipeline.EpisodeConfig, drop func(f *schemas.Frame, reason string), emit func([]schemas.Frame) error) *segmenter {
	return &segmenter{maxGap: uint64(c.MaxGap), min: c.MinSteps, max: c.MaxSteps, drop: drop, emit: emit}
}

func (s *segmenter) feed(f *schemas.Frame) error {
	newEpisode := false
	switch {
	case !s.started || f.Unit != s.unit:
		if err := s.cut(); err != nil {
			return err
		}
		s.started, s.unit = true, f.Unit
		newEpisode = true
	case f.T == s.prev.T:
		if schemas.SameContent(&s.prev, f) {
			s.drop(f, pipeline.Duplicate)
		} else {
			s.drop(f, pipeline.Conflict)
		}
		return nil
	default:
		// t only grows here; the unsigned difference cannot overflow.
		gap := uint64(f.T) - uint64(s.prev.T)
		newEpisode = f.Ev == schemas.EvStart || s.prevEnd || gap > s.maxGap
	}
	if newEpisode {
		if err := s.cut(); err != nil {
			return err
		}
	}
	s.cur = append(s.cur, schemas.Frame{})
	s.floats.CopyInto(&s.cur[len(s.cur)-1], f)
	s.prev.CopyFrom(f)
	s.prevEnd = f.Ev == schemas.EvEnd
	if len(s.cur) == s.max {
		return s.cut()
	}
	return nil
}

// cut ends the current chunk: an episode when it has min_steps frames, else
// its frames are dropped as short_episode.
func (s *segmenter) cut() error {
	ep := s.cur
	s.cur = nil
	if len(ep) == 0 {
		return nil
	}
	if len(ep) < s.min {
		for i := range ep {
			s.drop(&ep[i], pipeline.ShortEpisode)
		}
		return nil
	}
	id := EpisodeID(ep[0].Unit, ep[0].T)
	for i := range ep {
		ep[i].Episode, ep[i].Step, ep[i].Last = id, int32(i), i == len(ep)-1
	}
	return s.emit(ep)
}

func (s *segmenter) finish() error { return s.cut() }

// EpisodeID is SPEC §3.2's id: <unit>-<t of its first frame>.
func EpisodeID(unit string, t int64) string { return unit + "-" + strconv.FormatInt(t, 10) }

// episodeSink collects finished episodes, spills them as runs sorted by id
// when the buffer is full, and merges the runs into one file at the end.
type episodeSink struct {
	ctx  context.Context
	work pipeline.Store
	dir  string
	buf  [][]schemas.Frame
	size int
	runs []string
	f32  bool
}

func (o *episodeSink) add(ep []schemas.Frame) error {
	o.buf = append(o.buf, ep)
	for i := range ep {
		o.size += frameOverhead + 8*(len(ep[i].Obs)+len(ep[i].Act)) + 16*len(ep[i].ImgAt)
		for _, r := range ep[i].ImgRef {
			o.size += len(r)
		}
	}
	if o.size >= episodeBufferBytes {
		return o.spill(fmt.Sprintf("%smerge/episodes-%04d.arrow", o.dir, len(o.runs)))
	}
	return nil
}

func (o *episodeSink) sortBuf() {
	slices.SortFunc(o.buf, func(a, b []schemas.Frame) int {
		if c := strings.Compare(a[0].Episode, b[0].Episode); c != 0 {
			return c
		}
		return strings.Compare(a[0].Unit, b[0].Unit)
	})
}

func (o *episodeSink) spill(key string) error {
	o.sortBuf()
	if err := writeEpisodes(o.ctx, o.work, key, o.buf, o.f32); err != nil {
		return err
	}
	o.runs = append(o.runs, key)
	o.buf, o.size = nil, 0
	return nil
}

// close writes the final file and returns the episode index in file order.
func (o *episodeSink) close(final string) ([]pipeline.EpisodeInfo, int64, error) {
	if len(o.runs) == 0 {
		if err := o.spill(final); err != nil {
			return nil, 0, err
		}
	} else {
		if len(o.buf) > 0 {
			if err := o.spill(fmt.Sprintf("%smerge/episodes-%04d.arrow", o.dir, len(o.runs))); err != nil {
				return nil, 0, err
			}
		}
		src, closeAll, err := openMerged(o.ctx, o.work, o.dir+"merge/pass-", o.runs, byEpisodeStep, o.f32)
		if err != nil {
			return nil, 0, err
		}
		err = copyFrames(o.ctx, o.work, final, src, o.f32)
		closeAll()
		if err != nil {
			return nil, 0, err
		}
	}
	// Index the file by reading it back: the index then describes exactly
	// what downstream stages will read.
	return indexEpisodes(o.ctx, o.work, final)
}

func indexEpisodes(ctx context.Context, work pipeline.Store, key string) ([]pipeline.EpisodeInfo, int64, error) {
	fr, c, err := pipeline.OpenFrames(ctx, work, key)
	if err != nil {
		return nil, 0, err
	}
	defer c.Close()
	defer fr.Release()
	var infos []pipeline.EpisodeInfo
	var n int64
	var f schemas.Frame
	for fr.Next(&f) {
		n++
		if f.Step == 0 {
			infos = append(infos, pipeline.EpisodeInfo{ID: f.Episode, Unit: f.Unit, Embodiment: f.Embodiment})
		}
		infos[len(infos)-1].Steps++
	}
	if err := fr.Err(); err != nil {
		return nil, 0, fmt.Errorf("read %s: %w", key, err)
	}
	return infos, n, nil
}

// frameBytes estimates one frame's share of a partition's work, to order
// and report partition items by size.
const frameBytes = 200

// frameOverhead is what a buffered frame costs besides its vectors and
// images: the struct, slice headers and allocation rounding (measured with
// the heap profiler on the benchmark fleet, about 250 bytes).
const frameOverhead = 256

// writeEpisodes writes episodes, in order, as one sealed work object.
func writeEpisodes(ctx context.Context, work pipeline.Store, key string, eps [][]schemas.Frame, f32 bool) error {
	return storeFrames(ctx, work, key, f32, func(put func(*schemas.Frame) error) error {
		for _, ep := range eps {
			for i := range ep {
				if err := put(&ep[i]); err != nil {
					return err
				}
			}
		}
		return nil
	})
}

// copyFrames writes every frame of src to a new work object.
func copyFrames(ctx context.Context, work pipeline.Store, key string, src pipeline.FrameSource, f32 bool) error {
	return storeFrames(ctx, work, key, f32, func(put func(*schemas.Frame) error) error {
		var f schemas.Frame
		for src.Next(&f) {
			if err := put(&f); err != nil {
				return err
			}
		}
		return src.Err()
	})
}

// openMerged opens runs (each sorted by less) as one sorted source. With more
// than maxFanIn runs it first merges groups of them into new runs under
// tmpPrefix, so the number of open streams stays bounded.
func openMerged(ctx context.Context, work pipeline.Store, tmpPrefix string, runs []string, less func(a, b *schemas.Frame) bool, f32 bool) (pipeline.FrameSource, func(), error) {
	for pass := 0; len(runs) > maxFanIn; pass++ {
		var next []string
		for i := 0; i < len(runs); i += maxFanIn {
			group := runs[i:min(i+maxFanIn, len(runs))]
			key := fmt.Sprintf("%s%02d-%05d.arrow", tmpPrefix, pass, len(next))
			src, closeAll, err := openAll(ctx, work, group, less)
			if err != nil {
				return nil, nil, err
			}
			err = copyFrames(ctx, work, key, src, f32)
			closeAll()
			if err != nil {
				return nil, nil, err
			}
			next = append(next, key)
		}
		runs = next
	}
	return openAll(ctx, work, runs, less)
}

func openAll(ctx context.Context, work pipeline.Store, runs []string, less func(a, b *schemas.Frame) bool) (pipeline.FrameSource, func(), error) {
	var srcs []pipeline.FrameSource
	var closers []func()
	closeAll := func() {
		for _, c := range closers {
			c()
		}
	}
	for _, key := range runs {
		fr, c, err := pipeline.OpenFrames(ctx, work, key)
		if err != nil {
			closeAll()
			return nil, nil, err
		}
		srcs = append(srcs, fr)
		closers = append(closers, func() { fr.Release(); c.Close() })
	}
	if len(srcs) == 1 {
		return srcs[0], closeAll, nil
	}
	return pipeline.NewMerge(less, srcs...), closeAll, nil
}
