package main

// Interruption: SIGTERM or SIGINT ends a run within seconds, with the exit
// code a shell gives a process a signal ended (128 + the signal's number,
// common practice) and a final "interrupted" record, leaving nothing a rerun
// would trust: the rerun with the same version gives the clean run's files
// and digest.

import (
	"bufio"
	"context"
	"encoding/json"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	"hindcast/fleet"
)

// signalRun starts a run, sends sig wait after the run logs the start of
// stage (its "stage start" record), and returns the exit code, how long the
// process took to end after the signal, and its stderr; sent is false when
// the run had ended before the signal could be sent.
func signalRun(t *testing.T, bin string, sig syscall.Signal, stage string, wait time.Duration, args ...string) (code int, after time.Duration, sent bool, stderr string) {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), clProcTimeout)
	defer cancel()
	cmd := exec.CommandContext(ctx, bin, args...)
	pipe, err := cmd.StderrPipe()
	if err != nil {
		t.Fatal(err)
	}
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	sentAt := make(chan time.Time, 1)
	var timer *time.Timer
	var log strings.Builder
	sc := bufio.NewScanner(pipe)
	sc.Buffer(make([]byte, 1<<20), 1<<20)
	for sc.Scan() {
		line := sc.Text()
		log.WriteString(line + "\n")
		if timer == nil && lastStage(line) == stage {
			timer = time.AfterFunc(wait, func() {
				if cmd.Process.Signal(sig) == nil {
					sentAt <- time.Now()
				}
			})
		}
	}
	err = cmd.Wait()
	code = clExitCode(t, cmd, err)
	if timer == nil || timer.Stop() {
		return code, 0, false, log.String() // never signalled
	}
	select {
	case at := <-sentAt:
		return code, time.Since(at), true, log.String()
	case <-time.After(time.Second):
		return code, 0, false, log.String() // the process had ended
	}
}

// TestSignalEndsRunWithinSeconds interrupts a run as it starts ingest,
// episodes and pack, and 300 ms into ingest and goals (items reading and
// writing), with SIGTERM and SIGINT; each must end within 5 s with exit 143
// or 130 and an "interrupted" record, commit nothing, and its rerun must
// give the clean run's digest and files.
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
	t.Logf("clean run: %.2fs", time.Since(began).Seconds())
	want := clLocalVersion(t, filepath.Join(dir, "clean-out"), dataset, version)

	for i, c := range []struct {
		sig   syscall.Signal
		stage string
		wait  time.Duration
		code  int // 128 + the signal's number (common practice)
	}{
		{syscall.SIGTERM, "ingest", 0, 143},
		{syscall.SIGINT, "episodes", 0, 130},
		{syscall.SIGTERM, "pack", 0, 143},
		{syscall.SIGTERM, "ingest", 300 * time.Millisecond, 143},
		{syscall.SIGINT, "goals", 300 * time.Millisecond, 130},
	} {
		name := fmt.Sprintf("s%d", i)
		cfg := filepath.Join(dir, name+".yaml")
		clWrite(t, cfg, []byte(benchConfigAt(t, dataset, name+"-work", name+"-out", 8, 5)))
		out := filepath.Join(dir, name+"-out")
		code, after, sent, stderr := signalRun(t, bin, c.sig, c.stage, c.wait, "run", "--config", cfg, "--version", version, "--parallel", "2")
		if !sent {
			t.Errorf("the run ended before %v %v into %s: exit %d\n%s", c.sig, c.wait, c.stage, code, clTail(stderr, 3000))
			continue
		}
		t.Logf("%v %v into %s (last stage started: %s): exit %d %.2fs later", c.sig, c.wait, c.stage, lastStage(stderr), code, after.Seconds())
		if code != c.code {
			t.Errorf("%v in %s: exit %d, want %d\n%s", c.sig, c.stage, code, c.code, clTail(stderr, 3000))
		}
		if after > 5*time.Second {
			t.Errorf("%v in %s: the run took %.2fs to end, want at most 5s", c.sig, c.stage, after.Seconds())
		}
		if _, rec := splitExitRecord(t, stderr); rec.Kind != kindInterrupted || rec.Exit != c.code {
			t.Errorf("%v in %s: final record %+v, want kind interrupted, exit %d", c.sig, c.stage, rec, c.code)
		}
		if m := manifests(t, out); len(m) != 0 {
			t.Errorf("%v in %s: an interrupted run committed %v", c.sig, c.stage, m)
		}
		clMustRun(t, bin, nil, "run", "--config", cfg, "--version", version, "--parallel", "2")
		got := clLocalVersion(t, out, dataset, version)
		got.where = name + " rerun after " + c.sig.String() + " in " + c.stage
		clSameContent(t, want, got)
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
