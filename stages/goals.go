package stages

import (
	"bufio"
	"context"
	"crypto/sha256"
	"encoding/binary"
	"encoding/json"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"os"
	"slices"

	"hindcast/pipeline"
	"hindcast/schemas"
)

// Goals relabels every step of every episode with goals drawn from its own
// future (hindsight relabeling, SPEC §3.3) and computes their rewards.
type Goals struct{}

// Name implements pipeline.Stage.
func (Goals) Name() string { return "goals" }

type goalEmbodiment struct {
	GoalDims      []int   `json:"goal_dims"`
	GoalTolerance float64 `json:"goal_tolerance"`
}

// Reads implements pipeline.Stage.
func (Goals) Reads(cfg *pipeline.Config) any {
	embs := map[string]goalEmbodiment{}
	for name, e := range cfg.Embodiments {
		embs[name] = goalEmbodiment{e.GoalDims, e.GoalTolerance}
	}
	// The splits decide which episodes a negative may come from.
	return map[string]any{"goals": cfg.Goals, "seed": cfg.Seed, "embodiments": embs,
		"splits": cfg.Splits, "split_by": cfg.SplitBy}
}

// Items implements pipeline.Stage: one item per partition, keyed by that
// partition's episodes.
func (Goals) Items(ctx context.Context, env *pipeline.Env, ckey string, up map[string][]pipeline.Sealed) ([]pipeline.Item, error) {
	var items []pipeline.Item
	for _, s := range up["episodes"] {
		var sum pipeline.EpisodesSummary
		if err := json.Unmarshal(s.Summary, &sum); err != nil {
			return nil, fmt.Errorf("episodes %s: summary: %w", s.Item.ID, err)
		}
		items = append(items, pipeline.Item{ID: s.Item.ID, Key: pipeline.HashParts(ckey, s.Item.Key), Bytes: sum.Frames * frameBytes, Meta: sum})
	}
	return items, nil
}

// Do implements pipeline.Stage.
func (st Goals) Do(ctx context.Context, env *pipeline.Env, it pipeline.Item) (any, error) {
	eps := it.Meta.(pipeline.EpisodesSummary)
	cfg := env.Config
	sum := pipeline.GoalsSummary{Partition: eps.Partition, File: pipeline.ItemDir(st.Name(), it.Key) + "goals.arrow", PerStrategy: map[string]int64{}}
	// The partition's episodes, for the negatives' draws: one partition's
	// list in memory at a time.
	infos, err := pipeline.ReadEpisodeIndex(ctx, env.Work, eps.Index)
	if err != nil {
		return nil, err
	}
	var neg *negatives
	if cfg.Goals.Negative > 0 {
		if neg, err = loadNegatives(ctx, env, eps, infos); err != nil {
			return nil, err
		}
		defer neg.close()
	}
	fr, c, err := pipeline.OpenFrames(ctx, env.Work, eps.File)
	if err != nil {
		return nil, err
	}
	defer c.Close()
	defer fr.Release()
	up, err := env.Work.Create(ctx, sum.File)
	if err != nil {
		return nil, err
	}
	gw := pipeline.NewGoalWriter(up)
	var (
		f    schemas.Frame
		proj [][]float64 // goal-dim projection of each step of the episode
		idx  int         // episode index in the partition
		ok   = fr.Next(&f)
	)
	for ok {
		id, emb := f.Episode, cfg.Embodiments[f.Embodiment]
		proj = proj[:0]
		for ok && f.Episode == id {
			proj = append(proj, project(nil, f.Obs, emb.GoalDims))
			ok = fr.Next(&f)
		}
		n, err := relabel(cfg, emb, id, idx, infos, proj, neg, func(g *schemas.Goal) error {
			sum.PerStrategy[g.Strategy.String()]++
			return gw.Write(g)
		})
		if err != nil {
			up.Abort()
			return nil, fmt.Errorf("episode %s: %w", id, err)
		}
		sum.Pairs += n
		idx++
	}
	if err := fr.Err(); err != nil {
		up.Abort()
		return nil, fmt.Errorf("read %s: %w", eps.File, err)
	}
	if err := gw.Close(); err != nil {
		up.Abort()
		return nil, fmt.Errorf("write %s: %w", sum.File, err)
	}
	return sum, up.Commit(false)
}

func project(dst, obs []float64, dims []int) []float64 {
	for _, d := range dims {
		dst = append(dst, obs[d])
	}
	return dst
}

// EpisodeRNG is the generator of one episode's draws, seeded by (seed,
// episode id) alone, so a draw never depends on which worker ran it or on
// what else is in the partition.
func EpisodeRNG(seed int64, episode string) *rand.Rand {
	return streamRNG("hindcast-goals", seed, episode)
}

// NegativeRNG is the generator of one episode's negative draws. It is a
// stream of its own so that an episode's future, geometric and final goals
// stay the same whether or not negatives can be drawn for it (which depends
// on the other episodes in its partition).
func NegativeRNG(seed int64, episode string) *rand.Rand {
	return streamRNG("hindcast-negatives", seed, episode)
}

func streamRNG(stream string, seed int64, episode string) *rand.Rand {
	h := sha256.New()
	var b [8]byte
	binary.BigEndian.PutUint64(b[:], uint64(seed))
	h.Write([]byte(stream + "\x00"))
	h.Write(b[:])
	h.Write([]byte(episode))
	s := h.Sum(nil)
	return rand.New(rand.NewPCG(binary.BigEndian.Uint64(s[0:8]), binary.BigEndian.Uint64(s[8:16])))
}

// UniformOffset draws an offset uniformly on 1…n ("future" strategy,
// Andrychowicz et al. 2017).
func UniformOffset(r *rand.Rand, n int) int { return 1 + r.IntN(n) }

// GeometricOffset draws k on 1…n with P(k) ∝ (1−γ)γ^(k−1), by inverting the
// truncated law's CDF F(k) = (1−γ^k)/(1−γ^n): k = ⌊ln(1 − u(1−γ^n)) / ln γ⌋ + 1
// for u uniform on [0,1) (the discounted future-state distribution of
// C-learning, Eysenbach et al. 2021).
func GeometricOffset(r *rand.Rand, gamma float64, n int) int {
	u := r.Float64()
	lg := math.Log(gamma)
	tail := -math.Expm1(float64(n) * lg) // 1 − γ^n, accurate for small n·|ln γ|
	k := int(math.Floor(math.Log1p(-u*tail)/lg)) + 1
	return min(max(k, 1), n)
}

// L2 is the Euclidean distance between a and b.
func L2(a, b []float64) float64 {
	var s float64
	for i := range a {
		d := a[i] - b[i]
		s += d * d
	}
	return math.Sqrt(s)
}

// relabel draws every goal of one episode of T steps (proj holds each step's
// goal-dim projection), in the pairs table's order: step, then strategy
// (future, geometric, final, negative), then draw.
func relabel(cfg *pipeline.Config, emb *pipeline.Embodiment, id string, idx int, all []pipeline.EpisodeInfo,
	proj [][]float64, neg *negatives, out func(*schemas.Goal) error) (int64, error) {
	T := len(proj)
	if T < 2 {
		return 0, nil
	}
	gc := cfg.Goals
	r := EpisodeRNG(cfg.Seed, id)
	var n int64
	g := schemas.Goal{Episode: id}
	// The other episodes of the same embodiment and split in this
	// partition, for negatives (SPEC §3.3: a goal never crosses a split);
	// self is this episode's position among them.
	var others []int
	self := 0
	var negBuf []float64
	var nr *rand.Rand
	if neg != nil {
		others = neg.pool[negKey{all[idx].Embodiment, EpisodeSplit(cfg, all[idx])}]
		self, _ = slices.BinarySearch(others, idx)
	}
	emit := func(s schemas.Strategy, gep string, gstep, off int, goal []float64, next []float64) error {
		g.Strategy, g.GoalEpisode, g.GoalStep, g.GoalOffset = s, gep, int32(gstep), int32(off)
		g.Goal = append(g.Goal[:0], goal...)
		g.Reward = 0
		if L2(next, goal) <= emb.GoalTolerance {
			g.Reward = 1
		}
		n++
		return out(&g)
	}
	for step := 0; step < T-1; step++ {
		g.Step = int32(step)
		next := proj[step+1]
		limit := T - 1 - step
		if gc.Horizon > 0 {
			limit = min(limit, gc.Horizon)
		}
		for range gc.Future {
			k := UniformOffset(r, limit)
			if err := emit(schemas.Future, id, step+k, k, proj[step+k], next); err != nil {
				return n, err
			}
		}
		for range gc.Geometric {
			k := GeometricOffset(r, gc.Gamma, limit)
			if err := emit(schemas.Geometric, id, step+k, k, proj[step+k], next); err != nil {
				return n, err
			}
		}
		for range gc.Final {
			if err := emit(schemas.Final, id, T-1, T-1-step, proj[T-1], next); err != nil {
				return n, err
			}
		}
		if neg == nil || len(others) < 2 {
			continue
		}
		if nr == nil {
			nr = NegativeRNG(cfg.Seed, id)
		}
		for range gc.Negative {
			// A draw on the other episodes: positions 0…m−2, shifted past self.
			pos := nr.IntN(len(others) - 1)
			if pos >= self {
				pos++
			}
			ep := others[pos]
			gs := nr.IntN(all[ep].Steps)
			goal, err := neg.goal(negBuf, ep, gs)
			if err != nil {
				return n, err
			}
			negBuf = goal
			if err := emit(schemas.Negative, all[ep].ID, gs, -1, goal, next); err != nil {
				return n, err
			}
		}
	}
	return n, nil
}

// negatives gives random access to the goal-dim projections of every frame
// of a partition, through a scratch file on local disk, so that negative
// goals can come from any episode without the partition in memory.
type negatives struct {
	f      *os.File
	pool   map[negKey][]int // episode indexes per embodiment and split, ascending
	offset []int64          // byte offset of each episode's first projection
	width  []int            // projection length per episode
}

// negKey names a pool of negatives: the episodes of one embodiment in one
// split (within one partition).
type negKey struct{ embodiment, split string }

// EpisodeSplit is the split of an episode (SPEC §3.4), keyed by its id or,
// for split_by: unit, by its unit, exactly as pack assigns it.
func EpisodeSplit(cfg *pipeline.Config, e pipeline.EpisodeInfo) string {
	key := e.ID
	if cfg.SplitBy == "unit" {
		key = e.Unit
	}
	return pipeline.SplitOf(key, cfg.Splits)
}

func loadNegatives(ctx context.Context, env *pipeline.Env, eps pipeline.EpisodesSummary, infos []pipeline.EpisodeInfo) (*negatives, error) {
	tmp, err := os.CreateTemp("", "hindcast-goals-*")
	if err != nil {
		return nil, err
	}
	os.Remove(tmp.Name()) // unlinked now, freed when closed, even after a crash
	neg := &negatives{f: tmp, pool: map[negKey][]int{}}
	var off int64
	for i, e := range infos {
		k := negKey{e.Embodiment, EpisodeSplit(env.Config, e)}
		neg.pool[k] = append(neg.pool[k], i)
		w := len(env.Config.Embodiments[e.Embodiment].GoalDims)
		neg.offset = append(neg.offset, off)
		neg.width = append(neg.width, w)
		off += int64(e.Steps * w * 8)
	}
	fr, c, err := pipeline.OpenFrames(ctx, env.Work, eps.File)
	if err != nil {
		tmp.Close()
		return nil, err
	}
	defer c.Close()
	defer fr.Release()
	bw := bufio.NewWriterSize(tmp, 1<<20)
	var f schemas.Frame
	var b [8]byte
	for fr.Next(&f) {
		for _, d := range env.Config.Embodiments[f.Embodiment].GoalDims {
			binary.LittleEndian.PutUint64(b[:], math.Float64bits(f.Obs[d]))
			bw.Write(b[:])
		}
	}
	if err := fr.Err(); err != nil {
		tmp.Close()
		return nil, fmt.Errorf("read %s: %w", eps.File, err)
	}
	if err := bw.Flush(); err != nil {
		tmp.Close()
		return nil, fmt.Errorf("goals scratch: %w", err)
	}
	return neg, nil
}

// goal reads the projection of step of episode ep into dst.
func (n *negatives) goal(dst []float64, ep, step int) ([]float64, error) {
	w := n.width[ep]
	buf := make([]byte, 8*w)
	if _, err := n.f.ReadAt(buf, n.offset[ep]+int64(step*w*8)); err != nil && err != io.EOF {
		return nil, fmt.Errorf("goals scratch: %w", err)
	}
	dst = dst[:0]
	for i := range w {
		dst = append(dst, math.Float64frombits(binary.LittleEndian.Uint64(buf[8*i:])))
	}
	return dst, nil
}

func (n *negatives) close() { n.f.Close() }
