package main

// Interruption: SIGTERM or SIGINT ends a run within seconds, with the exit
// code a shell gives a process a signal ended (128 + the signal's number,
// common practice) and a final "interrupted" record, leaving nothing a rerun
// would trust: the rerun with the same version gives the clean run's files
// and digest.

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	"hindcast/fleet"
)

// signalRun starts a run, sends sig after delay, and returns the exit code
// and how long the process took to end after the signal; sent is false when
// the run had ended before the signal could be sent.
func signalRun(t *testing.T, bin string, sig syscall.Signal, delay time.Duration, args ...string) (code int, after time.Duration, sent bool, stderr string) {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), clProcTimeout)
	defer cancel()
	cmd, _, errBuf := clCommand(ctx, bin, nil, args...)
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	done := make(chan error, 1)
	go func() { done <- cmd.Wait() }()
	var err error
	select {
	case err = <-done:
		return clExitCode(t, cmd, err), 0, false, errBuf.String()
	case <-time.After(delay):
	}
	if serr := cmd.Process.Signal(sig); serr != nil {
		if !errors.Is(serr, os.ErrProcessDone) {
			t.Fatalf("signal: %v", serr)
		}
		return clExitCode(t, cmd, <-done), 0, false, errBuf.String()
	}
	sentAt := time.Now()
	select {
	case err = <-done:
	case <-time.After(30 * time.Second):
		cmd.Process.Kill()
		<-done
		t.Fatalf("run still going 30s after %v:\n%s", sig, clTail(errBuf.String(), 3000))
	}
	return clExitCode(t, cmd, err), time.Since(sentAt), true, errBuf.String()
}

// TestSignalEndsRunWithinSeconds interrupts a run at three moments of a
// clean run's length (ingest, the middle, the end), with SIGTERM twice and
// SIGINT once; each must end within 5 s with exit 143 or 130 and an
// "interrupted" record, commit nothing, and its rerun must give the clean
// run's digest and files.
func TestSignalEndsRunWithinSeconds(t *testing.T) {
	bin := buildHindcast(t)
	dir := t.TempDir()
	if _, _, err := fleet.Bench(filepath.Join(dir, "logs"), fleet.BenchOptions{Frames: 120000, Seed: 5}); err != nil {
		t.Fatal(err)
	}
	const dataset, version = "signal-fleet", "v1"
	clean := filepath.Join(dir, "clean.yaml")
	clWrite(t, clean, []byte(benchConfigAt(t, dataset, "clean-work", "clean-out", 8, 5)))
	began := time.Now()
	clMustRun(t, bin, nil, "run", "--config", clean, "--version", version, "--parallel", "2")
	length := time.Since(began)
	want := clLocalVersion(t, filepath.Join(dir, "clean-out"), dataset, version)
	t.Logf("clean run: %.2fs", length.Seconds())
	if length < 3*time.Second {
		t.Fatalf("a clean run took %v: too short to interrupt at three moments; grow the fleet", length)
	}

	interrupted := 0
	for i, c := range []struct {
		sig  syscall.Signal
		at   float64 // moment, as a fraction of the clean run's length
		code int
	}{
		{syscall.SIGTERM, 0.15, 143},
		{syscall.SIGINT, 0.5, 130},
		{syscall.SIGTERM, 0.85, 143},
	} {
		name := fmt.Sprintf("s%d", i)
		cfg := filepath.Join(dir, name+".yaml")
		clWrite(t, cfg, []byte(benchConfigAt(t, dataset, name+"-work", name+"-out", 8, 5)))
		out := filepath.Join(dir, name+"-out")
		delay := time.Duration(c.at * float64(length))
		code, after, sent, stderr := signalRun(t, bin, c.sig, delay, "run", "--config", cfg, "--version", version, "--parallel", "2")
		if !sent {
			t.Logf("%v at %.2fs: the run had ended, exit %d", c.sig, delay.Seconds(), code)
			// Only the last moment may come after a faster run's end.
			if code != 0 || c.at < 0.8 {
				t.Errorf("%v at %.2fs: the run ended before it, exit %d", c.sig, delay.Seconds(), code)
			}
			continue
		}
		t.Logf("%v at %.2fs, in stage %s: exit %d %.2fs later", c.sig, delay.Seconds(), lastStage(stderr), code, after.Seconds())
		if code == 0 && c.at > 0.8 {
			continue // it was committing, and finished
		}
		interrupted++
		if code != c.code {
			t.Errorf("%v at %.2fs: exit %d, want %d\n%s", c.sig, delay.Seconds(), code, c.code, clTail(stderr, 3000))
		}
		if after > 5*time.Second {
			t.Errorf("%v at %.2fs: the run took %.2fs to end, want at most 5s", c.sig, delay.Seconds(), after.Seconds())
		}
		if _, rec := splitExitRecord(t, stderr); rec.Kind != kindInterrupted || rec.Exit != c.code {
			t.Errorf("%v: final record %+v, want kind interrupted, exit %d", c.sig, rec, c.code)
		}
		if m := manifests(t, out); len(m) != 0 {
			t.Errorf("%v: an interrupted run committed %v", c.sig, m)
		}
		clMustRun(t, bin, nil, "run", "--config", cfg, "--version", version, "--parallel", "2")
		got := clLocalVersion(t, out, dataset, version)
		got.where = name + " rerun after " + c.sig.String()
		clSameContent(t, want, got)
	}
	if interrupted < 2 {
		t.Errorf("%d runs interrupted, want at least 2", interrupted)
	}
}

// TestNonRegularSourceFailsItsItem: a named pipe named like an object, and
// a link to /dev/zero, each fail the run at once (exit 1, an "input"
// record) naming the object and what it is, where they hung it before;
// left out with source.exclude, the run succeeds. The process is killed
// after clProcTimeout, so a hang fails the test instead of stalling it.
func TestNonRegularSourceFailsItsItem(t *testing.T) {
	bin := buildHindcast(t)
	for _, c := range []struct {
		key, kind string
		make      func(path string) error
	}{
		{"cart/unit7.jsonl", "a named pipe", func(p string) error { return syscall.Mkfifo(p, 0o644) }},
		{"cart/x.jsonl", "a character device", func(p string) error { return os.Symlink("/dev/zero", p) }},
	} {
		cfg, dir := fixtureJob(t)
		if err := c.make(filepath.Join(dir, "logs", filepath.FromSlash(c.key))); err != nil {
			t.Fatal(err)
		}
		start := time.Now()
		r := clRun(t, bin, nil, "run", "--config", cfg, "--version", "v1")
		t.Logf("%s: exit %d after %.2fs", c.kind, r.code, time.Since(start).Seconds())
		human, rec := splitExitRecord(t, r.stderr)
		if r.code != exitRuntime || rec.Kind != kindInput {
			t.Errorf("%s: exit %d, record %+v; want exit 1, kind input\n%s", c.kind, r.code, rec, r)
		}
		if want := c.key + ": not a regular file (" + c.kind + ")"; !strings.Contains(human, want) {
			t.Errorf("%s: stderr does not say %q:\n%s", c.kind, want, human)
		}
		if m := manifests(t, dir); len(m) != 0 {
			t.Errorf("%s: a failed run wrote %v", c.kind, m)
		}
		text, err := os.ReadFile(cfg)
		if err != nil {
			t.Fatal(err)
		}
		clWrite(t, cfg, []byte(strings.Replace(string(text), "\nwork: work\n", "\n  exclude: ['"+c.key+"']\nwork: work\n", 1)))
		clMustRun(t, bin, nil, "run", "--config", cfg, "--version", "v1")
	}
}

// lastStage names the stage whose "stage start" record came last in a
// run's log ("" when none did).
func lastStage(log string) string {
	stage := ""
	for _, line := range strings.Split(log, "\n") {
		var rec struct {
			Msg   string `json:"msg"`
			Stage string `json:"stage"`
		}
		if json.Unmarshal([]byte(line), &rec) == nil && rec.Msg == "stage start" {
			stage = rec.Stage
		}
	}
	return stage
}
