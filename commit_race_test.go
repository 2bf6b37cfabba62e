package main

// Two `hindcast run` processes committing one version at once: exactly one
// publishes it, the version holds exactly its manifest's files, and the
// other exits 1 (a runtime failure, as for any existing version) saying
// what happened.

import (
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"hindcast/fleet"
)

// raceOutcome checks two results of runs of one version: one exit 0, one
// exit 1 whose error line (the stderr line "hindcast run: …") says one of
// wantLoser first, before any storage error it wraps (a lost race used to
// print only "rename … no such file or directory"). It returns the loser
// and its error line.
func raceOutcome(t *testing.T, try int, res []clResult, wantLoser ...string) (clResult, string) {
	t.Helper()
	if len(res) != 2 {
		t.Fatalf("try %d: %d results", try, len(res))
	}
	win, lose := res[0], res[1]
	if win.code != 0 {
		win, lose = lose, win
	}
	if win.code != 0 || lose.code != 1 {
		t.Fatalf("try %d: exits %d and %d, want 0 and 1:\n%s\n%s", try, res[0].code, res[1].code, res[0], res[1])
	}
	var line string
	for _, l := range strings.Split(lose.stderr, "\n") {
		if strings.HasPrefix(l, "hindcast run: ") {
			line = l
		}
	}
	said := false
	for _, w := range wantLoser {
		i := strings.Index(line, w)
		said = said || i >= 0 && !strings.Contains(line[:i], "no such file") && !strings.Contains(line[:i], "rename ")
	}
	if !said {
		t.Errorf("try %d: the loser's error line does not say first one of %q:\n%s", try, wantLoser, lose)
	}
	return lose, line
}

// raceVerify checks a published version: the folder holds exactly its
// manifest's files with their SHA-256 (clLocalVersion), `hindcast verify`
// passes it, and no claim is left beside it.
func raceVerify(t *testing.T, bin, out, dataset, version string) clVersion {
	t.Helper()
	v := clLocalVersion(t, out, dataset, version)
	if r := clRun(t, bin, nil, "verify", filepath.Join(out, dataset, version)); r.code != 0 {
		t.Errorf("verify %s: %s", version, r)
	}
	if _, err := os.Stat(filepath.Join(out, dataset, version+"+claim.json")); !os.IsNotExist(err) {
		t.Errorf("claim of %s after the runs: %v, want it removed", version, err)
	}
	return v
}

// TestCommitRaceSameConfig: two runs of one config and version at once,
// sharing the work area and the output, 4 tries. The loser finds the work
// area locked by the other run (pipeline.WorkLockKey), or the version
// published.
func TestCommitRaceSameConfig(t *testing.T) {
	bin := buildHindcast(t)
	dir := t.TempDir()
	if _, _, err := fleet.Bench(filepath.Join(dir, "logs"), fleet.BenchOptions{Frames: 20000, Seed: 5}); err != nil {
		t.Fatal(err)
	}
	cfg := filepath.Join(dir, "c.yaml")
	clWrite(t, cfg, []byte(benchConfigAt(t, "race-fleet", "work", "out", 8, 5)))
	var first string
	for try := range 4 {
		version := fmt.Sprintf("v%d", try)
		args := []string{"run", "--config", cfg, "--version", version, "--parallel", "2"}
		res := clRunAll(t, bin, nil, [][]string{args, args})
		lose, line := raceOutcome(t, try, res, "another run is using this work area", "version already exists")
		switch {
		case strings.Contains(line, "version already exists") && !strings.Contains(line, "race-fleet/"+version+"/"):
			t.Errorf("try %d: the loser's error does not name the version folder:\n%s", try, lose)
		case strings.Contains(line, "another run") && !strings.Contains(line, filepath.Join(dir, "work", "run.lock.json")):
			t.Errorf("try %d: the loser's error does not name the work area's lock:\n%s", try, lose)
		}
		t.Logf("try %d: the loser said: %s", try, clTail(line, 300))
		v := raceVerify(t, bin, filepath.Join(dir, "out"), "race-fleet", version)
		if first == "" {
			first = v.manifest.Digest
		} else if v.manifest.Digest != first {
			t.Errorf("try %d: digest %s, first try %s", try, v.manifest.Digest, first)
		}
		if _, err := os.Stat(filepath.Join(dir, "work", "run.lock.json")); !os.IsNotExist(err) {
			t.Errorf("try %d: the work area's lock after both runs: %v, want it removed", try, err)
		}
	}
}

// TestCommitRaceSameConfigOwnWork: two runs of one config, each with its
// own work area (storage locations are not part of config_sha256, SPEC §5,
// so their commits have the same content), commit one version at once, 4
// tries. The loser says the version exists, published by the other commit
// while it ran when they met.
func TestCommitRaceSameConfigOwnWork(t *testing.T) {
	bin := buildHindcast(t)
	dir := t.TempDir()
	if _, _, err := fleet.Bench(filepath.Join(dir, "logs"), fleet.BenchOptions{Frames: 20000, Seed: 5}); err != nil {
		t.Fatal(err)
	}
	cfg1, cfg2 := filepath.Join(dir, "c1.yaml"), filepath.Join(dir, "c2.yaml")
	clWrite(t, cfg1, []byte(benchConfigAt(t, "race-fleet", "work-1", "out", 8, 5)))
	clWrite(t, cfg2, []byte(benchConfigAt(t, "race-fleet", "work-2", "out", 8, 5)))
	// Work areas filled first, so that the two commits meet.
	clMustRun(t, bin, nil, "run", "--config", cfg1, "--version", "warm-1")
	clMustRun(t, bin, nil, "run", "--config", cfg2, "--version", "warm-2")
	want := clLocalVersion(t, filepath.Join(dir, "out"), "race-fleet", "warm-1").manifest.Digest
	for try := range 4 {
		version := fmt.Sprintf("v%d", try)
		res := clRunAll(t, bin, nil, [][]string{
			{"run", "--config", cfg1, "--version", version},
			{"run", "--config", cfg2, "--version", version},
		})
		lose, line := raceOutcome(t, try, res, "version already exists")
		if !strings.Contains(line, "race-fleet/"+version+"/") {
			t.Errorf("try %d: the loser's error does not name the version folder:\n%s", try, lose)
		}
		t.Logf("try %d: the loser said: %s", try, clTail(line, 300))
		if v := raceVerify(t, bin, filepath.Join(dir, "out"), "race-fleet", version); v.manifest.Digest != want {
			t.Errorf("try %d: digest %s, want %s", try, v.manifest.Digest, want)
		}
	}
}

// TestCommitRaceOtherConfig: two runs of configs that differ in their seed
// (so in their pairs) commit one version at once, each from its own work
// area, 4 tries. The loser names the claim and what to do, or finds the
// version already published.
func TestCommitRaceOtherConfig(t *testing.T) {
	bin := buildHindcast(t)
	dir := t.TempDir()
	if _, _, err := fleet.Bench(filepath.Join(dir, "logs"), fleet.BenchOptions{Frames: 20000, Seed: 5}); err != nil {
		t.Fatal(err)
	}
	cfgA, cfgB := filepath.Join(dir, "a.yaml"), filepath.Join(dir, "b.yaml")
	clWrite(t, cfgA, []byte(benchConfigAt(t, "race-fleet", "work-a", "out", 8, 5)))
	clWrite(t, cfgB, []byte(benchConfigAt(t, "race-fleet", "work-b", "out", 8, 6)))
	// Work areas filled first, so that the two commits meet.
	clMustRun(t, bin, nil, "run", "--config", cfgA, "--version", "warm-a")
	clMustRun(t, bin, nil, "run", "--config", cfgB, "--version", "warm-b")
	digests := map[string]string{
		clLocalVersion(t, filepath.Join(dir, "out"), "race-fleet", "warm-a").manifest.Digest: "a",
		clLocalVersion(t, filepath.Join(dir, "out"), "race-fleet", "warm-b").manifest.Digest: "b",
	}
	if len(digests) != 2 {
		t.Fatal("the two configs give one digest: the race would not tell them apart")
	}
	for try := range 4 {
		version := fmt.Sprintf("v%d", try)
		res := clRunAll(t, bin, nil, [][]string{
			{"run", "--config", cfgA, "--version", version},
			{"run", "--config", cfgB, "--version", version},
		})
		lose, line := raceOutcome(t, try, res, "version claimed by a commit of other content", "version already exists")
		t.Logf("try %d: the loser said: %s", try, clTail(line, 300))
		if strings.Contains(line, "claimed") {
			for _, w := range []string{version + "+claim.json", "if none is running", "choose another version"} {
				if !strings.Contains(lose.stderr, w) {
					t.Errorf("try %d: the loser's stderr does not say %q:\n%s", try, w, lose)
				}
			}
		}
		v := raceVerify(t, bin, filepath.Join(dir, "out"), "race-fleet", version)
		if digests[v.manifest.Digest] == "" {
			t.Errorf("try %d: digest %s is neither config's", try, v.manifest.Digest)
		}
	}
}
