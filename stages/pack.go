package stages

import (
	"bufio"
	"cmp"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"hash"
	"io"
	"slices"
	"sort"
	"sync"

	"github.com/parquet-go/parquet-go"
	"github.com/parquet-go/parquet-go/compress"
	"github.com/parquet-go/parquet-go/compress/gzip"
	"github.com/parquet-go/parquet-go/compress/snappy"
	"github.com/parquet-go/parquet-go/compress/uncompressed"
	"github.com/parquet-go/parquet-go/compress/zstd"

	"hindcast/pipeline"
	"hindcast/schemas"
)

// Pack writes a partition's episodes and goals as Parquet shards, one file
// per (table, split) that has rows (SPEC §4), and the train split's stats.
type Pack struct {
	// codecs are shared by every shard of a run: a codec pools its encoders,
	// and one zstd encoder holds megabytes of history, so a codec per file
	// (a dozen columns each) would multiply memory by the number of files.
	once   sync.Once
	codecs map[string]compress.Codec
	// GroupImageBytes, when > 0, replaces packGroupImageBytes (for tests
	// that need the cut without writing 64 MiB of frames).
	GroupImageBytes int64
	// MaxRowGroups, when > 0, replaces packMaxRowGroups (for tests that
	// need the bound without writing 30,000 row groups).
	MaxRowGroups int64
}

// packMaxRowGroups bounds the row groups of one shard. A Parquet file holds
// at most 32,767 row groups (the row group ordinal is a 16-bit integer in
// the format's footer; from memory), and parquet-go fails past it, part way
// through a shard. The margin of 2,767 leaves room for the cuts by image
// bytes (one per 64 MiB of camera frames, 170 GB per shard).
const packMaxRowGroups = 30_000

// groupRows is the rows per row group of a shard of at most rows rows:
// parquet.row_group_rows, raised when that would make more than maxGroups
// row groups. It depends only on the partition's row count, so it is the
// same whatever the concurrency; with the default of 65,536 it is raised
// only past 1.9 billion rows.
func groupRows(configured, rows, maxGroups int64) int64 {
	if need := (rows + maxGroups - 1) / maxGroups; need > configured {
		return need
	}
	return configured
}

func (st *Pack) codec(name string) compress.Codec {
	st.once.Do(func() {
		st.codecs = map[string]compress.Codec{}
		for _, n := range []string{"zstd", "snappy", "gzip", "none"} {
			st.codecs[n] = Codec(n)
		}
	})
	return st.codecs[name]
}

// Name implements pipeline.Stage.
func (*Pack) Name() string { return "pack" }

// Reads implements pipeline.Stage. The footers carry the config's SHA-256,
// so any config change re-packs.
func (*Pack) Reads(cfg *pipeline.Config) any {
	return map[string]any{"config_sha256": cfg.SHA256()}
}

type packInput struct {
	Episodes pipeline.EpisodesSummary
	Goals    pipeline.GoalsSummary
}

// Items implements pipeline.Stage: one item per partition.
func (*Pack) Items(ctx context.Context, env *pipeline.Env, ckey string, up map[string][]pipeline.Sealed) ([]pipeline.Item, error) {
	eps, goals := up["episodes"], up["goals"]
	if len(eps) != len(goals) {
		return nil, fmt.Errorf("pack: %d episode partitions but %d goal partitions", len(eps), len(goals))
	}
	items := make([]pipeline.Item, len(eps))
	for i := range eps {
		var in packInput
		if err := json.Unmarshal(eps[i].Summary, &in.Episodes); err != nil {
			return nil, fmt.Errorf("episodes %s: summary: %w", eps[i].Item.ID, err)
		}
		if err := json.Unmarshal(goals[i].Summary, &in.Goals); err != nil {
			return nil, fmt.Errorf("goals %s: summary: %w", goals[i].Item.ID, err)
		}
		items[i] = pipeline.Item{ID: eps[i].Item.ID, Key: pipeline.HashParts(ckey, eps[i].Item.Key, goals[i].Item.Key),
			Bytes: in.Episodes.Frames * frameBytes, Meta: in}
	}
	return items, nil
}

// Codec returns the Parquet codec for a config's compression name; zstd is
// used at its fastest level, which keeps pack from being the bottleneck.
func Codec(name string) compress.Codec {
	switch name {
	case "snappy":
		return &snappy.Codec{}
	case "gzip":
		return &gzip.Codec{}
	case "none":
		return &uncompressed.Codec{}
	}
	return &zstd.Codec{Level: zstd.SpeedFastest}
}

// AllCameras lists every camera declared by any embodiment, sorted: the
// frames table's image columns.
func AllCameras(cfg *pipeline.Config) []string {
	var cams []string
	for _, e := range cfg.Embodiments {
		for _, c := range e.Cameras {
			if !slices.Contains(cams, c) {
				cams = append(cams, c)
			}
		}
	}
	sort.Strings(cams)
	return cams
}

// hashWriter counts and hashes what goes to the store, so a shard's size and
// SHA-256 are known without reading it back.
type hashWriter struct {
	w io.Writer
	h hash.Hash
	n int64
}

func (hw *hashWriter) Write(p []byte) (int, error) {
	n, err := hw.w.Write(p)
	hw.h.Write(p[:n])
	hw.n += int64(n)
	return n, err
}

// shard is one Parquet file being written.
type shard struct {
	file    pipeline.PackedFile
	up      pipeline.Upload
	hw      *hashWriter
	bw      *bufio.Writer
	frames  *parquet.Writer
	pairs   pairWriter
	rowsBuf []parquet.Row
	// imgBytes counts the camera bytes of the frames row group being
	// buffered (see packGroupImageBytes).
	imgBytes int64
}

// pairsSchema is the pairs table's schema with its root named after the
// table (SPEC §4), not after the Go type (which would read "PairRow[float32]").
func pairsSchema[F schemas.Float]() *parquet.Schema {
	return parquet.NewSchema("pairs", parquet.SchemaOf(new(schemas.PairRow[F])))
}

// packGroupImageBytes cuts a frames row group, at an episode's end, once it
// holds this many bytes of camera frames: the writer buffers a row group
// in memory until it is written, and row_group_rows rows of camera frames
// (65,536 JPEGs of 50 KB are over 3 GB) would not fit a worker. The cut
// depends on the data alone, so it keeps the output deterministic.
const packGroupImageBytes = 64 << 20

// packBatchRows is how many rows pack hands a Parquet writer at once, within
// an episode: memory then grows with an episode's frames (which pack holds,
// since a pair reads any step of its episode), not with its rows and pairs.
// A 1,000,000-step episode with 4 goals a step peaked at 4.0 GB RSS when
// the whole episode's rows and pairs were gathered first.
const packBatchRows = 4096

// pairWriter hides the output float type of the pairs writer. Rows are
// gathered one episode at a time: begin converts the episode's vectors once,
// every row of the episode shares them, and end writes the rows before the
// buffers are reused.
type pairWriter interface {
	begin(ep []schemas.Frame, goalDims []int)
	add(g *schemas.Goal, goalEpisode, strategy string) error
	end() error
	Close() error
}

type typedPairs[F schemas.Float] struct {
	w    *parquet.GenericWriter[schemas.PairRow[F]]
	ep   []schemas.Frame
	obs  [][]F // per step
	act  [][]F // per step, nil when absent
	goal [][]F // per step, the goal-dim projection
	neg  []F   // negatives' goal vectors, for the current episode
	rows []schemas.PairRow[F]
}

// vectors converts every step's vector into one flat slice per episode.
func vectors[F schemas.Float](dst [][]F, flat []F, n int, get func(i int) ([]float64, bool)) ([][]F, []F) {
	dst, flat = dst[:0], flat[:0]
	var ends []int
	for i := range n {
		v, ok := get(i)
		if !ok {
			ends = append(ends, -1)
			continue
		}
		for _, x := range v {
			flat = append(flat, F(x))
		}
		ends = append(ends, len(flat))
	}
	start := 0
	for _, e := range ends {
		if e < 0 {
			dst = append(dst, nil)
			continue
		}
		dst = append(dst, flat[start:e:e])
		start = e
	}
	return dst, flat
}

func (p *typedPairs[F]) begin(ep []schemas.Frame, goalDims []int) {
	p.ep = ep
	n := len(ep)
	p.obs, _ = vectors(p.obs, nil, n, func(i int) ([]float64, bool) { return ep[i].Obs, true })
	p.act, _ = vectors(p.act, nil, n, func(i int) ([]float64, bool) {
		if !ep[i].HasAct {
			return nil, false
		}
		return ep[i].Act, true
	})
	proj := make([]float64, 0, len(goalDims))
	p.goal, _ = vectors(p.goal, nil, n, func(i int) ([]float64, bool) {
		return project(proj[:0], ep[i].Obs, goalDims), true
	})
	p.neg = p.neg[:0]
	p.rows = p.rows[:0]
}

func (p *typedPairs[F]) add(g *schemas.Goal, goalEpisode, strategy string) error {
	f := &p.ep[g.Step]
	var goal []F
	if g.Strategy == schemas.Negative {
		// The goal frame is in another episode: its vector came with the goal.
		start := len(p.neg)
		for _, x := range g.Goal {
			p.neg = append(p.neg, F(x))
		}
		goal = p.neg[start:len(p.neg):len(p.neg)]
	} else {
		goal = p.goal[g.GoalStep]
	}
	act := p.act[g.Step]
	if act == nil && f.HasAct {
		act = []F{}
	}
	p.rows = append(p.rows, schemas.PairRow[F]{
		Episode: f.Episode, Step: f.Step, T: f.T, Unit: f.Unit, Embodiment: f.Embodiment,
		Obs: p.obs[g.Step], Act: act, NextObs: p.obs[g.Step+1],
		GoalEpisode: goalEpisode, GoalStep: g.GoalStep, GoalOffset: g.GoalOffset,
		Goal: goal, Reward: g.Reward, Reached: g.Reward == 1, Strategy: strategy,
		Src: f.Src, SrcLine: f.Line,
	})
	if len(p.rows) >= packBatchRows {
		return p.end()
	}
	return nil
}

func (p *typedPairs[F]) end() error {
	if len(p.rows) == 0 {
		return nil
	}
	// Negatives' vectors point into p.neg; an append that grew it left the
	// earlier ones in the old array, which is never written again.
	_, err := p.w.Write(p.rows)
	p.rows = p.rows[:0]
	// The rows written no longer point into p.neg: it can be refilled.
	p.neg = p.neg[:0]
	return err
}

func (p *typedPairs[F]) Close() error { return p.w.Close() }

// Do implements pipeline.Stage.
func (st *Pack) Do(ctx context.Context, env *pipeline.Env, it pipeline.Item) (any, error) {
	in := it.Meta.(packInput)
	cfg := env.Config
	part := in.Episodes.Partition
	dir := pipeline.ItemDir(st.Name(), it.Key)
	cams := AllCameras(cfg)
	ft, err := schemas.NewFrameTable(cams, cfg.Float == "float32")
	if err != nil {
		return nil, err
	}
	camIdx := map[string][]int{}
	for name, e := range cfg.Embodiments {
		idx := make([]int, len(cams))
		for i, c := range cams {
			idx[i] = slices.Index(e.Cameras, c)
		}
		camIdx[name] = idx
	}
	sum := pipeline.PackSummary{Partition: part, Obs: map[string]*pipeline.Moments{}, Act: map[string]*pipeline.Moments{},
		Offsets: map[string]map[int32]int64{}, Reached: map[string]map[int32]int64{},
		Steps: map[string]map[int]int64{}, SourceFiles: map[string][]string{}}
	counts := map[[2]string]*pipeline.Count{}
	shards := map[[2]string]*shard{} // (table, split)
	// A shard of a split holds at most the partition's rows of its table.
	maxGroups := cmp.Or(st.MaxRowGroups, packMaxRowGroups)
	tableRows := map[string]int64{"frames": in.Episodes.Frames, "pairs": in.Goals.Pairs}
	options := func(table, split string) []parquet.WriterOption {
		return []parquet.WriterOption{
			parquet.Compression(st.codec(cfg.Parquet.Compression)),
			parquet.MaxRowsPerRowGroup(groupRows(int64(cfg.Parquet.RowGroupRows), tableRows[table], maxGroups)),
			parquet.CreatedBy("hindcast", pipeline.ToolVersion, ""),
			parquet.KeyValueMetadata("dataset", cfg.Dataset),
			parquet.KeyValueMetadata("table", table),
			parquet.KeyValueMetadata("split", split),
			parquet.KeyValueMetadata("partition", fmt.Sprint(part)),
			parquet.KeyValueMetadata("config_sha256", cfg.SHA256()),
			// Rows are sorted by episode, so row-group statistics already
			// locate an episode; the bloom filter answers "not in this
			// file" without reading a page (for lineage queries).
			parquet.BloomFilters(parquet.SplitBlockFilter(10, "episode")),
			// Per-page min/max of vector elements finds nothing a reader
			// asks for and costs a pass over every float; keys keep theirs.
			parquet.SkipPageBounds("obs", "list", "element"),
			parquet.SkipPageBounds("act", "list", "element"),
			parquet.SkipPageBounds("next_obs", "list", "element"),
			parquet.SkipPageBounds("goal", "list", "element"),
		}
	}
	open := func(table, split string) (*shard, error) {
		if s := shards[[2]string{table, split}]; s != nil {
			return s, nil
		}
		path := fmt.Sprintf("%s/split=%s/part-%s.parquet", table, split, pipeline.PartName(part))
		up, err := env.Work.Create(ctx, dir+path)
		if err != nil {
			return nil, err
		}
		hw := &hashWriter{w: up, h: sha256.New()}
		s := &shard{up: up, hw: hw, bw: bufio.NewWriterSize(hw, 1<<20),
			file: pipeline.PackedFile{Path: path, Work: dir + path, Table: table, Split: split, Partition: part}}
		opts := options(table, split)
		if table == "frames" {
			s.frames = parquet.NewWriter(s.bw, append(opts, ft.Schema)...)
		} else if cfg.Float == "float32" {
			s.pairs = &typedPairs[float32]{w: parquet.NewGenericWriter[schemas.PairRow[float32]](s.bw, append(opts, pairsSchema[float32]())...)}
		} else {
			s.pairs = &typedPairs[float64]{w: parquet.NewGenericWriter[schemas.PairRow[float64]](s.bw, append(opts, pairsSchema[float64]())...)}
		}
		shards[[2]string{table, split}] = s
		return s, nil
	}
	// Every way out before the last commit, a panic included, aborts the
	// shards still open: no temporary file or pending multipart upload is
	// left behind. Abort after Commit does nothing.
	defer func() {
		for _, s := range shards {
			s.up.Abort()
		}
	}()

	fr, c, err := pipeline.OpenFrames(ctx, env.Work, in.Episodes.File)
	if err != nil {
		return nil, err
	}
	defer c.Close()
	defer fr.Release()
	gr, gc, err := openGoals(ctx, env.Work, in.Goals.File)
	if err != nil {
		return nil, err
	}
	defer gc.Close()
	defer gr.Release()
	// Camera bytes come back here, from where ingest stored them, for
	// the frames table only.
	images := pipeline.NewImageReader(ctx, env.Work)
	defer images.Close()

	var (
		ep    []schemas.Frame // the current episode
		g     schemas.Goal
		haveG = gr.Next(&g)
		names = schemas.StrategyNames()
		f     schemas.Frame
		ok    = fr.Next(&f)
	)
	for ok {
		if err := ctx.Err(); err != nil {
			return nil, err
		}
		ep = ep[:0]
		id := f.Episode
		for ok && f.Episode == id {
			if len(ep) < cap(ep) {
				ep = ep[:len(ep)+1] // keeps the frame's buffers from an earlier episode
			} else {
				ep = append(ep, schemas.Frame{})
			}
			ep[len(ep)-1].CopyFrom(&f)
			if err := images.Load(&ep[len(ep)-1]); err != nil {
				return nil, fmt.Errorf("frames of %s: %w", id, err)
			}
			ok = fr.Next(&f)
		}
		key := id
		if cfg.SplitBy == "unit" {
			key = ep[0].Unit
		}
		split := pipeline.SplitOf(key, cfg.Splits)
		emb := ep[0].Embodiment
		cnt := counts[[2]string{emb, split}]
		if cnt == nil {
			cnt = &pipeline.Count{Embodiment: emb, Split: split}
			counts[[2]string{emb, split}] = cnt
		}
		cnt.Episodes++
		cnt.Frames += int64(len(ep))
		fs, err := open("frames", split)
		if err != nil {
			return nil, err
		}
		fs.file.Episodes++
		pipeline.AddCount(sum.Steps, emb, len(ep), 1)
		for i := range ep {
			if files := sum.SourceFiles[ep[i].Src]; len(files) == 0 || files[len(files)-1] != fs.file.Path {
				if !slices.Contains(files, fs.file.Path) {
					sum.SourceFiles[ep[i].Src] = append(files, fs.file.Path)
				}
			}
		}
		// Rows go to the writer packBatchRows at a time, so a long episode
		// costs its frames, not also a row per frame.
		for start := 0; start < len(ep); start += packBatchRows {
			rows := fs.rowsBuf[:0]
			for i := start; i < min(start+packBatchRows, len(ep)); i++ {
				var r parquet.Row
				if j := i - start; j < cap(rows) {
					r = rows[:j+1][j] // reuse the row's memory from an earlier batch
				}
				rows = append(rows, ft.Row(r, &ep[i], camIdx[emb]))
			}
			fs.rowsBuf = rows
			if _, err := fs.frames.WriteRows(fs.rowsBuf); err != nil {
				return nil, fmt.Errorf("write frames of %s: %w", id, err)
			}
		}
		for i := range ep {
			for _, b := range ep[i].Img {
				fs.imgBytes += int64(len(b))
			}
		}
		if limit := cmp.Or(st.GroupImageBytes, packGroupImageBytes); fs.imgBytes >= limit {
			if err := fs.frames.Flush(); err != nil {
				return nil, fmt.Errorf("write frames of %s: %w", id, err)
			}
			fs.imgBytes = 0
		}
		fs.file.Rows += int64(len(ep))
		if split == "train" {
			addMoments(sum.Obs, sum.Act, ep)
		}
		var ps *shard
		for haveG && g.Episode == id {
			if ps == nil {
				if ps, err = open("pairs", split); err != nil {
					return nil, err
				}
				ps.file.Episodes++
				ps.pairs.begin(ep, cfg.Embodiments[emb].GoalDims)
			}
			if int(g.Step)+1 >= len(ep) || int(g.GoalStep) >= len(ep) && g.Strategy != schemas.Negative {
				return nil, fmt.Errorf("goal of %s at step %d beyond its %d steps", id, g.Step, len(ep))
			}
			name := names[g.Strategy]
			if err := ps.pairs.add(&g, g.GoalEpisode, name); err != nil {
				return nil, fmt.Errorf("write pairs of %s: %w", id, err)
			}
			ps.file.Rows++
			cnt.Pairs++
			pipeline.AddCount(sum.Offsets, name, g.GoalOffset, 1)
			if g.Reward == 1 {
				pipeline.AddCount(sum.Reached, name, g.GoalOffset, 1)
			}
			haveG = gr.Next(&g)
		}
		if ps != nil {
			if err := ps.pairs.end(); err != nil {
				return nil, fmt.Errorf("write pairs of %s: %w", id, err)
			}
		}
		if haveG && g.Episode < id {
			return nil, fmt.Errorf("goals out of step with episodes at %s", g.Episode)
		}
	}
	if err := fr.Err(); err != nil {
		return nil, fmt.Errorf("read %s: %w", in.Episodes.File, err)
	}
	if err := gr.Err(); err != nil {
		return nil, fmt.Errorf("read %s: %w", in.Goals.File, err)
	}
	if haveG {
		return nil, fmt.Errorf("goal for unknown episode %s", g.Episode)
	}
	for _, k := range sortedPairKeys(shards) {
		s := shards[k]
		var err error
		if s.frames != nil {
			err = s.frames.Close()
		} else {
			err = s.pairs.Close()
		}
		if err == nil {
			err = s.bw.Flush()
		}
		if err != nil {
			return nil, fmt.Errorf("close %s: %w", s.file.Path, err)
		}
		s.file.Bytes = s.hw.n
		s.file.SHA256 = hex.EncodeToString(s.hw.h.Sum(nil))
		if err := s.up.Commit(false); err != nil {
			return nil, err
		}
		sum.Files = append(sum.Files, s.file)
	}
	for _, k := range sortedPairKeys(counts) {
		sum.Counts = append(sum.Counts, *counts[k])
	}
	return sum, nil
}

func openGoals(ctx context.Context, work pipeline.Store, key string) (*pipeline.GoalReader, io.Closer, error) {
	rc, err := work.Open(ctx, key, 0)
	if err != nil {
		return nil, nil, err
	}
	gr, err := pipeline.NewGoalReader(rc)
	if err != nil {
		rc.Close()
		return nil, nil, fmt.Errorf("read goals %s: %w", key, err)
	}
	return gr, rc, nil
}

func addMoments(obs, act map[string]*pipeline.Moments, ep []schemas.Frame) {
	emb := ep[0].Embodiment
	mo, ma := obs[emb], act[emb]
	if mo == nil {
		mo, ma = &pipeline.Moments{}, &pipeline.Moments{}
		obs[emb], act[emb] = mo, ma
	}
	for i := range ep {
		mo.Add(ep[i].Obs)
		if ep[i].HasAct {
			ma.Add(ep[i].Act)
		}
	}
}

// sortedPairKeys orders (table or embodiment, split) keys, so files and
// counts come out in the same order whatever the map's.
func sortedPairKeys[V any](m map[[2]string]V) [][2]string {
	keys := make([][2]string, 0, len(m))
	for k := range m {
		keys = append(keys, k)
	}
	sort.Slice(keys, func(i, j int) bool {
		if keys[i][0] != keys[j][0] {
			return keys[i][0] < keys[j][0]
		}
		return keys[i][1] < keys[j][1]
	})
	return keys
}
