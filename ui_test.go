package main

import (
	"bytes"
	"io"
	"log/slog"
	"regexp"
	"strings"
	"testing"
	"time"

	"hindcast/pipeline"
)

// TestProgressLineCountAndPercentAgree: on a terminal, the partition count
// and the percentage drawn on one line agree (1/4 with 25%, never 2/4 with
// 25%).
func TestProgressLineCountAndPercentAgree(t *testing.T) {
	var b bytes.Buffer
	u := &ui{w: &b, tty: true, log: slog.New(slog.NewTextHandler(io.Discard, nil))}
	p := &progress{ui: u}
	p.StageStart(pipeline.StageEpisodes, 4, 0)
	for range 4 {
		p.ItemDone(pipeline.StageEpisodes, false)
	}
	p.StageEnd(pipeline.StageEpisodes)
	line := regexp.MustCompile(`(\d)/4 partitions\s+(\d+)%`)
	seen := 0
	for _, m := range line.FindAllStringSubmatch(b.String(), -1) {
		seen++
		if want := map[string]string{"0": "0", "1": "25", "2": "50", "3": "75", "4": "100"}[m[1]]; m[2] != want {
			t.Errorf("progress shows %s/4 partitions at %s%%, want %s%%", m[1], m[2], want)
		}
	}
	if seen == 0 {
		t.Fatalf("no progress line drawn:\n%q", b.String())
	}
}

// TestProgressReadRateCountsImages: ingest's read rate counts image bytes
// beside log bytes.
func TestProgressReadRateCountsImages(t *testing.T) {
	u := &ui{w: io.Discard, tty: false, log: slog.New(slog.NewTextHandler(io.Discard, nil))}
	p := &progress{ui: u}
	p.StageStart(pipeline.StageIngest, 1, 1000)
	p.Advance(pipeline.StageIngest, 10, 1000)
	p.ImageRead(4000)
	if p.bytes+p.imageBytes != 5000 {
		t.Errorf("read %d bytes, want 1000 log + 4000 image = 5000", p.bytes+p.imageBytes)
	}
	// 10 MB of logs and 40 MB of images over 10 s: 5.0 MB/s.
	q := &progress{stage: pipeline.StageIngest, items: 2, bytes: 10e6, imageBytes: 40e6, start: time.Now().Add(-10 * time.Second)}
	if d := q.describe(); !strings.HasSuffix(d, ", 5.0 MB/s read") {
		t.Errorf("ingest line %q, want a read rate of 5.0 MB/s", d)
	}
}

// TestStageEndLogCounts: ingest's stage-end log names the kept frames
// (duplicate objects not counted) beside the frames read; later stages,
// which count neither frames nor bytes, log neither.
func TestStageEndLogCounts(t *testing.T) {
	var b bytes.Buffer
	u := &ui{w: io.Discard, tty: false, log: slog.New(slog.NewJSONHandler(&b, nil))}
	p := &progress{ui: u}
	p.StageStart(pipeline.StageIngest, 2, 300)
	p.Advance(pipeline.StageIngest, 12, 300) // 6 frames of an object and 6 of its duplicate
	p.KeptFrames(pipeline.StageIngest, 6)
	p.StageEnd(pipeline.StageIngest)
	p.StageStart(pipeline.StageEpisodes, 1, 0)
	p.StageEnd(pipeline.StageEpisodes)
	lines := strings.Split(strings.TrimSpace(b.String()), "\n")
	if len(lines) != 4 {
		t.Fatalf("%d log lines, want 4:\n%s", len(lines), b.String())
	}
	if !strings.Contains(lines[1], `"frames":6,"frames_read":12,"bytes":300,`) {
		t.Errorf("ingest stage end: %s", lines[1])
	}
	if strings.Contains(lines[3], `"frames"`) || strings.Contains(lines[3], `"bytes"`) {
		t.Errorf("episodes stage end logs counts it does not keep: %s", lines[3])
	}
}
