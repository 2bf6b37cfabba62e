package fleet

import (
	"bufio"
	"errors"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"time"

	"github.com/klauspost/compress/zstd"
)

// BenchOptions sizes the fault-free benchmark fleet.
type BenchOptions struct {
	Frames   int   // total frames, split between picker6 and cart2
	Seed     int64 // seeds every random draw; the same options write the same bytes
	Compress bool  // when true, objects are written as .jsonl.zst (default plain .jsonl)
}

// The benchmark fleet's shape (see the peer job's README): sessions of a few
// thousand to 20,000 frames, episodes of 100 to 1000 steps separated by 2 s
// gaps, so episodes over 500 steps are cut by the max_steps: 500 chunking and
// none shorter than min_steps: 10 is ever formed.
const (
	benchMinSession = 4000
	benchMaxSession = 20000
	benchMinEpisode = 100
	benchMaxEpisode = 1000
	benchMaxSteps   = 500
	benchMinSteps   = 10
	benchGap        = int64(2 * time.Second)
	benchSessionGap = int64(15 * time.Minute)
	benchPerUnit    = 4 // sessions per unit, so units log for a few hours
)

// Bench writes a fault-free fleet of opt.Frames frames under dir (objects
// only, no config): half picker6 (rounded down), half cart2, every line
// accepted by SPEC §3 under the peer job's rules. Objects are one unit's
// session each, at day=YYYY-MM-DD/unit=<unit>/session-NNNN.jsonl[.zst].
// It returns the number of frames and the bytes written to disk (compressed
// bytes when opt.Compress is set).
//
// Writing streams through a reused line buffer and a bufio.Writer, so memory
// stays flat whatever the fleet size.
func Bench(dir string, opt BenchOptions) (frames int, bytes int64, err error) {
	if opt.Frames < 0 {
		return 0, 0, fmt.Errorf("fleet: bench frames must not be negative, got %d", opt.Frames)
	}
	w, err := newBenchWriter(opt.Compress)
	if err != nil {
		return 0, 0, err
	}
	defer w.close()

	p6 := opt.Frames / 2
	for e, part := range []struct {
		emb    string
		prefix string
		budget int
	}{{picker6, "lark-p6-", p6}, {cart2, "lark-c2-", opt.Frames - p6}} {
		plan := rand.New(rand.NewPCG(uint64(opt.Seed), uint64(e)))
		sizes := sessionSizes(plan, part.budget)
		units := max(1, (len(sizes)+benchPerUnit-1)/benchPerUnit)
		next := make([]int64, units) // next session's start, per unit
		for u := range next {
			next[u] = day0 + int64(6*time.Hour) + int64(u)*int64(97*time.Second) + int64(e)*int64(41*time.Second)
		}
		for i, n := range sizes {
			u := i % units
			s := session{
				emb:   part.emb,
				unit:  fmt.Sprintf("%s%03d", part.prefix, u+1),
				num:   i/units + 1,
				start: next[u],
				n:     n,
				rng:   rand.New(rand.NewPCG(uint64(opt.Seed), 1<<32|uint64(e)<<24|uint64(i))),
			}
			last, b, err := w.write(dir, &s)
			if err != nil {
				return frames, bytes, err
			}
			frames += n
			bytes += b
			next[u] = last + benchSessionGap
		}
	}
	return frames, bytes, nil
}

// sessionSizes splits budget frames into sessions of benchMinSession to
// benchMaxSession frames (one smaller session when the budget itself is
// smaller).
func sessionSizes(rng *rand.Rand, budget int) []int {
	var sizes []int
	for budget > 0 {
		n := benchMinSession + rng.IntN(benchMaxSession-benchMinSession+1)
		if budget-n < benchMinSession {
			if budget <= benchMaxSession {
				n = budget
			} else {
				n = budget / 2 // leaves more than benchMaxSession/2 for the rest
			}
		}
		sizes = append(sizes, n)
		budget -= n
	}
	return sizes
}

// chunksOK reports whether an episode of n steps is cut by max_steps into
// chunks that all reach min_steps, so no frame of the fault-free fleet is
// dropped as short_episode.
func chunksOK(n int) bool {
	r := n % benchMaxSteps
	return n >= benchMinSteps && (r == 0 || r >= benchMinSteps)
}

// episodeLengths splits a session of total frames into episodes of
// benchMinEpisode to benchMaxEpisode steps whose chunks all reach min_steps.
// A session under benchMinEpisode frames is one episode.
func episodeLengths(rng *rand.Rand, total int) []int {
	var ls []int
	for total > 0 {
		if total <= benchMaxEpisode && (total < benchMinEpisode || chunksOK(total)) {
			ls = append(ls, total)
			break
		}
		if total <= benchMaxEpisode { // 501…509: two even halves
			ls = append(ls, total/2, total-total/2)
			break
		}
		n := benchMinEpisode + rng.IntN(benchMaxEpisode-benchMinEpisode+1)
		for !chunksOK(n) {
			n = benchMinEpisode + rng.IntN(benchMaxEpisode-benchMinEpisode+1)
		}
		if total-n < benchMinEpisode {
			// total is at most n+99 ≤ 1099, so total-100 is in 901…999: chunks
			// of 500 and 401…499, both fine.
			n = total - benchMinEpisode
		}
		ls = append(ls, n)
		total -= n
	}
	return ls
}

// session is one object of the benchmark fleet.
type session struct {
	emb, unit string
	num       int   // session number of the unit, from 1
	start     int64 // nominal t of the first frame
	n         int   // frames
	rng       *rand.Rand
}

// benchWriter holds what is reused from one object to the next.
type benchWriter struct {
	bw       *bufio.Writer
	enc      *zstd.Encoder // nil unless compressing
	line     []byte
	obs, act []float64
}

func newBenchWriter(compress bool) (*benchWriter, error) {
	w := &benchWriter{
		bw:   bufio.NewWriterSize(nil, 256<<10),
		line: make([]byte, 0, 512),
		obs:  make([]float64, p6Obs),
		act:  make([]float64, p6Act),
	}
	if compress {
		// One encoder goroutine: output does not depend on scheduling, and
		// the benchmark machine's other core stays free.
		enc, err := zstd.NewWriter(nil, zstd.WithEncoderConcurrency(1))
		if err != nil {
			return nil, fmt.Errorf("fleet: creating zstd encoder: %w", err)
		}
		w.enc = enc
	}
	return w, nil
}

func (w *benchWriter) close() {
	if w.enc != nil {
		w.enc.Close()
	}
}

// write writes one session object under dir and returns the nominal t of its
// last frame and the bytes written to disk.
func (w *benchWriter) write(dir string, s *session) (last int64, n int64, err error) {
	day := time.Unix(0, s.start).UTC().Format("2006-01-02")
	name := fmt.Sprintf("session-%04d.jsonl", s.num)
	if w.enc != nil {
		name += ".zst"
	}
	path := filepath.Join(dir, "day="+day, "unit="+s.unit, name)
	if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
		return 0, 0, fmt.Errorf("fleet: creating folder for %s: %w", path, err)
	}
	f, err := os.Create(path)
	if err != nil {
		return 0, 0, fmt.Errorf("fleet: creating %s: %w", path, err)
	}
	cw := &countWriter{w: f}
	var sink io.Writer = cw
	if w.enc != nil {
		w.enc.Reset(cw)
		sink = w.enc
	}
	w.bw.Reset(sink)
	last, err = w.frames(s)
	if err == nil {
		err = w.bw.Flush()
	}
	if w.enc != nil {
		err = errors.Join(err, w.enc.Close())
	}
	if cerr := f.Close(); err == nil {
		err = cerr
	}
	if err != nil {
		return 0, 0, fmt.Errorf("fleet: writing %s: %w", path, err)
	}
	return last, cw.n, nil
}

// frames writes the session's lines to w.bw.
func (w *benchWriter) frames(s *session) (int64, error) {
	p6Tasks := [...]string{"pick-tote", "restock-bin", "pick-tote", "count-bin"}
	c2Tasks := [...]string{"dock", "deliver-tote", "dock"}
	rng := s.rng
	f := frame{unit: s.unit, emb: s.emb}
	period := p6Period
	if s.emb == cart2 {
		period = c2Period
		f.obs, f.act = w.obs[:c2Obs], w.act[:c2Act]
	} else {
		f.obs, f.act = w.obs[:p6Obs], w.act[:p6Act]
	}
	from := [3]float64{0.2 + 0.7*rng.Float64(), 1.2 * (rng.Float64() - 0.5), 0.1 + 1.3*rng.Float64()}
	angle := 2 * math.Pi * rng.Float64()
	t := s.start
	for k, steps := range episodeLengths(rng, s.n) {
		if k > 0 {
			t += benchGap - period
		}
		var a arm
		var c cart
		if s.emb == cart2 {
			c = newCart(rng, steps, angle)
			angle = math.Remainder(angle+c.delta, 2*math.Pi)
			f.task = c2Tasks[rng.IntN(len(c2Tasks))]
		} else {
			a = newArm(rng, steps, from)
			from = a.to
			f.task = p6Tasks[rng.IntN(len(p6Tasks))]
		}
		success := int8(1)
		if rng.IntN(8) == 0 {
			success = -1
		}
		for i := range steps {
			if s.emb == cart2 {
				c.fill(rng, i, f.obs, f.act)
			} else {
				a.fill(rng, i, f.obs, f.act)
			}
			f.t = t + jitter(rng)
			f.ev, f.success = "", 0
			switch i {
			case 0:
				f.ev = "start"
			case steps - 1:
				f.ev, f.success = "end", success
			}
			w.line = append(appendFrame(w.line[:0], &f), '\n')
			if _, err := w.bw.Write(w.line); err != nil {
				return 0, err
			}
			t += period
		}
	}
	return t - period, nil
}

// countWriter counts the bytes that reach the file.
type countWriter struct {
	w io.Writer
	n int64
}

func (c *countWriter) Write(p []byte) (int, error) {
	n, err := c.w.Write(p)
	c.n += int64(n)
	return n, err
}
