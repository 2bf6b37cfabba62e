package main

// The quality gates at the command line: a failed gate exits 3 and commits
// nothing (pipeline/gates.go); the built-in gate refuses a version without
// frames whatever the quarantine setting.

import (
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// noFramesJob writes a source whose every line is dropped (3 malformed
// lines and 2 of an undeclared embodiment) and a config for it.
func noFramesJob(t *testing.T, quarantine bool) (string, string) {
	t.Helper()
	dir := t.TempDir()
	writeFile(t, filepath.Join(dir, "logs", "a.jsonl"), []byte("not json\n{\"unit\":1}\n[]\n"+
		`{"unit":"u1","embodiment":"ghost","t":1,"obs":[1]}`+"\n"+
		`{"unit":"u1","embodiment":"ghost","t":2,"obs":[1]}`+"\n"))
	cfg := fmt.Sprintf(`dataset: empty
source:
  uri: ../logs
work: work
output: out
partitions: 2
seed: 1
embodiments:
  arm:
    obs: 1
    goal_tolerance: 0.05
episodes:
  max_gap: 1s
  min_steps: 2
  max_steps: 10
goals:
  future: 1
  gamma: 0.5
quarantine: %v
`, quarantine)
	p := filepath.Join(dir, "job", "hindcast.yaml")
	writeFile(t, p, []byte(cfg))
	return p, dir
}

func TestNoFramesGateExits3(t *testing.T) {
	for _, q := range []bool{false, true} {
		t.Run(fmt.Sprintf("quarantine=%v", q), func(t *testing.T) {
			cfg, dir := noFramesJob(t, q)
			code, _, errOut := runMain(t, "run", "--config", cfg, "--version", "v1")
			if code != exitGate {
				t.Fatalf("exit %d, want %d\n%s", code, exitGate, errOut)
			}
			// The gate, its measured value and its threshold.
			if !strings.Contains(errOut, "min_frames_total: 0, at least 1") || !strings.Contains(errOut, "nothing committed") {
				t.Errorf("stderr does not name the failed gate:\n%s", errOut)
			}
			if strings.Contains(errOut, "no such file") {
				t.Errorf("stderr reports a storage failure:\n%s", errOut)
			}
			if ms := manifests(t, filepath.Join(dir, "job", "out")); len(ms) != 0 {
				t.Errorf("committed %v", ms)
			}
			notExist(t, filepath.Join(dir, "job", "out", "empty", "v1"), "a failed gate commits nothing")
			// The built-in gate cannot be waived: an empty version has
			// nothing to publish.
			code, _, errOut = runMain(t, "run", "--config", cfg, "--version", "v1", "--waive", "min_frames_total")
			if code != exitGate || len(manifests(t, filepath.Join(dir, "job", "out"))) != 0 {
				t.Errorf("waived: exit %d, want %d and nothing committed\n%s", code, exitGate, errOut)
			}
			if _, err := os.Stat(filepath.Join(dir, "job", "work")); err != nil {
				t.Errorf("the stages' work is not kept for a rerun: %v", err)
			}
		})
	}
}
