package main

// Crash safety: a run killed with SIGKILL at any moment leaves nothing that a
// rerun trusts wrongly. Items without a completion record are redone, and a
// version folder without manifest.json is not a version (SPEC §4: the
// manifest is written last), so the rerun with the same --version succeeds
// and its version is byte-identical to a clean run's.

import (
	"context"
	"errors"
	"fmt"
	"io/fs"
	"maps"
	"math/rand/v2"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"syscall"
	"testing"
	"time"

	"hindcast/fleet"
)

// crashKill starts a run and sends it SIGKILL after delay, unless it ended
// first; it reports whether the kill is what ended it.
func crashKill(t *testing.T, ctx context.Context, bin string, delay time.Duration, args ...string) (killed bool) {
	t.Helper()
	cmd, _, stderr := clCommand(ctx, bin, nil, args...)
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	done := make(chan error, 1)
	go func() { done <- cmd.Wait() }()
	var err error
	select {
	case err = <-done:
	case <-time.After(delay):
		if kerr := cmd.Process.Signal(syscall.SIGKILL); kerr != nil && !errors.Is(kerr, os.ErrProcessDone) {
			t.Fatalf("kill: %v", kerr)
		}
		err = <-done
	}
	if ws, ok := cmd.ProcessState.Sys().(syscall.WaitStatus); ok && ws.Signaled() && ws.Signal() == syscall.SIGKILL {
		return true
	}
	if err != nil {
		t.Fatalf("run ended by itself with %v before the kill:\n%s", err, clTail(stderr.String(), 3000))
	}
	return false
}

// crashSealed summarises how far a killed run got: sealed items per stage.
func crashSealed(t *testing.T, work string) string {
	t.Helper()
	var parts []string
	for _, st := range clStageNames {
		parts = append(parts, fmt.Sprintf("%s %d", st, len(clSeals(t, work, st))))
	}
	return strings.Join(parts, ", ")
}

// crashTempFiles counts the unfinished writes (the stores' temporary files)
// under dir.
func crashTempFiles(t *testing.T, dir string) int {
	t.Helper()
	n := 0
	err := filepath.WalkDir(dir, func(p string, d fs.DirEntry, err error) error {
		if errors.Is(err, fs.ErrNotExist) && p == dir {
			return filepath.SkipAll
		}
		if err == nil && !d.IsDir() && strings.Contains(d.Name(), ".hindcast-tmp-") {
			n++
		}
		return err
	})
	if err != nil {
		t.Fatal(err)
	}
	return n
}

// TestCrashKillAndRerun kills a run at 10 moments drawn over the length of
// a clean run (one per tenth of it, uniform within), each from an empty work
// area, reruns it on the same work area and output with the same version,
// and compares every file and the digest with the clean run.
func TestCrashKillAndRerun(t *testing.T) {
	bin := buildHindcast(t)
	dir := t.TempDir()
	if _, _, err := fleet.Bench(filepath.Join(dir, "logs"), fleet.BenchOptions{Frames: 150000, Seed: 5}); err != nil {
		t.Fatal(err)
	}
	const dataset, version = "crash-fleet", "v1"
	clean := filepath.Join(dir, "clean.yaml")
	clWrite(t, clean, []byte(benchConfigAt(t, "crash-fleet", "clean-work", "clean-out", 8, 5)))
	began := time.Now()
	clMustRun(t, bin, nil, "run", "--config", clean, "--version", version, "--parallel", "2")
	length := time.Since(began)
	want := clLocalVersion(t, filepath.Join(dir, "clean-out"), dataset, version)
	t.Logf("clean run: %.2fs, %d files", length.Seconds(), len(want.manifest.Files))

	// Every kill and rerun together get at most ten clean runs' time each,
	// and a bit for process start: past that the test fails, not hangs.
	const kills = 10
	ctx, cancel := context.WithTimeout(context.Background(), kills*(10*length+10*time.Second))
	defer cancel()
	rng := rand.New(rand.NewPCG(20261201, 0x6b696c6c))
	for i := range kills {
		if ctx.Err() != nil {
			t.Fatalf("out of time after %d kills", i)
		}
		delay := time.Duration((float64(i) + rng.Float64()) / kills * float64(length))
		name := fmt.Sprintf("k%d", i)
		cfg := filepath.Join(dir, name+".yaml")
		clWrite(t, cfg, []byte(benchConfigAt(t, "crash-fleet", name+"-work", name+"-out", 8, 5)))
		work, out := filepath.Join(dir, name+"-work"), filepath.Join(dir, name+"-out")
		manifest := filepath.Join(out, dataset, version, "manifest.json")

		killed := crashKill(t, ctx, bin, delay, "run", "--config", cfg, "--version", version, "--parallel", "2")
		_, err := os.Stat(manifest)
		committed := err == nil
		t.Logf("kill %d at %.2fs: killed %v; sealed %s; manifest %v; %d unfinished writes",
			i, delay.Seconds(), killed, crashSealed(t, work), committed, crashTempFiles(t, work)+crashTempFiles(t, out))

		rerun := time.Now()
		r := clRun(t, bin, nil, "run", "--config", cfg, "--version", version, "--parallel", "2")
		if committed {
			// The version existed before the kill: it is complete, and
			// writing it again fails (SPEC §4).
			if r.code != 1 || !strings.Contains(r.stderr, "version already exists") {
				t.Errorf("kill %d: rerun over a committed version, want exit 1 (version already exists):\n%s", i, r)
			}
		} else if r.code != 0 {
			t.Errorf("kill %d: a version folder without manifest.json is not a version; want the rerun to succeed:\n%s", i, r)
			continue
		}
		t.Logf("kill %d: rerun exit %d in %.2fs; %d unfinished writes left in the work area", i, r.code, time.Since(rerun).Seconds(), crashTempFiles(t, work))
		got := clLocalVersion(t, out, dataset, version)
		// clLocalVersion has checked that the folder holds exactly the
		// manifest's files: nothing a killed commit left is part of it.
		clSameContent(t, want, got)
	}
}

// crashSmallRun runs a small benchmark fleet into dir/work and dir/out as
// version v1 and returns the config and the version.
func crashSmallRun(t *testing.T, bin, dir string) (string, clVersion) {
	t.Helper()
	if _, _, err := fleet.Bench(filepath.Join(dir, "logs"), fleet.BenchOptions{Frames: 20000, Seed: 5}); err != nil {
		t.Fatal(err)
	}
	cfg := filepath.Join(dir, "c.yaml")
	clWrite(t, cfg, []byte(benchConfigAt(t, "crash-fleet", "work", "out", 8, 5)))
	clMustRun(t, bin, nil, "run", "--config", cfg, "--version", "v1", "--parallel", "2")
	return cfg, clLocalVersion(t, filepath.Join(dir, "out"), "crash-fleet", "v1")
}

// TestCrashCommitKilledBeforeManifest is the kill that lands in a commit
// after every shard was published and before manifest.json was in place
// (Commit publishes the files, then the manifest): made here by removing the
// manifest of a finished run and adding what a kill leaves. The rerun with
// the same version must succeed and leave the folder holding exactly the
// manifest's files, no temporary file included.
func TestCrashCommitKilledBeforeManifest(t *testing.T) {
	bin := buildHindcast(t)
	dir := t.TempDir()
	cfg, want := crashSmallRun(t, bin, dir)
	want.where = "the first commit of v1"
	out := filepath.Join(dir, "out")
	folder := filepath.Join(out, "crash-fleet", "v1")
	if err := os.Remove(filepath.Join(folder, "manifest.json")); err != nil {
		t.Fatal(err)
	}
	// What else a killed commit can leave: its manifest half written (the
	// store's temporary file), and a shard that a run of another config had
	// published there before it was killed.
	clWrite(t, filepath.Join(folder, "manifest.json.hindcast-tmp-77"), []byte(`{"format": 1, "dat`))
	clWrite(t, filepath.Join(folder, "pairs", "split=train", "part-99999.parquet"), []byte("PAR1 of another run"))
	r := clRun(t, bin, nil, "run", "--config", cfg, "--version", "v1", "--parallel", "2")
	if r.code != 0 {
		t.Fatalf("a version folder without manifest.json is not a version; want the rerun to succeed:\n%s", r)
	}
	got := clLocalVersion(t, out, "crash-fleet", "v1")
	clSameContent(t, want, got)
}

// TestCrashUnsealedItemIsCleared is the kill that lands inside an item:
// its folder holds a finished file and an unfinished write (the store's
// temporary file), and no completion record. The rerun redoes that item
// alone, and clears what the killed attempt left (DEVELOPERS.md: "an item
// without a valid seal is cleared and redone").
func TestCrashUnsealedItemIsCleared(t *testing.T) {
	bin := buildHindcast(t)
	dir := t.TempDir()
	cfg, want := crashSmallRun(t, bin, dir)
	work := filepath.Join(dir, "work")
	seals := clSeals(t, work, "pack")
	keys := slices.Sorted(maps.Keys(seals))
	if len(keys) != 8 {
		t.Fatalf("pack sealed %d items, want 8 partitions", len(keys))
	}
	item := filepath.Join(work, "pack", keys[0])
	if err := os.Remove(filepath.Join(item, "_done.json")); err != nil {
		t.Fatal(err)
	}
	stale := filepath.Join(item, "stale.parquet")
	partial := filepath.Join(item, "frames.parquet.hindcast-tmp-4242")
	clWrite(t, stale, []byte("left by a killed attempt"))
	clWrite(t, partial, []byte("PAR1 cut short"))

	clMustRun(t, bin, nil, "run", "--config", cfg, "--version", "v2", "--parallel", "2")
	got := clLocalVersion(t, filepath.Join(dir, "out"), "crash-fleet", "v2")
	for i, st := range got.manifest.Stages {
		reused := st.Items // every item of ingest, episodes and goals
		if i == 3 {
			reused = 7 // pack: all but the unsealed one
		}
		if st.Name != clStageNames[i] || st.Reused != reused {
			t.Errorf("stage record %+v, want %s with %d reused", st, clStageNames[i], reused)
		}
	}
	clSameContent(t, want, got)
	if after := clSeals(t, work, "pack"); !maps.Equal(after, seals) {
		t.Errorf("pack seals after the rerun: %v, want the same 8 as before: %v", after, seals)
	}
	for _, p := range []string{stale, partial} {
		if _, err := os.Stat(p); !errors.Is(err, fs.ErrNotExist) {
			t.Errorf("%s, left by the killed attempt, is still in the redone item's folder (stat: %v)", filepath.Base(p), err)
		}
	}
}
