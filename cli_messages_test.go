package main

// The exact wording of the command line's messages: each problem said once,
// with one command's usage, on the right stream and with the right exit
// code; and the messages of opening something that is not a version.

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"runtime"
	"strings"
	"testing"
	"time"

	"hindcast/pipeline"
)

// showUsage is `hindcast show`'s usage as printed after an error: a command
// with no machine-dependent default, so it can be spelled out here.
const showUsage = `Usage:
  hindcast show VERSION [--json]

Flags:
  --json
    	print the answer as JSON
`

func TestMistypedFlagSaidOnceWithTheCommandsUsage(t *testing.T) {
	cases := []struct {
		args      []string
		firstLine string
		usage     string // the usage line that must follow
	}{
		{[]string{"run", "--conifg", "x.yaml"},
			"hindcast run: flag provided but not defined: -conifg",
			"  hindcast run --config FILE [--version V] [--parallel N]"},
		{[]string{"stage", "ingest", "--config", "x.yaml", "--worker", "3/2"},
			`hindcast stage: invalid value "3/2" for flag -worker: want I/N with 0 <= I < N, got "3/2"`,
			"  hindcast stage NAME --config FILE [--worker I/N | --workers N]"},
		{[]string{"show", "V", "--josn"},
			"hindcast show: flag provided but not defined: -josn",
			"  hindcast show VERSION [--json]"},
	}
	for _, c := range cases {
		t.Run(strings.Join(c.args, " "), func(t *testing.T) {
			code, out, errOut := runMain(t, c.args...)
			errOut, rec := splitExitRecord(t, errOut)
			if rec.Kind != kindUsage || rec.Exit != exitUsage || rec.Command != c.args[0] {
				t.Errorf("final record %+v, want kind usage, exit 2, command %s", rec, c.args[0])
			}
			if code != exitUsage {
				t.Errorf("exit %d, want 2", code)
			}
			if out != "" {
				t.Errorf("stdout %q, want nothing", out)
			}
			lines := strings.Split(errOut, "\n")
			if len(lines) < 4 || lines[0] != c.firstLine || lines[1] != "" || lines[2] != "Usage:" || lines[3] != c.usage {
				t.Errorf("stderr does not start with the error, a blank line and the command's usage:\n%s", errOut)
			}
			if n := strings.Count(errOut, "Usage:"); n != 1 {
				t.Errorf("stderr has %d usages, want 1:\n%s", n, errOut)
			}
			if n := strings.Count(errOut, strings.TrimPrefix(c.firstLine, "hindcast "+c.args[0]+": ")); n != 1 {
				t.Errorf("stderr says the error %d times, want once:\n%s", n, errOut)
			}
		})
	}
	// The whole message, for a command whose flags do not depend on the machine.
	_, _, errOut := runMain(t, "show", "V", "--josn")
	errOut, _ = splitExitRecord(t, errOut)
	if want := "hindcast show: flag provided but not defined: -josn\n\n" + showUsage; errOut != want {
		t.Errorf("stderr:\n%s\nwant:\n%s", errOut, want)
	}
}

func TestHelpGoesToStdout(t *testing.T) {
	want := "hindcast show: summarise a version: sources, funnel with every drop reason, episodes and pairs, episode lengths, files\n\n" + showUsage
	for _, args := range [][]string{{"show", "--help"}, {"show", "-h"}, {"show", "V", "--help"}, {"help", "show"}} {
		code, out, errOut := runMain(t, args...)
		if code != exitOK || out != want || errOut != "" {
			t.Errorf("%q: exit %d, stdout:\n%s\nstderr:\n%s\nwant exit 0, stdout:\n%s", args, code, out, errOut, want)
		}
	}
	// run's flags include --parallel, whose default is the machine's CPUs.
	code, out, errOut := runMain(t, "help", "run")
	wantRun := fmt.Sprintf(`hindcast run: run every stage and commit a dataset version

Usage:
  hindcast run --config FILE [--version V] [--parallel N]

Flags:
  --baseline string
    	version the drift gate compares with (default: gates.baseline, else the latest version)
  --config string
    	config file (YAML, see configs/)
  --cpuprofile string
    	write a CPU profile (runtime/pprof) to this file
  --parallel int
    	work items processed at once (never changes the output) (default %d)
  --version string
    	version to commit (default: UTC time YYYYMMDDTHHMMSSZ)
  --waive gate
    	publish even when this quality gate fails (repeatable; recorded as waived)
`, runtime.NumCPU())
	if code != exitOK || out != wantRun || errOut != "" {
		t.Errorf("help run: exit %d, stdout:\n%s\nstderr:\n%s\nwant exit 0, stdout:\n%s", code, out, errOut, wantRun)
	}
	code, out, errOut = runMain(t, "help", "frobnicate")
	if first, _, _ := strings.Cut(errOut, "\n"); code != exitUsage || out != "" || first != `hindcast: help: unknown command "frobnicate"` {
		t.Errorf("help frobnicate: exit %d, stdout %q, stderr:\n%s", code, out, errOut)
	}
}

// TestTopUsageListsEveryCommandOnce keeps commandOrder and commands() in step.
func TestTopUsageListsEveryCommandOnce(t *testing.T) {
	cmds := commands()
	if len(commandOrder) != len(cmds) {
		t.Errorf("commandOrder has %d commands, commands() %d", len(commandOrder), len(cmds))
	}
	top := topUsage()
	for name, spec := range cmds {
		if n := strings.Count(top, "\n  hindcast "+spec.synopsis+"\n"); n != 1 {
			t.Errorf("top usage shows %q %d times, want once:\n%s", spec.synopsis, n, top)
		}
		if !strings.HasPrefix(spec.synopsis, name+" ") && spec.synopsis != name {
			t.Errorf("synopsis %q of %s does not start with its name", spec.synopsis, name)
		}
	}
}

// firstLine runs a command line that must fail with exit code want and
// returns the first line of its stderr.
func firstLine(t *testing.T, want int, args ...string) string {
	t.Helper()
	code, out, errOut := runMain(t, args...)
	if code != want {
		t.Errorf("%q: exit %d, want %d\n%s", args, code, want, errOut)
	}
	if out != "" {
		t.Errorf("%q: stdout %q, want nothing", args, out)
	}
	line, _, _ := strings.Cut(errOut, "\n")
	return line
}

func TestUsageMessagesSayWhatIsWrong(t *testing.T) {
	cfg, dir := fixtureJob(t)
	t.Setenv("JOB_COMPLETION_INDEX", "")
	cases := []struct {
		args []string
		want string
	}{
		{[]string{"run", "--config", cfg, "--version", "."}, `hindcast run: version ".": "." and ".." are not allowed (they name folders)`},
		{[]string{"commit", "--config", cfg, "--version", ".."}, `hindcast commit: version "..": "." and ".." are not allowed (they name folders)`},
		{[]string{"run", "--config", cfg, "--version", "a/b"}, `hindcast run: version "a/b": want 1–64 of A-Za-z0-9._-`},
		{[]string{"stage", "ingest", "--config", cfg, "--workers", "3"}, `hindcast stage: --workers 3 needs JOB_COMPLETION_INDEX in 0…2, got ""`},
		{[]string{"stage", "--config", cfg, "ingest"},
			`hindcast stage: the stage name must come first: hindcast stage NAME --config FILE ... (got "ingest" after the flags)`},
		{[]string{"run"}, "hindcast run: --config is required"},
		{[]string{"show"}, "hindcast show: want 1 version location (a folder or an s3:// URI)"},
		{[]string{"diff", "a"}, "hindcast diff: want 2 version locations (a folder or an s3:// URI)"},
		{[]string{"trace", "a"}, "hindcast trace: give one of --source KEY, --episode ID, or --file PATH --row N"},
		{[]string{"diff", "a", "--json", "b", "--bogus"}, "hindcast diff: flag provided but not defined: -bogus"},
		{[]string{"diff", "--json", "a", "b", "--bogus"}, "hindcast diff: flag provided but not defined: -bogus"},
		{[]string{"bench", "--dir", filepath.Join(dir, "bench"), "--frames", "10", "--runs", "0"}, "hindcast bench: --runs must be at least 1, got 0"},
		{[]string{"bench", "--dir", filepath.Join(dir, "bench"), "--frames", "10", "--runs", "-2"}, "hindcast bench: --runs must be at least 1, got -2"},
		{[]string{"bench", "--dir", filepath.Join(dir, "bench"), "--frames", "0"}, "hindcast bench: --frames must be at least 1, got 0"},
	}
	for _, c := range cases {
		if got := firstLine(t, exitUsage, c.args...); got != c.want {
			t.Errorf("%q says\n  %s\nwant\n  %s", c.args, got, c.want)
		}
	}
	notExist(t, filepath.Join(dir, "job", "work"), "a usage error must stop before any work")
	notExist(t, filepath.Join(dir, "bench"), "bench must check its flags before writing a fleet")
}

// TestFlagErrorBetweenVersionsIsNotIgnored: the versions of diff may sit
// between flags, and a bad flag after them must still fail the parse.
func TestFlagErrorBetweenVersionsIsNotIgnored(t *testing.T) {
	if c, err := ParseCommand([]string{"diff", "a", "--json", "b", "--bogus"}, io.Discard); err == nil {
		t.Errorf("ParseCommand accepted a bad flag after the versions: %+v", c)
	}
	c, err := ParseCommand([]string{"diff", "a", "--json", "b", "--help"}, io.Discard)
	if err != nil || !c.Help {
		t.Errorf("--help after the versions: %+v, %v; want help", c, err)
	}
	c, err = ParseCommand([]string{"diff", "--json", "a", "b"}, io.Discard)
	if err != nil || !c.JSON || strings.Join(c.Versions, " ") != "a b" {
		t.Errorf("diff --json a b: %+v, %v; want JSON and versions a b", c, err)
	}
}

func TestSummaryReadsWell(t *testing.T) {
	m := &pipeline.Manifest{Dataset: "d", Version: "v1", Digest: "x"}
	m.Funnel.Objects = 1
	var b bytes.Buffer
	printSummary(&b, m, "file:///out/d/v1/")
	for _, want := range []string{"\nsources   1 object (0 duplicates)\n", "\nfiles     0\n"} {
		if !strings.Contains(b.String(), want) {
			t.Errorf("summary lacks %q:\n%s", want, b.String())
		}
	}
	m.Funnel.Objects = 2
	m.Files = []pipeline.File{{Table: "frames", Bytes: 2e6}, {Table: "pairs", Bytes: 1e6}}
	b.Reset()
	printSummary(&b, m, "file:///out/d/v1/")
	for _, want := range []string{"\nsources   2 objects (0 duplicates)\n", "\nfiles     2 (1 frames, 1 pairs), 3.0 MB\n"} {
		if !strings.Contains(b.String(), want) {
			t.Errorf("summary lacks %q:\n%s", want, b.String())
		}
	}
	for n, want := range map[int]string{0: "0 partitions", 1: "1 partition", 2: "2 partitions"} {
		if got := countOf(n, "partition", "partitions"); got != want {
			t.Errorf("countOf(%d) = %q, want %q", n, got, want)
		}
	}
}

// writeManifest writes a manifest that OpenVersion reads (the current
// format, nothing else) into dir.
func writeManifest(t *testing.T, dir string) {
	t.Helper()
	writeFile(t, filepath.Join(dir, pipeline.ManifestName), []byte(fmt.Sprintf(`{"format": %d, "dataset": "d"}`, pipeline.ManifestFormat)))
}

func TestOpenVersionSaysWhatTheLocationIs(t *testing.T) {
	ctx := context.Background()
	root := t.TempDir()
	open := func(loc string) (*pipeline.Version, error) {
		return pipeline.OpenVersion(ctx, loc, pipeline.StorageConfig{})
	}

	v1 := filepath.Join(root, "d", "v1")
	writeManifest(t, v1)
	for _, loc := range []string{filepath.Join(v1, "manifest.json"), "file://" + filepath.ToSlash(v1) + "/manifest.json"} {
		v, err := open(loc)
		if err != nil {
			t.Errorf("%s: %v", loc, err)
		} else if want := "file://" + filepath.ToSlash(v1) + "/"; v.URI != want {
			t.Errorf("%s opened %s, want %s", loc, v.URI, want)
		}
	}
	// A version folder that is itself called manifest.json is opened as it is.
	odd := filepath.Join(root, "e", "manifest.json")
	writeManifest(t, odd)
	if v, err := open(odd); err != nil || v.URI != "file://"+filepath.ToSlash(odd)+"/" {
		t.Errorf("version folder named manifest.json: %v, %v", v, err)
	}

	writeManifest(t, filepath.Join(root, "d", "v2"))
	if err := os.MkdirAll(filepath.Join(root, "d", "v3-unfinished"), 0o755); err != nil {
		t.Fatal(err)
	}
	many := filepath.Join(root, "many")
	for i := range 12 {
		writeManifest(t, filepath.Join(many, fmt.Sprintf("v%02d", i+1)))
	}
	file := filepath.Join(root, "d", "v1", "manifest.json")
	empty := t.TempDir()
	uri := func(p string) string { return "file://" + filepath.ToSlash(p) }
	cases := []struct{ loc, want string }{
		{filepath.Join(root, "nope"), "open " + uri(filepath.Join(root, "nope")) + ": no such folder"},
		{filepath.Join(root, "d"), "open " + uri(filepath.Join(root, "d")) + "/: a dataset folder, not a version; its versions: v1, v2"},
		{many, "open " + uri(many) + "/: a dataset folder, not a version; its 12 versions, the last 10: v03, v04, v05, v06, v07, v08, v09, v10, v11, v12"},
		{empty, "open " + uri(empty) + "/: not a dataset version (no manifest.json)"},
		{filepath.Join(root, "d", "v1", "manifest.json", "x"), "open " + uri(filepath.Join(file, "x")) + ": no such folder"},
	}
	for _, c := range cases {
		_, err := open(c.loc)
		if err == nil || err.Error() != c.want {
			t.Errorf("%s: %v\n  want %s", c.loc, err, c.want)
		}
		if !errors.Is(err, pipeline.ErrNotVersion) {
			t.Errorf("%s: %v does not wrap ErrNotVersion", c.loc, err)
		}
	}
	// A plain file that is not a manifest.
	notes := filepath.Join(root, "notes.txt")
	writeFile(t, notes, []byte("x"))
	if _, err := open(notes); err == nil || err.Error() != "open "+uri(notes)+": a file, not a version folder" || !errors.Is(err, pipeline.ErrNotVersion) {
		t.Errorf("%s: %v, want it called a file", notes, err)
	}

	// Through the command line: exit 1, the message once.
	code, out, errOut := runMain(t, "show", filepath.Join(root, "d"))
	errOut, rec := splitExitRecord(t, errOut)
	if rec.Kind != kindRuntime || rec.Exit != exitRuntime || rec.Command != "show" {
		t.Errorf("show of a dataset folder: final record %+v, want kind runtime, exit 1, command show", rec)
	}
	if want := "hindcast show: open " + uri(filepath.Join(root, "d")) + "/: a dataset folder, not a version; its versions: v1, v2\n"; code != exitRuntime || out != "" || errOut != want {
		t.Errorf("show of a dataset folder: exit %d, stdout %q, stderr %q; want exit 1, stderr %q", code, out, errOut, want)
	}
}

// TestProgressLine: ingest's live line counts objects and frames per second
// (the frames it has read over the time since the stage began); the later
// stages, which count no frames as they go, show partitions only, not a
// rate of 0.
func TestProgressLine(t *testing.T) {
	p := &progress{stage: "ingest", items: 12, done: 3, frames: 50_000, start: time.Now().Add(-10 * time.Second)}
	if got := p.describe(); !strings.HasPrefix(got, "ingest   3/12 objects, ") || !strings.Contains(got, " frames/s, ") || !strings.HasSuffix(got, " MB/s read") {
		t.Errorf("ingest line %q", got)
	}
	p = &progress{stage: "goals", items: 8, done: 5, start: time.Now().Add(-time.Second)}
	if got, want := p.describe(), "goals    5/8 partitions"; got != want {
		t.Errorf("goals line %q, want %q", got, want)
	}
}
