package pipeline_test

import (
	"context"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"syscall"
	"testing"

	"hindcast/pipeline"
	"hindcast/stages"
)

// startCounter is a Progress that counts the stages started.
type startCounter struct{ n int }

func (c *startCounter) StageStart(string, int, int64) { c.n++ }
func (c *startCounter) Advance(string, int64, int64)  {}
func (c *startCounter) ItemDone(string, bool)         {}
func (c *startCounter) StageEnd(string)               {}
func (c *startCounter) KeptFrames(string, int64)      {}
func probeConfig(t *testing.T, dir, work, out string) *pipeline.Config {
	t.Helper()
	gatesWrite(t, dir, "a.jsonl", gatesLog("u1", 1e18, 10, 0))
	text := gatesRunYAML + "work: " + work + "\noutput: " + out + "\n"
	cfg, err := pipeline.ParseConfig([]byte(text), dir, "c.yaml")
	if err != nil {
		t.Fatal(err)
	}
	return cfg
}

// probeFails runs cfg and wants it to fail before its first stage, naming
// the location (role and path) that cannot be written.
func probeFails(t *testing.T, cfg *pipeline.Config, role, path string) {
	t.Helper()
	prog := &startCounter{}
	_, err := pipeline.Execute(context.Background(), cfg, stages.All(), pipeline.Options{Version: "v1", Parallel: 2, Progress: prog})
	if err == nil {
		t.Fatalf("run with %s %s not writable: no error", role, path)
	}
	if want := role + " file://" + filepath.ToSlash(path) + "/ cannot be written"; !strings.Contains(err.Error(), want) {
		t.Errorf("error %q does not say %q", err, want)
	}
	if prog.n != 0 {
		t.Errorf("%d stages started before the failure, want 0", prog.n)
	}
}

// TestProbeOutputUnderAFile: an output (or work) location whose parent is a
// file cannot be written by anyone, root included (ENOTDIR, POSIX); the run
// fails before its first stage naming it.
func TestProbeOutputUnderAFile(t *testing.T) {
	for _, role := range []string{"work", "output"} {
		dir := t.TempDir()
		blocker := filepath.Join(dir, "blocker")
		if err := os.WriteFile(blocker, []byte("a file, not a folder"), 0o644); err != nil {
			t.Fatal(err)
		}
		bad := filepath.Join(blocker, "area")
		work, out := filepath.Join(dir, "work"), filepath.Join(dir, "out")
		if role == "work" {
			work = bad
		} else {
			out = bad
		}
		probeFails(t, probeConfig(t, dir, work, out), role, bad)
	}
}

// TestProbeReadOnlyFolder: a read-only (0555) output or work folder fails
// the run before its first stage naming it. Root writes through modes
// (POSIX permission checks do not apply to it), so as root the test runs
// itself again as the unprivileged uid 65534 (the conventional "nobody",
// common practice), from a copy of the test binary that user can run.
func TestProbeReadOnlyFolder(t *testing.T) {
	if os.Geteuid() == 0 {
		probeAsNobody(t, "TestProbeReadOnlyFolder")
		return
	}
	for _, role := range []string{"work", "output"} {
		dir := t.TempDir()
		work, out := filepath.Join(dir, "work"), filepath.Join(dir, "out")
		bad := out
		if role == "work" {
			bad = work
		}
		if err := os.Mkdir(bad, 0o555); err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() { os.Chmod(bad, 0o755) })
		probeFails(t, probeConfig(t, dir, work, out), role, bad)
	}
}

// probeAsNobody runs the test name of this test binary as uid/gid 65534
// and fails unless it passed (not skipped).
func probeAsNobody(t *testing.T, name string) {
	t.Helper()
	self, err := os.Executable()
	if err != nil {
		t.Fatal(err)
	}
	dir, err := os.MkdirTemp("", "hindcast-nobody-")
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { os.RemoveAll(dir) })
	if err := os.Chmod(dir, 0o755); err != nil {
		t.Fatal(err)
	}
	bin := filepath.Join(dir, "pipeline.test")
	b, err := os.ReadFile(self)
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(bin, b, 0o755); err != nil {
		t.Fatal(err)
	}
	tmp := filepath.Join(dir, "tmp")
	if err := os.Mkdir(tmp, 0o777); err != nil {
		t.Fatal(err)
	}
	if err := os.Chmod(tmp, 0o1777); err != nil {
		t.Fatal(err)
	}
	cmd := exec.Command(bin, "-test.run=^"+name+"$", "-test.v", "-test.count=1")
	cmd.Dir = dir
	cmd.Env = []string{"TMPDIR=" + tmp, "PATH=" + os.Getenv("PATH")}
	cmd.SysProcAttr = &syscall.SysProcAttr{Credential: &syscall.Credential{Uid: 65534, Gid: 65534}}
	outb, err := cmd.CombinedOutput()
	if err != nil {
		t.Fatalf("%s as uid 65534: %v\n%s", name, err, outb)
	}
	if !strings.Contains(string(outb), "--- PASS: "+name) {
		t.Fatalf("%s as uid 65534 did not pass:\n%s", name, outb)
	}
}

// TestProbeLeavesNothing: a run that succeeds leaves no probe object in
// its work area or output.
func TestProbeLeavesNothing(t *testing.T) {
	dir := t.TempDir()
	work, out := filepath.Join(dir, "work"), filepath.Join(dir, "out")
	cfg := probeConfig(t, dir, work, out)
	if _, err := pipeline.Execute(context.Background(), cfg, stages.All(), pipeline.Options{Version: "v1", Parallel: 2}); err != nil {
		t.Fatal(err)
	}
	for _, d := range []string{work, out} {
		entries, err := os.ReadDir(d)
		if err != nil {
			t.Fatal(err)
		}
		for _, e := range entries {
			if strings.Contains(e.Name(), "probe") {
				t.Errorf("%s holds %s after the run", d, e.Name())
			}
		}
	}
}
