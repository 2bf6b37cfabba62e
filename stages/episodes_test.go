package stages

import (
	"fmt"
	"maps"
	"math"
	"slices"
	"strings"
	"testing"
	"time"

	"hindcast/pipeline"
	"hindcast/schemas"
)

// Tests of SPEC §3.2 (episodes): first through the segmenter alone, fed
// frames in (unit, t, object key, line) order as the merge delivers them,
// then through the whole pipeline, where the order comes from merging the
// ingest runs. Expected episodes are written out by hand.

// segFrame is a frame of embodiment arm whose obs encodes its time, from
// object src at line.
func segFrame(unit string, t int64, src string, line int64) schemas.Frame {
	return schemas.Frame{Unit: unit, Embodiment: "arm", T: t, Src: src, Line: line,
		Obs: []float64{float64(t), 0.5}, Act: []float64{0.25}, HasAct: true}
}

// segmented is what the segmenter emitted and dropped.
type segmented struct {
	episodes [][]schemas.Frame
	dropped  map[string]map[string]int // source key → reason → frames
}

// segment runs the segmenter over frames (already in merge order).
func segment(t *testing.T, cfg pipeline.EpisodeConfig, frames []schemas.Frame) segmented {
	t.Helper()
	out := segmented{dropped: map[string]map[string]int{}}
	s := newSegmenter(cfg, func(f *schemas.Frame, reason string) {
		src := f.Src
		if out.dropped[src] == nil {
			out.dropped[src] = map[string]int{}
		}
		out.dropped[src][reason]++
	}, func(ep []schemas.Frame) error {
		cp := make([]schemas.Frame, len(ep))
		for i := range ep {
			cp[i].CopyFrom(&ep[i])
		}
		out.episodes = append(out.episodes, cp)
		return nil
	})
	for i := range frames {
		if err := s.feed(&frames[i]); err != nil {
			t.Fatalf("feed frame %d: %v", i, err)
		}
	}
	if err := s.finish(); err != nil {
		t.Fatalf("finish: %v", err)
	}
	return out
}

// wantEpisode is one expected episode: its id and the t of each step.
type wantEpisode struct {
	id string
	ts []int64
}

// checkEpisodes asserts the episodes in emission order: ids, the t of each
// step, steps numbered 0…n−1, and last set on the final step only (SPEC
// §3.2, §4).
func checkEpisodes(t *testing.T, got [][]schemas.Frame, want []wantEpisode) {
	t.Helper()
	var g, w []string
	for _, ep := range got {
		var ts []int64
		for _, f := range ep {
			ts = append(ts, f.T)
		}
		g = append(g, fmt.Sprintf("%s%v", ep[0].Episode, ts))
	}
	for _, ep := range want {
		w = append(w, fmt.Sprintf("%s%v", ep.id, ep.ts))
	}
	if !slices.Equal(g, w) {
		t.Fatalf("episodes\n got  %v\n want %v", g, w)
	}
	for _, ep := range got {
		for i, f := range ep {
			if f.Episode != ep[0].Episode || f.Step != int32(i) || f.Last != (i == len(ep)-1) {
				t.Errorf("episode %s frame %d: episode %s step %d last %v", ep[0].Episode, i, f.Episode, f.Step, f.Last)
			}
		}
	}
}

func epCfg(maxGap time.Duration, min, max int) pipeline.EpisodeConfig {
	return pipeline.EpisodeConfig{MaxGap: pipeline.Duration(maxGap), MinSteps: min, MaxSteps: max}
}

// TestSegmenterEvents: an episode starts at a unit's first frame, at ev
// start, and at the frame after ev end; an end followed by a start is one
// boundary, not two; a unit change always starts one (SPEC §3.2).
func TestSegmenterEvents(t *testing.T) {
	ev := map[int64]schemas.Event{1: schemas.EvStart, 4: schemas.EvStart, 6: schemas.EvEnd, 7: schemas.EvStart,
		9: schemas.EvEnd, 11: schemas.EvEnd, 12: schemas.EvStart, 13: schemas.EvStart}
	var frames []schemas.Frame
	for ts := int64(1); ts <= 14; ts++ {
		f := segFrame("u", ts, "a.jsonl", ts)
		f.Ev = ev[ts]
		frames = append(frames, f)
	}
	// Unit v continues in time right after u: still a new episode.
	frames = append(frames, segFrame("v", 15, "a.jsonl", 15), segFrame("v", 16, "a.jsonl", 16))
	got := segment(t, epCfg(time.Hour, 2, 500), frames)
	checkEpisodes(t, got.episodes, []wantEpisode{
		{"u-1", []int64{1, 2, 3}},
		{"u-4", []int64{4, 5, 6}},
		{"u-7", []int64{7, 8, 9}},
		{"u-10", []int64{10, 11}},
		// [12] alone (start, then start again) is shorter than min_steps 2.
		{"u-13", []int64{13, 14}},
		{"v-15", []int64{15, 16}},
	})
	if w := map[string]map[string]int{"a.jsonl": {pipeline.ShortEpisode: 1}}; !equalDrops(got.dropped, w) {
		t.Errorf("dropped %v, want %v", got.dropped, w)
	}
}

func equalDrops(a, b map[string]map[string]int) bool {
	return maps.EqualFunc(a, b, func(x, y map[string]int) bool { return maps.Equal(x, y) })
}

// TestSegmenterGaps: a gap of exactly max_gap does not split, one
// nanosecond more does ("more than max_gap", SPEC §3.2); the gap is to the
// previous kept frame, so a duplicate in between changes nothing; and a gap
// wider than int64 (from near math.MinInt64 to near math.MaxInt64) splits.
func TestSegmenterGaps(t *testing.T) {
	var frames []schemas.Frame
	for i, ts := range []int64{0, 100, 200, 301, 401} {
		frames = append(frames, segFrame("u", ts, "a.jsonl", int64(i+1)))
	}
	frames = append(frames, segFrame("u", 401, "b.jsonl", 1)) // a duplicate of t=401
	for i, ts := range []int64{502, 602} {
		frames = append(frames, segFrame("u", ts, "a.jsonl", int64(i+6)))
	}
	for i, ts := range []int64{math.MinInt64 + 1, math.MinInt64 + 2, math.MaxInt64 - 1, math.MaxInt64} {
		frames = append(frames, segFrame("w", ts, "a.jsonl", int64(i+8)))
	}
	got := segment(t, epCfg(100*time.Nanosecond, 2, 500), frames)
	checkEpisodes(t, got.episodes, []wantEpisode{
		{"u-0", []int64{0, 100, 200}},
		{"u-301", []int64{301, 401}},
		{"u-502", []int64{502, 602}},
		{"w--9223372036854775807", []int64{math.MinInt64 + 1, math.MinInt64 + 2}},
		{"w-9223372036854775806", []int64{math.MaxInt64 - 1, math.MaxInt64}},
	})
	if w := map[string]map[string]int{"b.jsonl": {pipeline.Duplicate: 1}}; !equalDrops(got.dropped, w) {
		t.Errorf("dropped %v, want %v", got.dropped, w)
	}
}

// TestSegmenterChunks: an episode longer than max_steps is cut into chunks
// of max_steps, the last shorter, each with its own id (the t of its first
// frame) and steps from 0; an episode of exactly k·max_steps gives k chunks
// and no empty one; a chunk under min_steps is dropped as short_episode,
// charged to each frame's own source (SPEC §3.2).
func TestSegmenterChunks(t *testing.T) {
	run := func(unit string, n int, src func(i int) string) []schemas.Frame {
		var fs []schemas.Frame
		for i := range n {
			fs = append(fs, segFrame(unit, 1000+10*int64(i), src(i), int64(i+1)))
		}
		return fs
	}
	ts := func(from, to int) []int64 { // t of frames from … to−1
		var out []int64
		for i := from; i < to; i++ {
			out = append(out, 1000+10*int64(i))
		}
		return out
	}
	id := func(unit string, i int) string { return fmt.Sprintf("%s-%d", unit, 1000+10*i) }
	one := func(int) string { return "a.jsonl" }

	t.Run("1234 by 500", func(t *testing.T) {
		got := segment(t, epCfg(time.Hour, 2, 500), run("u", 1234, one))
		checkEpisodes(t, got.episodes, []wantEpisode{
			{id("u", 0), ts(0, 500)}, {id("u", 500), ts(500, 1000)}, {id("u", 1000), ts(1000, 1234)}})
		if len(got.dropped) != 0 {
			t.Errorf("dropped %v, want none", got.dropped)
		}
	})
	t.Run("1000 by 500", func(t *testing.T) {
		got := segment(t, epCfg(time.Hour, 2, 500), run("u", 1000, one))
		checkEpisodes(t, got.episodes, []wantEpisode{{id("u", 0), ts(0, 500)}, {id("u", 500), ts(500, 1000)}})
	})
	t.Run("1005 by 500, min 10", func(t *testing.T) {
		// The 5 frames of the last chunk come from two objects.
		src := func(i int) string {
			if i >= 1000 && i%2 == 1 {
				return "b.jsonl"
			}
			return "a.jsonl"
		}
		got := segment(t, epCfg(time.Hour, 10, 500), run("u", 1005, src))
		checkEpisodes(t, got.episodes, []wantEpisode{{id("u", 0), ts(0, 500)}, {id("u", 500), ts(500, 1000)}})
		// Frames 1000…1004: 1001 and 1003 from b.jsonl.
		w := map[string]map[string]int{"a.jsonl": {pipeline.ShortEpisode: 3}, "b.jsonl": {pipeline.ShortEpisode: 2}}
		if !equalDrops(got.dropped, w) {
			t.Errorf("dropped %v, want %v", got.dropped, w)
		}
	})
	t.Run("chunks restart at an event", func(t *testing.T) {
		// 600 frames, ev end on frame 549: episodes of 550 (→ 500 + 50) and
		// 50, with max 500 and min 50.
		fs := run("u", 600, one)
		fs[549].Ev = schemas.EvEnd
		got := segment(t, epCfg(time.Hour, 50, 500), fs)
		checkEpisodes(t, got.episodes, []wantEpisode{
			{id("u", 0), ts(0, 500)}, {id("u", 500), ts(500, 550)}, {id("u", 550), ts(550, 600)}})
	})
}

// TestSegmenterSameTime: among frames of a unit with equal t, the first in
// (t, object key, line) order is kept; each later one is a duplicate when
// its content (embodiment, obs, act, ev, task, success, img as written)
// equals the kept frame's, else a conflict (SPEC §3.2). Object key and line
// are not content. The comparison is with the kept frame, not with the
// previous dropped one. Dropped frames take no part in the episodes (an ev
// end on a dropped frame ends nothing).
func TestSegmenterSameTime(t *testing.T) {
	img := func(f *schemas.Frame, ref string) {
		f.ImgRef, f.Img = []string{ref}, [][]byte{[]byte("same bytes")}
	}
	type variant struct {
		name   string
		change func(f *schemas.Frame)
		reason string
	}
	variants := []variant{
		{"identical", func(*schemas.Frame) {}, pipeline.Duplicate},
		{"obs", func(f *schemas.Frame) { f.Obs[1] = 0.75 }, pipeline.Conflict},
		{"act absent", func(f *schemas.Frame) { f.Act, f.HasAct = nil, false }, pipeline.Conflict},
		{"act", func(f *schemas.Frame) { f.Act[0] = -0.25 }, pipeline.Conflict},
		{"ev end", func(f *schemas.Frame) { f.Ev = schemas.EvEnd }, pipeline.Conflict},
		{"empty task vs none", func(f *schemas.Frame) { f.HasTask = true }, pipeline.Conflict},
		{"success false vs none", func(f *schemas.Frame) { f.HasSuccess = true }, pipeline.Conflict},
		{"success value", func(f *schemas.Frame) { f.HasSuccess, f.Success = true, true }, pipeline.Conflict},
		{"task text", func(f *schemas.Frame) { f.HasTask, f.Task = true, "pick" }, pipeline.Conflict},
		{"img ref", func(f *schemas.Frame) { img(f, "frames/b.png") }, pipeline.Conflict},
		{"embodiment", func(f *schemas.Frame) { f.Embodiment = "arm2" }, pipeline.Conflict},
		{"same img ref", func(f *schemas.Frame) { img(f, "frames/a.png") }, pipeline.Duplicate},
	}
	var frames []schemas.Frame
	var wantTs []int64
	wantDrops := map[string]map[string]int{"b.jsonl": {}, "c.jsonl": {}}
	for i, v := range variants {
		ts := int64(10 * (i + 1))
		kept := segFrame("u", ts, "a.jsonl", int64(i+1))
		img(&kept, "frames/a.png")
		later := segFrame("u", ts, "b.jsonl", int64(i+1))
		img(&later, "frames/a.png")
		v.change(&later)
		frames = append(frames, kept, later)
		wantTs = append(wantTs, ts)
		wantDrops["b.jsonl"][v.reason]++
	}
	// Three at one t: b differs (conflict), c equals the kept a (duplicate).
	ts := int64(10 * (len(variants) + 1))
	a, b, c := segFrame("u", ts, "a.jsonl", 99), segFrame("u", ts, "b.jsonl", 99), segFrame("u", ts, "c.jsonl", 1)
	img(&a, "frames/a.png")
	img(&b, "frames/a.png")
	img(&c, "frames/a.png")
	b.Obs[1] = 9
	frames = append(frames, a, b, c)
	wantTs = append(wantTs, ts)
	wantDrops["b.jsonl"][pipeline.Conflict]++
	wantDrops["c.jsonl"][pipeline.Duplicate]++

	got := segment(t, epCfg(time.Hour, 2, 500), frames)
	checkEpisodes(t, got.episodes, []wantEpisode{{"u-10", wantTs}})
	for _, f := range got.episodes[0] {
		if f.Src != "a.jsonl" || f.Obs[1] != 0.5 || f.Ev != schemas.EvNone {
			t.Errorf("t=%d: kept the frame of %s (obs %v, ev %d), want the first, from a.jsonl", f.T, f.Src, f.Obs, f.Ev)
		}
	}
	if !equalDrops(got.dropped, wantDrops) {
		t.Errorf("dropped %v, want %v", got.dropped, wantDrops)
	}
}

// episodesConfig is the pipeline config of the episode tests; %s takes
// extra top-level keys.
func episodesConfig(maxGap string, min, max int, extra string) string {
	return fmt.Sprintf(`
dataset: episodes
partitions: 1
embodiments:
  arm: {obs: 3, act: 2, obs_low: -10, obs_high: 10, goal_tolerance: 0.1}
episodes: {max_gap: %s, min_steps: %d, max_steps: %d}
goals: {future: 1, geometric: 0, final: 0, negative: 0}
splits: {train: 1}
%s`, maxGap, min, max, extra)
}

// t0 is 2025-11-30T08:00:00Z in nanoseconds: a realistic capture time.
const t0 = int64(1764489600) * int64(time.Second)

// episodeIndex is the committed frames grouped by episode: per episode id,
// the (t, src, src_line) of each step in step order, with last checked.
func episodeIndex[F float32 | float64](t *testing.T, rows []shardFrame[F]) map[string][]string {
	t.Helper()
	out := map[string][]string{}
	for i, f := range rows {
		if int(f.Step) != len(out[f.Episode]) {
			t.Fatalf("episode %s: step %d at position %d", f.Episode, f.Step, len(out[f.Episode]))
		}
		last := i == len(rows)-1 || rows[i+1].Episode != f.Episode
		if f.Last != last {
			t.Errorf("episode %s step %d: last %v, want %v", f.Episode, f.Step, f.Last, last)
		}
		out[f.Episode] = append(out[f.Episode], fmt.Sprintf("%d@%s:%d", f.T, f.Src, f.SrcLine))
	}
	return out
}

// TestEpisodesPipelineBoundaries: gaps (500ms exactly vs 500ms + 1ns) and
// events through the whole pipeline, and a short episode charged to its
// source.
func TestEpisodesPipelineBoundaries(t *testing.T) {
	ms := int64(time.Millisecond)
	ts := []int64{t0, t0 + 500*ms, t0 + 1000*ms + 1, t0 + 1500*ms + 1, t0 + 1600*ms, t0 + 1700*ms, t0 + 1800*ms}
	extra := map[int]string{3: `,"ev":"end"`, 5: `,"ev":"start"`}
	var lines []string
	for i, tt := range ts {
		lines = append(lines, armLine("e1", tt, extra[i]))
	}
	r := runPipelineAt(t, episodesConfig("500ms", 2, 500, ""), map[string][]byte{"g.jsonl": jsonLines(lines...)})
	// Lines 1-2 (gap exactly 500ms); 3-4 (gap 500ms+1ns from 2; 4 ends);
	// 5 alone (after the end, then 6 starts): short; 6-7.
	srcs := []srcWant{{"g.jsonl", 7, 6, map[string]int64{pipeline.ShortEpisode: 1}}}
	wantSource(t, r.Manifest, "g.jsonl", 7, 6, srcs[0].dropped)
	wantFunnel(t, r.Manifest, funnelOf(1, 0, srcs, 6, 3, 3))
	at := func(i int) string { return fmt.Sprintf("%d@g.jsonl:%d", ts[i], i+1) }
	want := map[string][]string{
		fmt.Sprintf("e1-%d", ts[0]): {at(0), at(1)},
		fmt.Sprintf("e1-%d", ts[2]): {at(2), at(3)},
		fmt.Sprintf("e1-%d", ts[5]): {at(5), at(6)},
	}
	if got := episodeIndex(t, readShardFrames[float32](t, r)); !maps.EqualFunc(got, want, slices.Equal) {
		t.Errorf("episodes %v, want %v", got, want)
	}
}

// TestEpisodesPipelineChunks: 1,234 consecutive steps with max_steps 500
// give episodes of 500, 500 and 234; 1,005 steps with min_steps 10 give 500,
// 500 and 5 short_episode drops. Unit mix has 5 frames in two objects, one
// episode under min_steps: each object is charged its own frames (SPEC §5).
func TestEpisodesPipelineChunks(t *testing.T) {
	ms := int64(time.Millisecond)
	var chunk, short []string
	for i := range 1234 {
		chunk = append(chunk, armLine("ch", t0+int64(i)*ms, ""))
	}
	for i := range 1005 {
		short = append(short, armLine("sh", t0+int64(i)*ms, ""))
	}
	for _, i := range []int64{1, 3, 5} {
		chunk = append(chunk, armLine("mix", t0+i*ms, ""))
	}
	for _, i := range []int64{2, 4} {
		short = append(short, armLine("mix", t0+i*ms, ""))
	}
	r := runPipelineAt(t, episodesConfig("500ms", 10, 500, ""), map[string][]byte{
		"chunk.jsonl": jsonLines(chunk...), "short.jsonl": jsonLines(short...)})
	srcs := []srcWant{
		{"chunk.jsonl", 1237, 1234, map[string]int64{pipeline.ShortEpisode: 3}},
		{"short.jsonl", 1007, 1000, map[string]int64{pipeline.ShortEpisode: 5 + 2}},
	}
	for _, s := range srcs {
		wantSource(t, r.Manifest, s.key, s.lines, s.kept, s.dropped)
	}
	wantFunnel(t, r.Manifest, funnelOf(2, 0, srcs, 2234, 5, 499+499+233+499+499))

	got := episodeIndex(t, readShardFrames[float32](t, r))
	steps := map[string]int{}
	for id, s := range got {
		steps[id] = len(s)
	}
	id := func(unit string, i int64) string { return fmt.Sprintf("%s-%d", unit, t0+i*ms) }
	wantSteps := map[string]int{id("ch", 0): 500, id("ch", 500): 500, id("ch", 1000): 234, id("sh", 0): 500, id("sh", 500): 500}
	if !maps.Equal(steps, wantSteps) {
		t.Fatalf("episode steps %v, want %v", steps, wantSteps)
	}
	// Chunk k's step s is line 500k+s+1 of its object.
	for _, c := range []struct {
		unit, src string
		first     int64
	}{{"ch", "chunk.jsonl", 0}, {"ch", "chunk.jsonl", 500}, {"ch", "chunk.jsonl", 1000}, {"sh", "short.jsonl", 0}, {"sh", "short.jsonl", 500}} {
		for s, v := range got[id(c.unit, c.first)] {
			i := c.first + int64(s)
			if w := fmt.Sprintf("%d@%s:%d", t0+i*ms, c.src, i+1); v != w {
				t.Fatalf("episode %s step %d: %s, want %s", id(c.unit, c.first), s, v, w)
			}
		}
	}
}

// TestEpisodesPipelineSameTime: two objects with the same unit and times.
// "x-1.jsonl" sorts before "x/1.jsonl" ('-' < '/'), so its frames are kept
// and the other's are dropped and charged to x/1.jsonl. The obs 0.5 and
// 0.5000000001 are one float32 but two float64 values, so with float32 the
// pair is a duplicate and with float64 a conflict (SPEC §3.2: numbers compare
// after conversion to the output float type); 1 and 1.0, 0.5 and 5e-1 are
// the same number in either type.
func TestEpisodesPipelineSameTime(t *testing.T) {
	ms := int64(time.Millisecond)
	first := jsonLines(
		armLine("dd", 1*ms, ""),
		armLine("dd", 2*ms, ""),
		armLine("dd", 3*ms, `,"task":"pick"`),
		armLine("dd", 4*ms, ""),
		strings.Replace(armLine("dd", 6*ms, ""), "[0.5,0.5,0.5]", "[1,0.5,0.5]", 1),
	)
	second := jsonLines(
		armLine("dd", 1*ms, ""), // identical: duplicate
		strings.Replace(armLine("dd", 2*ms, ""), "[0.5,0.5,0.5]", "[0.5000000001,0.5,0.5]", 1),
		armLine("dd", 3*ms, `,"task":"place"`), // conflict
		armLine("dd", 5*ms, ""),                // kept
		// The same numbers written differently (RFC 8259 §6): duplicate.
		strings.Replace(armLine("dd", 6*ms, ""), "[0.5,0.5,0.5]", "[1.0,5e-1,0.50]", 1),
	)
	// float32 has a spacing of 2^-24 ≈ 6e-8 just above 0.5 (IEEE 754
	// binary32, 24-bit significand), so 0.5 + 1e-10 rounds back to 0.5.
	if float32(0.5) != float32(0.5000000001) || 0.5 == 0.5000000001 {
		t.Fatalf("test premise: 0.5 and 0.5000000001 must be one float32 and two float64")
	}
	files := map[string][]byte{"x-1.jsonl": first, "x/1.jsonl": second}
	for _, c := range []struct {
		float     string
		dup, conf int64
	}{{"float32", 3, 1}, {"float64", 2, 2}} {
		t.Run(c.float, func(t *testing.T) {
			r := runPipelineAt(t, episodesConfig("1h", 2, 500, "float: "+c.float+"\n"), files)
			srcs := []srcWant{
				{"x-1.jsonl", 5, 5, nil},
				{"x/1.jsonl", 5, 1, map[string]int64{pipeline.Duplicate: c.dup, pipeline.Conflict: c.conf}},
			}
			for _, s := range srcs {
				wantSource(t, r.Manifest, s.key, s.lines, s.kept, s.dropped)
			}
			wantFunnel(t, r.Manifest, funnelOf(2, 0, srcs, 6, 1, 5))
			var got []string
			if c.float == "float32" {
				got = episodeIndex(t, readShardFrames[float32](t, r))[fmt.Sprintf("dd-%d", ms)]
			} else {
				got = episodeIndex(t, readShardFrames[float64](t, r))[fmt.Sprintf("dd-%d", ms)]
			}
			want := []string{
				fmt.Sprintf("%d@x-1.jsonl:1", 1*ms), fmt.Sprintf("%d@x-1.jsonl:2", 2*ms), fmt.Sprintf("%d@x-1.jsonl:3", 3*ms),
				fmt.Sprintf("%d@x-1.jsonl:4", 4*ms), fmt.Sprintf("%d@x/1.jsonl:4", 5*ms), fmt.Sprintf("%d@x-1.jsonl:5", 6*ms),
			}
			if !slices.Equal(got, want) {
				t.Errorf("episode dd-%d: %v, want %v", ms, got, want)
			}
		})
	}
}

// TestEpisodesFanIn: one partition fed by 70 runs, more than maxFanIn (64),
// so the merge goes in passes. Object i (of 70) holds unit fan at
// t = i, i+1, i+70, i+140 ms (object 69: 0, 69, 139, 209): every t of 0…209
// once, plus each t of 0…69 a second time from the neighbouring object, with
// the same content. The merged order must still be (t, object key, line):
// one episode of 210 steps, each t kept from the earlier key, and 70
// duplicates charged to the later keys.
func TestEpisodesFanIn(t *testing.T) {
	const n = 70
	if n <= maxFanIn {
		t.Fatalf("test premise: %d runs must exceed maxFanIn %d", n, maxFanIn)
	}
	ms := int64(time.Millisecond)
	key := func(i int) string { return fmt.Sprintf("fan/o-%02d.jsonl", i) }
	times := func(i int) []int64 {
		if i == n-1 {
			return []int64{0, 69, 139, 209}
		}
		return []int64{int64(i), int64(i + 1), int64(i + n), int64(i + 2*n)}
	}
	files := map[string][]byte{}
	for i := range n {
		var lines []string
		for _, tt := range times(i) {
			lines = append(lines, armLine("fan", t0+tt*ms, ""))
		}
		files[key(i)] = jsonLines(lines...)
	}
	r := runPipelineAt(t, episodesConfig("1h", 2, 500, ""), files)
	var srcs []srcWant
	for i := range n {
		s := srcWant{key(i), 4, 3, map[string]int64{pipeline.Duplicate: 1}}
		switch i {
		case 0:
			s.kept, s.dropped = 4, nil
		case n - 1:
			s.kept, s.dropped = 2, map[string]int64{pipeline.Duplicate: 2}
		}
		srcs = append(srcs, s)
		wantSource(t, r.Manifest, s.key, s.lines, s.kept, s.dropped)
	}
	wantFunnel(t, r.Manifest, funnelOf(n, 0, srcs, 3*n, 1, 3*n-1))

	// Step s is t = s ms, from: s = 0: object 0 line 1; 1 ≤ s < 70: object
	// s−1 line 2; 70 ≤ s < 140: object s−70 line 3; 140 ≤ s: object s−140
	// line 4.
	var want []string
	for s := range 3 * n {
		obj, line := s-1, 2
		switch {
		case s == 0:
			obj, line = 0, 1
		case s >= 2*n:
			obj, line = s-2*n, 4
		case s >= n:
			obj, line = s-n, 3
		}
		want = append(want, fmt.Sprintf("%d@%s:%d", t0+int64(s)*ms, key(obj), line))
	}
	got := episodeIndex(t, readShardFrames[float32](t, r))
	if w := map[string][]string{fmt.Sprintf("fan-%d", t0): want}; !maps.EqualFunc(got, w, slices.Equal) {
		for id, g := range got {
			for i := range min(len(g), len(want)) {
				if g[i] != want[i] {
					t.Errorf("episode %s step %d: %s, want %s", id, i, g[i], want[i])
					break
				}
			}
		}
		t.Fatalf("episodes %d (%v), want one, fan-%d, of %d steps", len(got), slices.Sorted(maps.Keys(got)), t0, len(want))
	}
}
