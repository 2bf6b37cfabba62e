package main

// Recordings (SPEC §7) under the crash and cluster guarantees: the demo
// fleet with its MCAP recordings (every §7 fault class: cut short, bad
// chunk, the three skips, a duplicate, stale and malformed ticks, mixed with
// JSON Lines) killed with SIGKILL at random moments and rerun, and split
// across workers, must give the version a clean single run gives: the same
// files byte for byte, the same digest, and the same recording entries in
// the manifest (SPEC §6: output never depends on how the work was done).

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io/fs"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"hindcast/fleet"
)

// recDemo writes the demo fleet with recordings into a new folder and
// returns the folder and its config's text. Configs must be written into
// that folder: their source `uri: logs` is relative to the config's place.
func recDemo(t *testing.T) (dir, text string) {
	t.Helper()
	dir = t.TempDir()
	if err := fleet.DemoWith(dir, fleet.DemoOptions{Recordings: true}); err != nil {
		t.Fatalf("demo fleet with recordings: %v", err)
	}
	b, err := os.ReadFile(filepath.Join(dir, "hindcast.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(string(b), `"**/*.mcap"`) {
		t.Fatalf("the demo config with recordings does not include **/*.mcap:\n%s", b)
	}
	return dir, string(b)
}

// recSourceObjects counts the objects the demo config with recordings
// takes (its include: JSON Lines, plain or compressed, and *.mcap) and the
// recordings among them.
func recSourceObjects(t *testing.T, logs string) (objects, recordings int) {
	t.Helper()
	err := filepath.WalkDir(logs, func(p string, d fs.DirEntry, err error) error {
		if err != nil || d.IsDir() {
			return err
		}
		n := d.Name()
		switch {
		case strings.HasSuffix(n, ".mcap"):
			objects++
			recordings++
		case strings.HasSuffix(n, ".jsonl"), strings.HasSuffix(n, ".jsonl.gz"), strings.HasSuffix(n, ".jsonl.zst"):
			objects++
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	return objects, recordings
}

// recManifest is the part of a manifest that says what each source gave
// (SPEC §5, §7.6), kept raw so that two versions compare exactly.
type recManifest struct {
	Sources []json.RawMessage `json:"sources"`
	Funnel  json.RawMessage   `json:"funnel"`
	Counts  json.RawMessage   `json:"counts"`
	Units   json.RawMessage   `json:"units"`
}

type recSource struct {
	Key        string          `json:"key"`
	Incomplete bool            `json:"incomplete"`
	Skipped    string          `json:"skipped"`
	Recording  json.RawMessage `json:"recording"`
}

func recReadManifest(t *testing.T, v clVersion) recManifest {
	t.Helper()
	var m recManifest
	if err := json.Unmarshal(v.files["manifest.json"], &m); err != nil {
		t.Fatalf("%s/manifest.json: %v", v.where, err)
	}
	return m
}

// recSameRecords asserts that two versions' manifests say the same of every
// source (recording entries, incomplete marks and skips included), and the
// same funnel, counts and units.
func recSameRecords(t *testing.T, want, got clVersion) {
	t.Helper()
	w, g := recReadManifest(t, want), recReadManifest(t, got)
	if len(w.Sources) != len(g.Sources) {
		t.Errorf("%s has %d sources, %s has %d", got.where, len(g.Sources), want.where, len(w.Sources))
	}
	for i := range min(len(w.Sources), len(g.Sources)) {
		if !bytes.Equal(w.Sources[i], g.Sources[i]) {
			t.Errorf("source %d of %s:\n%s\nof %s:\n%s", i, got.where, g.Sources[i], want.where, w.Sources[i])
		}
	}
	for _, f := range []struct {
		name string
		a, b json.RawMessage
	}{{"funnel", w.Funnel, g.Funnel}, {"counts", w.Counts, g.Counts}, {"units", w.Units, g.Units}} {
		if !bytes.Equal(f.a, f.b) {
			t.Errorf("%s of %s:\n%s\nof %s:\n%s", f.name, got.where, f.b, want.where, f.a)
		}
	}
}

// recCheckCorpus guards against a vacuous test: the clean version read
// every recording on disk, and among them some were incomplete (SPEC §7.5)
// and some skipped (§7.1).
func recCheckCorpus(t *testing.T, v clVersion, recordings int) {
	t.Helper()
	m := recReadManifest(t, v)
	var seen, incomplete, skipped, read int
	for _, raw := range m.Sources {
		var s recSource
		if err := json.Unmarshal(raw, &s); err != nil {
			t.Fatal(err)
		}
		if !strings.HasSuffix(s.Key, ".mcap") {
			continue
		}
		seen++
		if s.Incomplete {
			incomplete++
		}
		if s.Skipped != "" {
			skipped++
		}
		if len(s.Recording) > 0 && string(s.Recording) != "null" {
			read++
		}
	}
	if seen != recordings || incomplete == 0 || skipped == 0 || read == 0 {
		t.Fatalf("clean version lists %d of %d recordings (%d read, %d incomplete, %d skipped); want all, and some of each",
			seen, recordings, read, incomplete, skipped)
	}
	t.Logf("corpus: %d sources, %d recordings (%d read, %d incomplete, %d skipped)", len(m.Sources), recordings, read, incomplete, skipped)
}

// TestRecordingsCrashKillAndRerun kills a run of the demo fleet with
// recordings at 8 moments drawn over the length of a clean run (one per
// eighth of it, uniform within), each from an empty work area, reruns it on
// the same work area and output with the same version, and compares every
// file, the digest and the manifest's source entries with the clean run.
func TestRecordingsCrashKillAndRerun(t *testing.T) {
	bin := buildHindcast(t)
	dir, text := recDemo(t)
	_, recordings := recSourceObjects(t, filepath.Join(dir, "logs"))
	const dataset, version = "larkspur-aisles", "v1"
	clean := clDemoConfig(t, dir, text, "clean.yaml", "clean-work", "clean-out")
	began := time.Now()
	clMustRun(t, bin, nil, "run", "--config", clean, "--version", version, "--parallel", "2")
	length := time.Since(began)
	want := clLocalVersion(t, filepath.Join(dir, "clean-out"), dataset, version)
	recCheckCorpus(t, want, recordings)
	t.Logf("clean run: %.2fs, %d files", length.Seconds(), len(want.manifest.Files))

	// Every kill and rerun together get at most ten clean runs' time each,
	// and a bit for process start: past that the test fails, not hangs.
	const kills = 8
	ctx, cancel := context.WithTimeout(context.Background(), kills*(10*length+10*time.Second))
	defer cancel()
	rng := rand.New(rand.NewPCG(20261204, 0x7265636b))
	killed := 0
	for i := range kills {
		if ctx.Err() != nil {
			t.Fatalf("out of time after %d kills", i)
		}
		delay := time.Duration((float64(i) + rng.Float64()) / kills * float64(length))
		name := fmt.Sprintf("k%d", i)
		cfg := clDemoConfig(t, dir, text, name+".yaml", name+"-work", name+"-out")
		work, out := filepath.Join(dir, name+"-work"), filepath.Join(dir, name+"-out")
		manifest := filepath.Join(out, dataset, version, "manifest.json")

		k := crashKill(t, ctx, bin, delay, "run", "--config", cfg, "--version", version, "--parallel", "2")
		if k {
			killed++
		}
		_, err := os.Stat(manifest)
		committed := err == nil
		t.Logf("kill %d at %.2fs: killed %v; sealed %s; manifest %v; %d unfinished writes",
			i, delay.Seconds(), k, crashSealed(t, work), committed, crashTempFiles(t, work)+crashTempFiles(t, out))

		r := clRun(t, bin, nil, "run", "--config", cfg, "--version", version, "--parallel", "2")
		if committed {
			if r.code != 1 || !strings.Contains(r.stderr, "version already exists") {
				t.Errorf("kill %d: rerun over a committed version, want exit 1 (version already exists):\n%s", i, r)
			}
		} else if r.code != 0 {
			t.Errorf("kill %d: a version folder without manifest.json is not a version; want the rerun to succeed:\n%s", i, r)
			continue
		}
		got := clLocalVersion(t, out, dataset, version)
		clSameContent(t, want, got)
		recSameRecords(t, want, got)
	}
	// The moments are drawn over a clean run's length, so most kills land
	// before the run ends; a machine so loaded that none did tested nothing.
	if killed == 0 {
		t.Fatalf("none of the %d kills landed before its run ended", kills)
	}
}

// TestRecordingsWorkers runs the demo fleet with recordings as a cluster
// runs it (`hindcast stage --worker i/N` per stage, then `commit`) with 1, 2
// and 3 workers per stage, and compares each version with `hindcast run`'s:
// same files, same digest, same source entries.
func TestRecordingsWorkers(t *testing.T) {
	bin := buildHindcast(t)
	dir, text := recDemo(t)
	objects, recordings := recSourceObjects(t, filepath.Join(dir, "logs"))
	const dataset, partitions = "larkspur-aisles", 4 // the demo config's
	if !strings.Contains(text, fmt.Sprintf("\npartitions: %d\n", partitions)) {
		t.Fatalf("the demo config does not have %d partitions", partitions)
	}
	items := map[string]int{"ingest": objects, "episodes": partitions, "goals": partitions, "pack": partitions}
	ref := clDemoConfig(t, dir, text, "ref.yaml", "ref-work", "ref-out")
	r := clMustRun(t, bin, nil, "run", "--config", ref, "--version", "ref", "--parallel", "2")
	want := clLocalVersion(t, filepath.Join(dir, "ref-out"), dataset, "ref")
	recCheckCorpus(t, want, recordings)
	if d := clPrintedDigest(t, r); d != want.manifest.Digest {
		t.Errorf("run printed digest %s, manifest has %s", d, want.manifest.Digest)
	}
	for _, n := range []int{1, 2, 3} {
		t.Run(fmt.Sprintf("N=%d", n), func(t *testing.T) {
			name := fmt.Sprintf("n%d", n)
			cfg := clDemoConfig(t, dir, text, name+".yaml", name+"-work", name+"-out")
			commit := clRunCluster(t, bin, nil, cfg, "nightly", n, items)
			got := clLocalVersion(t, filepath.Join(dir, name+"-out"), dataset, "nightly")
			clSameContent(t, want, got)
			recSameRecords(t, want, got)
			if d := clPrintedDigest(t, commit); d != want.manifest.Digest {
				t.Errorf("commit printed digest %s, want %s", d, want.manifest.Digest)
			}
		})
	}
}
