package main

import (
	"fmt"
	"io"
	"log/slog"
	"sort"
	"strings"
	"sync"
	"time"

	"github.com/schollz/progressbar/v3"

	"hindcast/pipeline"
)

// ui is how a run talks to people: live progress lines on a terminal,
// structured JSON logs otherwise.
type ui struct {
	w   io.Writer
	tty bool
	log *slog.Logger
}

func newUI(stderr io.Writer) *ui {
	tty := isTTY(stderr)
	return &ui{w: stderr, tty: tty, log: newLogger(stderr, tty)}
}

func (u *ui) progress() pipeline.Progress { return &progress{ui: u} }

// progress implements pipeline.Progress; stage items run concurrently, so
// every method takes the lock.
type progress struct {
	ui *ui
	mu sync.Mutex

	stage         string
	items, done   int
	reused        int
	frames, bytes int64
	imageBytes    int64 // image objects read by ingest, beside the log bytes
	kept          int64 // frames kept by ingest, duplicate objects not counted
	totalBytes    int64
	start         time.Time
	bar           *progressbar.ProgressBar
}

func (p *progress) StageStart(name string, items int, bytes int64) {
	p.mu.Lock()
	defer p.mu.Unlock()
	p.stage, p.items, p.done, p.reused, p.frames, p.bytes, p.imageBytes, p.kept, p.totalBytes, p.start = name, items, 0, 0, 0, 0, 0, 0, bytes, time.Now()
	if p.ui.tty {
		// Ingest is measured in bytes read (its ETA), later stages in items.
		total := int64(items)
		if name == pipeline.StageIngest && bytes > 0 {
			total = bytes
		}
		p.bar = progressbar.NewOptions64(total,
			progressbar.OptionSetWriter(p.ui.w),
			progressbar.OptionSetDescription(p.describe()),
			progressbar.OptionSetPredictTime(true),
			progressbar.OptionShowElapsedTimeOnFinish(),
			progressbar.OptionThrottle(200*time.Millisecond),
			progressbar.OptionSetWidth(24),
			progressbar.OptionClearOnFinish(),
		)
		if name == pipeline.StageIngest && bytes > 0 {
			progressbar.OptionShowBytes(true)(p.bar)
		}
	}
	p.ui.log.Info("stage start", "stage", name, "items", items, "bytes", bytes)
}

func (p *progress) describe() string {
	rate, read := 0.0, 0.0
	if s := time.Since(p.start).Seconds(); s > 0 {
		rate = float64(p.frames) / s
		read = float64(p.bytes+p.imageBytes) / s
	}
	if p.stage != pipeline.StageIngest {
		// Only ingest counts frames as it goes; the later stages' unit of
		// progress is the partition.
		return fmt.Sprintf("%-8s %d/%d partitions", p.stage, p.done, p.items)
	}
	return fmt.Sprintf("%-8s %d/%d objects, %s frames/s, %.1f MB/s read", p.stage, p.done, p.items, humanCount(rate), read/1e6)
}

// ImageRead counts the bytes of an image object ingest read, so that the
// read rate covers every byte fetched, not only the logs'. It is not part of
// pipeline.Progress: the stage finds it by an interface check.
func (p *progress) ImageRead(n int64) {
	p.mu.Lock()
	defer p.mu.Unlock()
	p.imageBytes += n
}

// KeptFrames takes the frames a stage kept in the items this run read
// (not reused), known once its items are
// sealed: ingest's stage-end "frames" counts these, as the funnel does,
// while "frames_read" counts every frame read, duplicate objects included.
func (p *progress) KeptFrames(stage string, n int64) {
	p.mu.Lock()
	defer p.mu.Unlock()
	p.kept = n
}

// setDescription changes the bar's text without drawing it: the next Add
// draws text and count together, so the line never shows the new count
// beside the old percentage.
func (p *progress) setDescription() {
	progressbar.OptionSetDescription(p.describe())(p.bar)
}

func (p *progress) Advance(name string, frames, bytes int64) {
	p.mu.Lock()
	defer p.mu.Unlock()
	p.frames += frames
	p.bytes += bytes
	if p.bar != nil && name == pipeline.StageIngest && p.totalBytes > 0 {
		p.setDescription()
		p.bar.Add64(bytes)
	}
}

func (p *progress) ItemDone(name string, reused bool) {
	p.mu.Lock()
	defer p.mu.Unlock()
	p.done++
	if reused {
		p.reused++
	}
	if p.bar != nil {
		p.setDescription()
		if !(name == pipeline.StageIngest && p.totalBytes > 0) {
			p.bar.Add(1)
		} else {
			p.bar.Describe(p.describe())
		}
	}
}

func (p *progress) StageEnd(name string) {
	p.mu.Lock()
	defer p.mu.Unlock()
	secs := time.Since(p.start).Seconds()
	if p.bar != nil {
		p.bar.Finish()
		fmt.Fprintf(p.ui.w, "%-8s %d items (%d reused) in %.2fs\n", name, p.items, p.reused, secs)
		p.bar = nil
	}
	if name != pipeline.StageIngest {
		// Only ingest counts frames and bytes as it goes; zeros for the
		// later stages would read as "nothing was processed".
		p.ui.log.Info("stage end", "stage", name, "items", p.items, "reused", p.reused, "seconds", secs)
		return
	}
	p.ui.log.Info("stage end", "stage", name, "items", p.items, "reused", p.reused, "frames", p.kept, "frames_read", p.frames,
		"bytes", p.bytes, "image_bytes", p.imageBytes, "seconds", secs)
}

func humanCount(v float64) string {
	switch {
	case v >= 1e6:
		return fmt.Sprintf("%.2fM", v/1e6)
	case v >= 1e3:
		return fmt.Sprintf("%.1fk", v/1e3)
	}
	return fmt.Sprintf("%.0f", v)
}

// printSummary writes the end-of-run report: the funnel with every drop
// reason, episodes and pairs per embodiment and split, files, and where the
// version is.
func printSummary(w io.Writer, m *pipeline.Manifest, where string) {
	f := m.Funnel
	fmt.Fprintf(w, "\ndataset %s version %s\n", m.Dataset, m.Version)
	fmt.Fprintf(w, "sources   %s (%s)\n", countOf(f.Objects, "object", "objects"), countOf(f.DuplicateObjects, "duplicate", "duplicates"))
	fmt.Fprintf(w, "lines     %d\n", f.Lines)
	fmt.Fprintf(w, "frames    %d kept (%s)\n", f.Frames, share(f.Frames, f.Lines))
	var dropped int64
	for _, r := range pipeline.Reasons() {
		dropped += f.Dropped[r]
	}
	fmt.Fprintf(w, "dropped   %d (%s)\n", dropped, share(dropped, f.Lines))
	for _, r := range pipeline.Reasons() {
		if n := f.Dropped[r]; n > 0 {
			fmt.Fprintf(w, "  %-20s %8d  %s\n", r, n, share(n, f.Lines))
		}
	}
	incomplete := 0
	for _, s := range m.Sources {
		if s.Incomplete {
			incomplete++
		}
	}
	if incomplete > 0 {
		fmt.Fprintf(w, "incomplete objects: %d\n", incomplete)
	}
	// Recordings skipped whole (SPEC §7.1): no lines, so the funnel alone
	// would not show them.
	var skipped int64
	var why []string
	for _, r := range pipeline.SkipReasons() {
		if n := f.SkippedObjects[r]; n > 0 {
			skipped += n
			why = append(why, fmt.Sprintf("%s %d", r, n))
		}
	}
	if skipped > 0 {
		fmt.Fprintf(w, "skipped recordings: %d (%s)\n", skipped, strings.Join(why, ", "))
	}
	fmt.Fprintf(w, "episodes  %d   pairs %d\n", f.Episodes, f.Pairs)
	fmt.Fprintf(w, "  %-14s %-6s %9s %10s %11s\n", "embodiment", "split", "episodes", "frames", "pairs")
	for _, c := range m.Counts {
		fmt.Fprintf(w, "  %-14s %-6s %9d %10d %11d\n", c.Embodiment, c.Split, c.Episodes, c.Frames, c.Pairs)
	}
	var bytes int64
	tables := map[string]int{}
	for _, fl := range m.Files {
		bytes += fl.Bytes
		tables[fl.Table]++
	}
	if len(m.Files) == 0 {
		fmt.Fprintf(w, "files     0\n")
	} else {
		var parts []string
		for _, t := range sortedNames(tables) {
			parts = append(parts, fmt.Sprintf("%d %s", tables[t], t))
		}
		fmt.Fprintf(w, "files     %d (%s), %.1f MB\n", len(m.Files), strings.Join(parts, ", "), float64(bytes)/1e6)
	}
	for _, s := range m.Stages {
		fmt.Fprintf(w, "  stage %-9s %6.2fs  %d items, %d reused\n", s.Name, s.Seconds, s.Items, s.Reused)
	}
	fmt.Fprintf(w, "digest    %s\n", m.Digest)
	fmt.Fprintf(w, "version   %s\n", where)
}

// countOf is n with its noun in the singular or the plural, as people read
// it ("1 object", "2 objects", "0 objects").
func countOf[N int | int64](n N, one, many string) string {
	if n == 1 {
		return "1 " + one
	}
	return fmt.Sprintf("%d %s", n, many)
}

func share(n, of int64) string {
	if of == 0 {
		return "0.0%"
	}
	return fmt.Sprintf("%.1f%%", 100*float64(n)/float64(of))
}

func sortedNames(m map[string]int) []string {
	var keys []string
	for k := range m {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	return keys
}
