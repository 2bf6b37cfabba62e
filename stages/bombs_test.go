package stages

import (
	"bytes"
	"compress/gzip"
	"encoding/binary"
	"fmt"
	"runtime"
	"runtime/debug"
	"runtime/metrics"
	"strings"
	"sync"
	"testing"
	"time"

	"hindcast/pipeline"
	"hindcast/stages/jsonl"
)

// Hostile inputs that must neither exhaust memory nor hang a run: bombs of
// decompression, of nesting, of dimensions, and of object counts. Each runs
// the real pipeline, asserts its exact outcome (lines, kept, reasons,
// incomplete) and, loosely, its time and the memory the Go runtime held.

// memWatch samples, until stopped, the memory the Go runtime holds from the
// operating system and has not returned (runtime/metrics: all classes minus
// released heap), the in-process stand-in for the resident set.
type memWatch struct {
	done chan struct{}
	wg   sync.WaitGroup
	peak uint64
}

func heldBytes(s []metrics.Sample) uint64 {
	metrics.Read(s)
	return s[0].Value.Uint64() - s[1].Value.Uint64()
}

func watchMemory() *memWatch {
	w := &memWatch{done: make(chan struct{})}
	s := []metrics.Sample{{Name: "/memory/classes/total:bytes"}, {Name: "/memory/classes/heap/released:bytes"}}
	w.peak = heldBytes(s)
	w.wg.Add(1)
	go func() {
		defer w.wg.Done()
		tick := time.NewTicker(2 * time.Millisecond)
		defer tick.Stop()
		for {
			w.peak = max(w.peak, heldBytes(s))
			select {
			case <-w.done:
				w.peak = max(w.peak, heldBytes(s))
				return
			case <-tick.C:
			}
		}
	}()
	return w
}

func (w *memWatch) stop() uint64 {
	close(w.done)
	w.wg.Wait()
	return w.peak
}

// bounded runs f and fails the test (it never skips) when f took longer
// than maxTime or the memory the runtime held peaked above maxBytes. The
// bounds are loose on purpose, several times what a run needs on a 2-core
// machine shared with other work; they catch a bomb that went off (memory
// in proportion to the decompressed size, a hang), not a slow day.
func bounded(t *testing.T, what string, maxTime time.Duration, maxBytes uint64, f func()) {
	t.Helper()
	runtime.GC()
	debug.FreeOSMemory()
	w := watchMemory()
	start := time.Now()
	f()
	took := time.Since(start)
	peak := w.stop()
	t.Logf("%s: %.1f s, peak %d MiB held by the runtime", what, took.Seconds(), peak>>20)
	if took > maxTime {
		t.Errorf("%s took %v, want at most %v", what, took.Round(time.Millisecond), maxTime)
	}
	if peak > maxBytes {
		t.Errorf("%s: the runtime held %d MiB at its peak, want at most %d MiB", what, peak>>20, maxBytes>>20)
	}
}

// bombConfig is fixtureConfig with the largest line the loader accepts
// (64 MiB, SPEC §2), so the nesting and dimension bombs are parsed, not
// dropped as oversize.
func bombConfig() string { return fixtureConfig(64 << 20) }

// repeatedGzip returns a gzip file that decompresses to n bytes of b: one
// member of 64 MiB of b, compressed once, repeated (RFC 1952 §2.2: a gzip
// file is a series of members, which Go's reader, like the gzip tool,
// decodes as one stream), then a last member holding tail. Deflate's
// largest ratio is about 1032:1 (RFC 1951: a 258-byte match in about two
// bits, common practice), so 10 GiB of one byte is about 10 MB either way.
func repeatedGzip(t *testing.T, b byte, n int64, tail []byte) []byte {
	t.Helper()
	const chunk = 64 << 20
	if n%chunk != 0 {
		t.Fatalf("repeatedGzip: %d is not a multiple of %d", n, chunk)
	}
	var one bytes.Buffer
	w, err := gzip.NewWriterLevel(&one, gzip.BestCompression)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := w.Write(bytes.Repeat([]byte{b}, chunk)); err != nil {
		t.Fatal(err)
	}
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	out := bytes.Repeat(one.Bytes(), int(n/chunk))
	if len(tail) > 0 {
		out = append(out, gzipBytes(t, tail)...)
	}
	return out
}

// TestBombGzip decompresses 1 GiB of NULs, of spaces and of newlines, each
// followed by two valid lines (BenchmarkBombRSS in the root package runs
// 10 GiB of each through the binary and reads its peak RSS). A NUL is not JSON white space (RFC 8259 §2),
// so the NULs are one oversize line, skipped to its end without being held;
// spaces are one blank line of any length and newlines 10 GiB of empty
// lines, neither counted (SPEC §1). The valid lines after each bomb are
// kept, so the reader went through to the end.
//
// Under the race detector the bombs are 128 MiB each (raceDetector).
func TestBombGzip(t *testing.T) {
	size := int64(1 << 30)
	if raceDetector {
		size = 128 << 20
	}
	tail := func(unit string) []byte {
		return []byte("\n" + string(jsonLines(armLine(unit, 1000, ""), armLine(unit, 2000, ""))))
	}
	files := map[string][]byte{
		"nul.jsonl.gz":     repeatedGzip(t, 0, size, tail("n1")),
		"space.jsonl.gz":   repeatedGzip(t, ' ', size, tail("s1")),
		"newline.jsonl.gz": repeatedGzip(t, '\n', size, tail("l1")),
	}
	for k, v := range files {
		t.Logf("%s: %d bytes of gzip for %d MiB", k, len(v), size>>20)
	}
	var m *pipeline.Manifest
	bounded(t, fmt.Sprintf("3 × %d MiB of gzip", size>>20), 5*time.Minute, 512<<20, func() {
		m = runPipeline(t, fixtureConfig(1<<20), files)
	})
	srcs := []srcWant{
		{"newline.jsonl.gz", 2, 2, nil},
		{"nul.jsonl.gz", 3, 2, map[string]int64{pipeline.Oversize: 1}},
		{"space.jsonl.gz", 2, 2, nil},
	}
	for _, s := range srcs {
		wantSource(t, m, s.key, s.lines, s.kept, s.dropped)
		if sourceByKey(t, m, s.key).Incomplete {
			t.Errorf("%s: incomplete, want complete", s.key)
		}
	}
	// 3 episodes of 2 steps, each 1 future goal.
	wantFunnel(t, m, funnelOf(3, 0, srcs, 6, 3, 3))
}

// zstdFrame builds a zstd frame (RFC 8878 §3.1.1) by hand: the magic, a
// frame header descriptor fhd, the header fields after it (window
// descriptor or frame content size), and data in one last raw block
// (Block_Type 0, §3.1.1.2).
func zstdFrame(fhd byte, fields []byte, data []byte) []byte {
	out := []byte{0x28, 0xb5, 0x2f, 0xfd, fhd}
	out = append(out, fields...)
	h := uint32(1) | uint32(len(data))<<3 // Last_Block, Raw_Block, Block_Size
	out = append(out, byte(h), byte(h>>8), byte(h>>16))
	return append(out, data...)
}

// windowDescriptor encodes a window of 2^log bytes (RFC 8878 §3.1.1.1.2:
// exponent = log - 10, mantissa 0); 0xff is the largest, 3.75 TB.
func windowDescriptor(log int) byte { return byte(log-10) << 3 }

// TestBombZstdWindow checks that a zstd frame declaring a window beyond
// 128 MiB is refused before anything is allocated for it: the object is
// incomplete with no line, and the run holds little memory. A frame built
// the same way with a 1 MiB window decodes, so the others fail on their
// window alone.
func TestBombZstdWindow(t *testing.T) {
	data := jsonLines(armLine("z1", 1000, ""), armLine("z1", 2000, ""))
	fcs := make([]byte, 8)
	binary.LittleEndian.PutUint64(fcs, 1<<40)
	files := map[string][]byte{
		// Frame_Header_Descriptor 0: a window descriptor follows.
		"window-1m.jsonl.zst":   zstdFrame(0, []byte{windowDescriptor(20)}, data),
		"window-256m.jsonl.zst": zstdFrame(0, []byte{windowDescriptor(28)}, data),
		"window-max.jsonl.zst":  zstdFrame(0, []byte{0xff}, data),
		// 0xe0: Single_Segment with an 8-byte content size of 1 TiB, which
		// is then the window (§3.1.1.1.1).
		"content-1t.jsonl.zst": zstdFrame(0xe0, fcs, data),
	}
	var m *pipeline.Manifest
	bounded(t, "zstd windows", time.Minute, 256<<20, func() {
		m = runPipeline(t, fixtureConfig(1<<20), files)
	})
	srcs := []srcWant{
		{"content-1t.jsonl.zst", 0, 0, nil},
		{"window-1m.jsonl.zst", 2, 2, nil},
		{"window-256m.jsonl.zst", 0, 0, nil},
		{"window-max.jsonl.zst", 0, 0, nil},
	}
	for _, s := range srcs {
		wantSource(t, m, s.key, s.lines, s.kept, s.dropped)
		if want := s.key != "window-1m.jsonl.zst"; sourceByKey(t, m, s.key).Incomplete != want {
			t.Errorf("%s: incomplete %v, want %v", s.key, !want, want)
		}
	}
	wantFunnel(t, m, funnelOf(4, 0, srcs, 2, 1, 1))
}

// nested returns open repeated n times, then close repeated n times.
func nested(open, close string, n int) string {
	return strings.Repeat(open, n) + strings.Repeat(close, n)
}

// TestBombNesting reads lines nested 10⁷ deep (arrays in an unknown member,
// arrays in obs, objects in an unknown member; the last is 6·10⁷ bytes,
// under the 64 MiB line limit): each is malformed, found without recursion
// to its depth, and the valid lines around them are kept.
func TestBombNesting(t *testing.T) {
	const depth = 10_000_000
	head := `{"unit":"d1","embodiment":"arm","t":%d,`
	lines := []string{
		armLine("d1", 1000, ""),
		fmt.Sprintf(head, 2000) + `"x":` + nested("[", "]", depth) + `,"obs":[0.5,0.5,0.5]}`,
		fmt.Sprintf(head, 3000) + `"obs":` + nested("[", "]", depth) + `}`,
		fmt.Sprintf(head, 4000) + `"obs":[0.5,0.5,0.5],"x":` + nested(`{"a":`, "}", depth) + `}`,
		armLine("d1", 5000, ""),
	}
	var m *pipeline.Manifest
	bounded(t, "nesting 10⁷ deep", 2*time.Minute, 1<<30, func() {
		m = runPipeline(t, bombConfig(), map[string][]byte{"nest.jsonl": jsonLines(lines...)})
	})
	srcs := []srcWant{{"nest.jsonl", 5, 2, map[string]int64{pipeline.Malformed: 3}}}
	wantSource(t, m, "nest.jsonl", 5, 2, srcs[0].dropped)
	wantFunnel(t, m, funnelOf(1, 0, srcs, 2, 1, 1))
}

// TestBombDimensions reads lines whose obs or act holds 10⁷ numbers where
// the embodiment declares 3 and 2: each is a dim_mismatch, exactly as a
// vector one too long is, while the parser keeps at most
// jsonl.MaxValues+1 of the numbers. A line with a non-number after 10⁷
// numbers is still malformed (the array is read to its end).
func TestBombDimensions(t *testing.T) {
	const n = 10_000_000
	numbers := "[" + strings.Repeat("0.5,", n-1) + "0.5]"
	head := `{"unit":"m1","embodiment":"arm","t":%d,`
	lines := []string{
		armLine("m1", 1000, ""),
		fmt.Sprintf(head, 2000) + `"obs":` + numbers + `,"act":[0.1,-0.1]}`,
		fmt.Sprintf(head, 3000) + `"obs":[0.5,0.5,0.5],"act":` + numbers + `}`,
		fmt.Sprintf(head, 4000) + `"obs":[0.5,0.5,0.5,0.5]}`,
		fmt.Sprintf(head, 5000) + `"obs":` + strings.TrimSuffix(numbers, "]") + `,"x"]}`,
		armLine("m1", 6000, ""),
	}
	var m *pipeline.Manifest
	bounded(t, "10⁷ numbers in obs and act", 2*time.Minute, 1<<30, func() {
		m = runPipeline(t, bombConfig(), map[string][]byte{"dims.jsonl": jsonLines(lines...)})
	})
	srcs := []srcWant{{"dims.jsonl", 6, 2, map[string]int64{pipeline.DimMismatch: 3, pipeline.Malformed: 1}}}
	wantSource(t, m, "dims.jsonl", 6, 2, srcs[0].dropped)
	wantFunnel(t, m, funnelOf(1, 0, srcs, 2, 1, 1))
}

// TestDimensionCapCoversTheLoader holds the parser's cap to the config
// loader's bound on obs and act: an embodiment of jsonl.MaxValues dims
// loads and one more does not, so a vector cut at MaxValues+1 values is
// longer than any embodiment's and still a dim_mismatch.
func TestDimensionCapCoversTheLoader(t *testing.T) {
	cfg := func(obs int) string {
		return fmt.Sprintf("dataset: d\nsource: {uri: src}\nembodiments:\n  e:\n    obs: %d\n    goal_tolerance: 0.1\n", obs)
	}
	if _, err := pipeline.ParseConfig([]byte(cfg(jsonl.MaxValues)), t.TempDir(), "cap.yaml"); err != nil {
		t.Errorf("obs: %d: %v", jsonl.MaxValues, err)
	}
	_, err := pipeline.ParseConfig([]byte(cfg(jsonl.MaxValues+1)), t.TempDir(), "cap.yaml")
	if err == nil || !strings.Contains(err.Error(), "embodiments.e.obs") {
		t.Errorf("obs: %d: error %v, want one naming embodiments.e.obs", jsonl.MaxValues+1, err)
	}
}

// TestBombManyObjects runs 10⁴ tiny objects of one line each in one
// source: 100 units of 100 lines, one line per object. Each object is an
// ingest item with its own sealed folder, so the cost is per object:
// 10⁴ took 52 s through the binary on a shared 2-core machine, most of it
// waiting on the disk; BenchmarkBombRSS/objects-100k in the root package
// runs 10⁵. Under the race detector it runs 2·10³ (raceDetector).
func TestBombManyObjects(t *testing.T) {
	units, perUnit := int64(100), int64(100)
	if raceDetector {
		units = 20
	}
	files := make(map[string][]byte, units*perUnit)
	for u := range units {
		for i := range perUnit {
			unit := fmt.Sprintf("u%03d", u)
			files[fmt.Sprintf("%s/%04d.jsonl", unit, i)] = jsonLines(armLine(unit, int64(1000*(i+1)), ""))
		}
	}
	var m *pipeline.Manifest
	bounded(t, fmt.Sprintf("%d objects", units*perUnit), 8*time.Minute, 1<<30, func() {
		m = runPipeline(t, fixtureConfig(1<<20), files)
	})
	f := m.Funnel
	// Each unit is one episode of 100 steps (max_gap 1h), each step but
	// the last with 1 future goal.
	if f.Objects != units*perUnit || f.Lines != units*perUnit || f.Frames != units*perUnit ||
		f.Episodes != units || f.Pairs != units*(perUnit-1) || int64(len(m.Sources)) != units*perUnit {
		t.Errorf("funnel objects %d lines %d frames %d episodes %d pairs %d, %d sources; want %d %d %d %d %d, %d",
			f.Objects, f.Lines, f.Frames, f.Episodes, f.Pairs, len(m.Sources),
			units*perUnit, units*perUnit, units*perUnit, units, units*(perUnit-1), units*perUnit)
	}
}
