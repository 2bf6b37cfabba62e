package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"syscall"
	"testing"

	"hindcast/pipeline"
)

// exitRecord is the final log record of an error exit.
type exitRecord struct {
	Level   string `json:"level"`
	Msg     string `json:"msg"`
	Command string `json:"command"`
	Kind    string `json:"kind"`
	Error   string `json:"error"`
	Exit    int    `json:"exit"`
}

// splitExitRecord parses the last line of stderr as the final record of an
// error exit (one JSON object, RFC 8259) and returns it with what stderr
// held before it.
func splitExitRecord(t *testing.T, stderr string) (before string, rec exitRecord) {
	t.Helper()
	text := strings.TrimSuffix(stderr, "\n")
	i := strings.LastIndex(text, "\n")
	last := text[i+1:]
	var raw map[string]any
	if err := json.Unmarshal([]byte(last), &raw); err != nil {
		t.Fatalf("last line of stderr is not a JSON object (RFC 8259): %v\n%s", err, last)
	}
	if err := json.Unmarshal([]byte(last), &rec); err != nil {
		t.Fatalf("last line of stderr: %v\n%s", err, last)
	}
	if rec.Level != "ERROR" || rec.Msg != "command failed" {
		t.Fatalf("last line of stderr is not the final record (level ERROR, msg \"command failed\"): %s", last)
	}
	return text[:i+1], rec
}

// TestExitRecordBadConfig: a bad config exits 2 and the last line of
// stderr is the final record, kind config: what tells it from a crash of
// the Go runtime, which also exits 2 but writes no such record.
func TestExitRecordBadConfig(t *testing.T) {
	dir := t.TempDir()
	cfg := filepath.Join(dir, "hindcast.yaml")
	writeFile(t, cfg, []byte(strings.Replace(fixConfig("logs", "float32"), "  gamma: 0.5\n", "  gamma: 1.5\n", 1)))
	code, _, errOut := runMain(t, "run", "--config", cfg, "--version", "v1")
	_, rec := splitExitRecord(t, errOut)
	if code != exitUsage || rec.Kind != kindConfig || rec.Exit != exitUsage || rec.Command != "run" || !strings.Contains(rec.Error, "goals.gamma") {
		t.Errorf("exit %d, record %+v; want exit 2, kind config, command run, the error naming goals.gamma", code, rec)
	}
}

// TestExitRecordPanic: a panic in a command (here: writing to a nil
// stdout) is recovered into exit code 4 and an "internal" record, not Go's
// crash with exit code 2.
func TestExitRecordPanic(t *testing.T) {
	var stderr bytes.Buffer
	code := Main(context.Background(), []string{"version"}, nil, &stderr)
	_, rec := splitExitRecord(t, stderr.String())
	if code != exitInternal || rec.Kind != kindInternal || rec.Exit != exitInternal || !strings.Contains(rec.Error, "internal error") {
		t.Errorf("exit %d, record %+v; want exit 4, kind internal", code, rec)
	}
}

// TestExitRecordKinds: each failure maps to its kind and exit code; a
// cancellation by a signal is "interrupted" with 128 + the signal's number
// whatever error it surfaced as.
func TestExitRecordKinds(t *testing.T) {
	bg := context.Background()
	term, cancel := context.WithCancelCause(bg)
	cancel(interruptedError{sig: syscall.SIGTERM})
	intr, cancel2 := context.WithCancelCause(bg)
	cancel2(interruptedError{sig: syscall.SIGINT})
	cases := []struct {
		ctx  context.Context
		err  error
		kind string
		code int
	}{
		{bg, usageError{err: errors.New("x")}, kindUsage, 2},
		{bg, fmt.Errorf("load: %w", &pipeline.ConfigError{}), kindConfig, 2},
		{bg, fmt.Errorf("commit: %w", pipeline.ErrGateFailed), kindGate, 3},
		{bg, fmt.Errorf("ingest: %w", pipeline.ErrNotRegular), kindInput, 1},
		{bg, fmt.Errorf("ingest: %w", pipeline.ErrChanged), kindInput, 1},
		{bg, fmt.Errorf("pack: %w", pipeline.ErrInternal), kindInternal, 4},
		{bg, errors.New("list: connection refused"), kindRuntime, 1},
		// 128 + 15 and 128 + 2, as a shell reports a process a signal ended (common practice).
		{term, fmt.Errorf("ingest: %w", context.Canceled), kindInterrupted, 143},
		{intr, errors.New("read: file already closed"), kindInterrupted, 130},
	}
	for _, c := range cases {
		if kind, code := classify(c.ctx, c.err); kind != c.kind || code != c.code {
			t.Errorf("classify(%v) = %s, %d; want %s, %d", c.err, kind, code, c.kind, c.code)
		}
	}
}

// TestExitRecordInterruptedRun: a run whose context a SIGTERM cancelled
// (before it began, here) exits 143 with an "interrupted" record, and
// commits nothing.
func TestExitRecordInterruptedRun(t *testing.T) {
	cfg, dir := fixtureJob(t)
	ctx, cancel := context.WithCancelCause(context.Background())
	cancel(interruptedError{sig: syscall.SIGTERM})
	var stdout, stderr bytes.Buffer
	code := Main(ctx, []string{"run", "--config", cfg, "--version", "v1"}, &stdout, &stderr)
	human, rec := splitExitRecord(t, stderr.String())
	if code != 143 || rec.Kind != kindInterrupted || rec.Exit != 143 || !strings.Contains(human, "interrupted by signal 15 (terminated)") {
		t.Errorf("exit %d, record %+v; want exit 143, kind interrupted\n%s", code, rec, human)
	}
	if m := manifests(t, dir); len(m) != 0 {
		t.Errorf("an interrupted run wrote %v", m)
	}
}

// TestUnwritableOutputExits1BeforeWork: an output that cannot be written
// (its parent is a file: ENOTDIR for any user, root included) fails the run
// with exit 1 before the first stage, naming the output; the final record
// says kind runtime.
func TestUnwritableOutputExits1BeforeWork(t *testing.T) {
	cfg, dir := fixtureJob(t)
	blocker := filepath.Join(dir, "job", "blocker")
	writeFile(t, blocker, []byte("a file, not a folder"))
	text, err := os.ReadFile(cfg)
	if err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(string(text), "\noutput: out\n") {
		t.Fatalf("fixture config has no output: out")
	}
	writeFile(t, cfg, []byte(strings.Replace(string(text), "\noutput: out\n", "\noutput: blocker/out\n", 1)))
	code, _, errOut := runMain(t, "run", "--config", cfg, "--version", "v1")
	human, rec := splitExitRecord(t, errOut)
	if code != exitRuntime || rec.Kind != kindRuntime || rec.Exit != exitRuntime {
		t.Errorf("exit %d, record %+v; want exit 1, kind runtime", code, rec)
	}
	if want := "output file://" + filepath.ToSlash(filepath.Join(blocker, "out")) + "/ cannot be written"; !strings.Contains(human, want) {
		t.Errorf("stderr does not say %q:\n%s", want, human)
	}
	if strings.Contains(errOut, `"stage start"`) {
		t.Errorf("a stage started before the failure:\n%s", errOut)
	}
}
