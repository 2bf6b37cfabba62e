package main

import (
	"bufio"
	"bytes"
	"compress/gzip"
	"context"
	"encoding/json"
	"fmt"
	"maps"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	"hindcast/pipeline"
)

// Memory bounded by configuration: whole runs of the binary at the config
// loader's largest bounds, each a separate process whose peak resident set
// is the operating system's own accounting (getrusage's ru_maxrss of the
// child, Linux getrusage(2): kilobytes). TestBombLongLinesRSS is a bounded
// test; the slower cases are BenchmarkBombRSS:
//
//	go test -run x -bench BombRSS -benchtime 1x -timeout 60m .

// rssLimit is the peak resident set every run here must stay under.
const rssLimit = 1 << 30

// measured is one finished run of the binary.
type measured struct {
	wall     time.Duration
	peak     int64 // bytes
	parent   int64 // the test process's own peak RSS when it started the run
	code     int
	out, err string
}

// runMeasured runs the binary to its end (at most limit) and reads its
// peak RSS. On Linux that figure is an upper bound: Go starts a child with
// the parent's memory shared until exec (CLONE_VM), and the kernel keeps
// the larger of the two high-water marks at exec, so a child of a large
// test process reports the parent's peak. The fixtures are written in
// pieces to keep the parent small, and the parent's own peak (VmHWM of
// /proc/self/status, proc(5)) is logged beside every figure.
func runMeasured(tb testing.TB, bin string, limit time.Duration, args ...string) measured {
	tb.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), limit)
	defer cancel()
	cmd := exec.CommandContext(ctx, bin, args...)
	var stdout, stderr bytes.Buffer
	cmd.Stdout, cmd.Stderr = &stdout, &stderr
	parent := selfPeak(tb)
	start := time.Now()
	err := cmd.Run()
	m := measured{wall: time.Since(start), out: stdout.String(), err: stderr.String(), parent: parent}
	if cmd.ProcessState == nil {
		tb.Fatalf("hindcast %s: %v", strings.Join(args, " "), err)
	}
	m.code = cmd.ProcessState.ExitCode()
	ru, ok := cmd.ProcessState.SysUsage().(*syscall.Rusage)
	if !ok {
		tb.Fatalf("hindcast %s: no rusage on this platform", strings.Join(args, " "))
	}
	m.peak = ru.Maxrss << 10 // kilobytes on Linux (getrusage(2))
	if ctx.Err() != nil {
		tb.Fatalf("hindcast %s: still running after %v (killed); peak RSS so far %d MiB", strings.Join(args, " "), limit, m.peak>>20)
	}
	return m
}

// selfPeak reads this process's peak RSS, VmHWM in /proc/self/status
// (proc(5), in kB).
func selfPeak(tb testing.TB) int64 {
	tb.Helper()
	data, err := os.ReadFile("/proc/self/status")
	if err != nil {
		tb.Fatalf("read /proc/self/status: %v", err)
	}
	for _, l := range strings.Split(string(data), "\n") {
		if v, ok := strings.CutPrefix(l, "VmHWM:"); ok {
			var kb int64
			if _, err := fmt.Sscanf(strings.TrimSpace(v), "%d kB", &kb); err != nil {
				tb.Fatalf("VmHWM %q: %v", v, err)
			}
			return kb << 10
		}
	}
	tb.Fatalf("no VmHWM in /proc/self/status")
	return 0
}

// bombRun is one fixture: a config and its source folder under dir.
type bombRun struct {
	dir     string
	cfg     string // config file
	dataset string
}

// writeBombConfig writes a config over dir/src (embodiment "bot": obs 10,
// act 2) with more keys of source (indented) and more top-level keys, and
// returns the run.
func writeBombConfig(tb testing.TB, dir, source, extra string) bombRun {
	tb.Helper()
	cfg := `dataset: bombs
source:
  uri: src
` + source + `work: work
output: out
partitions: 1
embodiments:
  bot:
    obs: 10
    act: 2
    goal_tolerance: 0.1
splits: {train: 1}
` + extra
	path := filepath.Join(dir, "bombs.yaml")
	if err := os.WriteFile(path, []byte(cfg), 0o644); err != nil {
		tb.Fatal(err)
	}
	return bombRun{dir: dir, cfg: path, dataset: "bombs"}
}

// run runs the whole pipeline from an empty work area and returns the
// measured run and its manifest.
func (r bombRun) run(tb testing.TB, bin string, limit time.Duration) (measured, *pipeline.Manifest) {
	tb.Helper()
	for _, d := range []string{"work", "out"} {
		if err := os.RemoveAll(filepath.Join(r.dir, d)); err != nil {
			tb.Fatal(err)
		}
	}
	m := runMeasured(tb, bin, limit, "run", "--config", r.cfg, "--version", "v1", "--parallel", "2")
	if m.code != 0 {
		tb.Fatalf("run %s: exit %d\n%s", r.cfg, m.code, clTail(m.err, 3000))
	}
	data, err := os.ReadFile(filepath.Join(r.dir, "out", r.dataset, "v1", "manifest.json"))
	if err != nil {
		tb.Fatal(err)
	}
	var man pipeline.Manifest
	if err := json.Unmarshal(data, &man); err != nil {
		tb.Fatalf("manifest of %s: %v", r.cfg, err)
	}
	tb.Logf("%s: %.1f s wall, peak RSS %d MiB (the test process's own peak then: %d MiB)", filepath.Base(r.dir), m.wall.Seconds(), m.peak>>20, m.parent>>20)
	return m, &man
}

// botLine is one valid line of embodiment "bot"; pad, when not empty, is
// an unknown member that makes it longer.
func botLine(unit string, t int64, i int) string {
	var obs strings.Builder
	for k := range 10 {
		if k > 0 {
			obs.WriteByte(',')
		}
		fmt.Fprintf(&obs, "%.3f", float64((i*7+k*13)%2000)/1000-1)
	}
	return fmt.Sprintf(`{"unit":%q,"embodiment":"bot","t":%d,"obs":[%s],"act":[0.1,-0.1]}`, unit, t, obs.String())
}

// writeSteps writes one unit's episode of n steps 10 ms apart.
func writeSteps(tb testing.TB, path string, n int) {
	tb.Helper()
	if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
		tb.Fatal(err)
	}
	f, err := os.Create(path)
	if err != nil {
		tb.Fatal(err)
	}
	w := bufio.NewWriterSize(f, 1<<20)
	for i := range n {
		w.WriteString(botLine("r1", int64(1_000_000+10*i), i))
		w.WriteByte('\n')
	}
	if err := w.Flush(); err != nil {
		tb.Fatal(err)
	}
	if err := f.Close(); err != nil {
		tb.Fatal(err)
	}
}

// longLines writes the 64 MiB line bomb: a valid line, then three lines of
// exactly max_line_bytes = 64 MiB (the loader's largest, SPEC §2): one
// kept (a long unknown member), one malformed (its string never ends), one
// whose obs holds 33,554,400 numbers (a dim_mismatch), then a valid line.
// It writes them in pieces: the test process stays small, since a child
// started from it reports the parent's peak RSS as its own if larger (see
// runMeasured).
func longLines(tb testing.TB, path string) {
	tb.Helper()
	const max = 64 << 20
	if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
		tb.Fatal(err)
	}
	f, err := os.Create(path)
	if err != nil {
		tb.Fatal(err)
	}
	w := bufio.NewWriterSize(f, 1<<20)
	// repeat writes s n times.
	repeat := func(s string, n int) {
		chunk := strings.Repeat(s, 1<<16)
		for ; n >= 1<<16; n -= 1 << 16 {
			w.WriteString(chunk)
		}
		w.WriteString(strings.Repeat(s, n))
	}
	head := func(t int) string {
		return fmt.Sprintf(`{"unit":"r1","embodiment":"bot","t":%d,"obs":[0,0,0,0,0,0,0,0,0,0],"act":[0.1,-0.1]`, t)
	}
	padded := func(prefix, suffix string) {
		w.WriteString(prefix)
		repeat("x", max-len(prefix)-len(suffix))
		w.WriteString(suffix + "\n")
	}
	w.WriteString(head(1000) + "}\n")
	padded(head(2000)+`,"pad":"`, `"}`)
	padded(head(3000)+`,"pad":"`, `}`)
	numbers := `{"unit":"r1","embodiment":"bot","t":4000,"act":[0.1,-0.1],"obs":[`
	w.WriteString(numbers)
	repeat("0,", (max-len(numbers)-len("0]}"))/2)
	w.WriteString("0]}\n")
	w.WriteString(head(5000) + "}\n")
	if err := w.Flush(); err != nil {
		tb.Fatal(err)
	}
	if err := f.Close(); err != nil {
		tb.Fatal(err)
	}
}

// wantFunnelCounts compares the funnel's counts and non-zero drops.
func wantFunnelCounts(tb testing.TB, man *pipeline.Manifest, lines, frames, episodes, pairs int64, dropped map[string]int64) {
	tb.Helper()
	f := man.Funnel
	got := map[string]int64{}
	for k, v := range f.Dropped {
		if v != 0 {
			got[k] = v
		}
	}
	if f.Lines != lines || f.Frames != frames || f.Episodes != episodes || f.Pairs != pairs || !maps.Equal(got, dropped) {
		tb.Errorf("funnel lines %d frames %d episodes %d pairs %d dropped %v,\nwant   lines %d frames %d episodes %d pairs %d dropped %v",
			f.Lines, f.Frames, f.Episodes, f.Pairs, got, lines, frames, episodes, pairs, dropped)
	}
}

// TestBombLongLinesRSS runs lines of the largest length the loader
// accepts, with quarantine on (the dropped lines' text is written out), and
// asserts the outcome and that the process stayed under 1 GiB of RSS.
func TestBombLongLinesRSS(t *testing.T) {
	bin := buildHindcast(t)
	dir := t.TempDir()
	longLines(t, filepath.Join(dir, "src", "long.jsonl"))
	r := writeBombConfig(t, dir, "  max_line_bytes: 67108864\n", "quarantine: true\nepisodes: {max_gap: 1h, min_steps: 2}\n")
	m, man := r.run(t, bin, 3*time.Minute)
	// Lines 1, 2 and 5 kept: one episode of 3 steps, 2 future + 1
	// geometric + 1 final goal (the defaults) on each of its first 2 steps.
	wantFunnelCounts(t, man, 5, 3, 1, 8, map[string]int64{pipeline.Malformed: 1, pipeline.DimMismatch: 1})
	if m.peak > rssLimit {
		t.Errorf("64 MiB lines: peak RSS %d MiB, want at most %d MiB", m.peak>>20, rssLimit>>20)
	}
}

// gzipOf writes a gzip file that decompresses to n bytes of b and then
// tail: a 64 MiB member compressed once and repeated (RFC 1952 §2.2: a gzip
// file is a series of members, decoded as one stream), about 1 MB per GiB.
// Like longLines it keeps the test process small.
func gzipOf(tb testing.TB, path string, b byte, n int64, tail []byte) {
	tb.Helper()
	const chunk = 64 << 20
	member := func(data []byte, times int) []byte {
		var buf bytes.Buffer
		w, _ := gzip.NewWriterLevel(&buf, gzip.BestCompression)
		for range times {
			w.Write(data)
		}
		if err := w.Close(); err != nil {
			tb.Fatal(err)
		}
		return buf.Bytes()
	}
	one := member(bytes.Repeat([]byte{b}, 1<<20), chunk>>20)
	if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
		tb.Fatal(err)
	}
	f, err := os.Create(path)
	if err != nil {
		tb.Fatal(err)
	}
	for range n / chunk {
		f.Write(one)
	}
	f.Write(member(tail, 1))
	if err := f.Close(); err != nil {
		tb.Fatal(err)
	}
}

// BenchmarkBombRSS runs the memory bounds whole, one process per run, and
// reports each run's peak RSS (peak-MiB) and wall time; it fails a run
// over 1 GiB.
func BenchmarkBombRSS(b *testing.B) {
	bin := buildHindcast(b)
	cases := []struct {
		name  string
		setup func(b *testing.B, dir string) bombRun
		check func(b *testing.B, man *pipeline.Manifest)
	}{{
		// episodes.max_steps at its bound: one episode of 1,000,000 steps.
		name: "steps-1M",
		setup: func(b *testing.B, dir string) bombRun {
			writeSteps(b, filepath.Join(dir, "src", "ep.jsonl"), 1_000_000)
			return writeBombConfig(b, dir, "", "episodes: {max_gap: 1h, min_steps: 2, max_steps: 1000000}\n")
		},
		check: func(b *testing.B, man *pipeline.Manifest) {
			// 4 goals on each step but the last.
			wantFunnelCounts(b, man, 1_000_000, 1_000_000, 1, 4*999_999, map[string]int64{})
		},
	}, {
		// goals.horizon at its bound on the same episode.
		name: "horizon-1M",
		setup: func(b *testing.B, dir string) bombRun {
			writeSteps(b, filepath.Join(dir, "src", "ep.jsonl"), 1_000_000)
			return writeBombConfig(b, dir, "", "episodes: {max_gap: 1h, min_steps: 2, max_steps: 1000000}\ngoals: {horizon: 1000000}\n")
		},
		check: func(b *testing.B, man *pipeline.Manifest) {
			wantFunnelCounts(b, man, 1_000_000, 1_000_000, 1, 4*999_999, map[string]int64{})
		},
	}, {
		// goals.future, geometric and final at their bound (1024 each) on an
		// episode of 2,000 steps: 3,072 pairs a step.
		name: "goals-1024",
		setup: func(b *testing.B, dir string) bombRun {
			writeSteps(b, filepath.Join(dir, "src", "ep.jsonl"), 2000)
			return writeBombConfig(b, dir, "", "episodes: {max_gap: 1h, min_steps: 2, max_steps: 2000}\ngoals: {future: 1024, geometric: 1024, final: 1024}\n")
		},
		check: func(b *testing.B, man *pipeline.Manifest) {
			wantFunnelCounts(b, man, 2000, 2000, 1, 3072*1999, map[string]int64{})
		},
	}, {
		name: "lines-64MiB",
		setup: func(b *testing.B, dir string) bombRun {
			longLines(b, filepath.Join(dir, "src", "long.jsonl"))
			return writeBombConfig(b, dir, "  max_line_bytes: 67108864\n", "quarantine: true\nepisodes: {max_gap: 1h, min_steps: 2}\n")
		},
		check: func(b *testing.B, man *pipeline.Manifest) {
			wantFunnelCounts(b, man, 5, 3, 1, 8, map[string]int64{pipeline.Malformed: 1, pipeline.DimMismatch: 1})
		},
	}, {
		// 10⁵ tiny objects of one line: 100 units of 1,000 lines, each
		// unit one episode.
		name: "objects-100k",
		setup: func(b *testing.B, dir string) bombRun {
			for u := range 100 {
				unit := fmt.Sprintf("u%03d", u)
				if err := os.MkdirAll(filepath.Join(dir, "src", unit), 0o755); err != nil {
					b.Fatal(err)
				}
				for i := range 1000 {
					line := botLine(unit, int64(1000*(i+1)), i) + "\n"
					if err := os.WriteFile(filepath.Join(dir, "src", unit, fmt.Sprintf("%04d.jsonl", i)), []byte(line), 0o644); err != nil {
						b.Fatal(err)
					}
				}
			}
			return writeBombConfig(b, dir, "", "episodes: {max_gap: 1h, min_steps: 2, max_steps: 1000}\n")
		},
		check: func(b *testing.B, man *pipeline.Manifest) {
			wantFunnelCounts(b, man, 100_000, 100_000, 100, 100*4*999, map[string]int64{})
		},
	}, {
		// 10 GiB each of NULs (one oversize line), spaces (one blank line)
		// and newlines (10 GiB of blank lines), each then 2 valid lines.
		name: "gzip-10GiB",
		setup: func(b *testing.B, dir string) bombRun {
			for i, c := range []byte{0, ' ', '\n'} {
				unit := fmt.Sprintf("g%d", i)
				tail := "\n" + botLine(unit, 1000, 0) + "\n" + botLine(unit, 2000, 1) + "\n"
				gzipOf(b, filepath.Join(dir, "src", unit+".jsonl.gz"), c, 10<<30, []byte(tail))
			}
			return writeBombConfig(b, dir, "", "episodes: {max_gap: 1h, min_steps: 2}\n")
		},
		check: func(b *testing.B, man *pipeline.Manifest) {
			// 3 episodes of 2 steps: 4 goals on the first step of each.
			wantFunnelCounts(b, man, 7, 6, 3, 12, map[string]int64{pipeline.Oversize: 1})
		},
	}}
	for _, c := range cases {
		b.Run(c.name, func(b *testing.B) {
			dir := b.TempDir()
			r := c.setup(b, dir)
			var peak int64
			var wall time.Duration
			b.ResetTimer()
			for range b.N {
				m, man := r.run(b, bin, 30*time.Minute)
				peak, wall = max(peak, m.peak), wall+m.wall
				c.check(b, man)
			}
			b.ReportMetric(float64(peak)/(1<<20), "peak-MiB")
			b.ReportMetric(wall.Seconds()/float64(b.N), "s/run")
			if peak > rssLimit {
				b.Errorf("%s: peak RSS %d MiB, want at most %d MiB", c.name, peak>>20, rssLimit>>20)
			}
		})
	}
}

// BenchmarkBombPartitions runs the demo fleet at partitions 4096 (the
// loader's bound) from an empty work area, reporting peak RSS, wall time
// and the work area's size and files.
func BenchmarkBombPartitions(b *testing.B) {
	bin := buildHindcast(b)
	dir := b.TempDir()
	if m := runMeasured(b, bin, 5*time.Minute, "demo", "--dir", dir, "--recordings=false"); m.code != 0 {
		b.Fatalf("demo: exit %d\n%s", m.code, clTail(m.err, 3000))
	}
	cfg, err := os.ReadFile(filepath.Join(dir, "hindcast.yaml"))
	if err != nil {
		b.Fatal(err)
	}
	for _, parts := range []int{4, 4096} {
		b.Run(fmt.Sprint("partitions-", parts), func(b *testing.B) {
			var out []string
			for _, l := range strings.Split(string(cfg), "\n") {
				switch {
				case strings.HasPrefix(l, "partitions:"):
					l = fmt.Sprint("partitions: ", parts)
				case strings.HasPrefix(l, "work:"):
					l = fmt.Sprint("work: work", parts)
				case strings.HasPrefix(l, "output:"):
					l = fmt.Sprint("output: out", parts)
				}
				out = append(out, l)
			}
			path := filepath.Join(dir, fmt.Sprintf("p%d.yaml", parts))
			if err := os.WriteFile(path, []byte(strings.Join(out, "\n")), 0o644); err != nil {
				b.Fatal(err)
			}
			var peak, size, files int64
			var wall time.Duration
			b.ResetTimer()
			for range b.N {
				b.StopTimer()
				for _, d := range []string{"work", "out"} {
					os.RemoveAll(filepath.Join(dir, fmt.Sprint(d, parts)))
				}
				b.StartTimer()
				m := runMeasured(b, bin, 30*time.Minute, "run", "--config", path, "--version", "v1", "--parallel", "2")
				if m.code != 0 {
					b.Fatalf("partitions %d: exit %d\n%s", parts, m.code, clTail(m.err, 3000))
				}
				peak, wall = max(peak, m.peak), wall+m.wall
			}
			b.StopTimer()
			filepath.Walk(filepath.Join(dir, fmt.Sprint("work", parts)), func(_ string, fi os.FileInfo, err error) error {
				if err == nil && fi.Mode().IsRegular() {
					size += fi.Size()
					files++
				}
				return nil
			})
			b.ReportMetric(float64(peak)/(1<<20), "peak-MiB")
			b.ReportMetric(wall.Seconds()/float64(b.N), "s/run")
			b.ReportMetric(float64(size)/(1<<20), "work-MiB")
			b.ReportMetric(float64(files), "work-files")
			if peak > rssLimit {
				b.Errorf("partitions %d: peak RSS %d MiB, want at most %d MiB", parts, peak>>20, rssLimit>>20)
			}
		})
	}
}
