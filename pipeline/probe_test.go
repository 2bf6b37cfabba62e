package pipeline_test

import (
	"context"
	"os"
	"path/filepath"
	"strings"
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
// the run before its first stage naming it. Root writes through modes, so
// the test needs an ordinary user (CI runs as one); as root it is skipped
// and TestProbeOutputUnderAFile stands in.
func TestProbeReadOnlyFolder(t *testing.T) {
	if os.Geteuid() == 0 {
		t.Skip("root writes into 0555 folders; see TestProbeOutputUnderAFile")
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
