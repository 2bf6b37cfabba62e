package main

// The command line on good and bad input (SPEC §6): exit 0 on success, 1 on
// a runtime failure, 2 on a usage or config error; messages that name what
// is wrong; nothing committed when a run fails.

import (
	"errors"
	"flag"
	"io"
	"io/fs"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
)

// fixtureJob writes the fixture fleet and its config under a fresh folder
// and returns the config path and the folder.
func fixtureJob(t *testing.T) (string, string) {
	t.Helper()
	dir := t.TempDir()
	fx := writeFixture(t, dir)
	cfg := filepath.Join(dir, "job", "hindcast.yaml")
	writeFile(t, cfg, []byte(fixConfig(fx.logs, "float32")))
	return cfg, dir
}

// manifests lists every manifest.json under dir (none when dir is missing).
func manifests(t *testing.T, dir string) []string {
	t.Helper()
	var out []string
	err := filepath.WalkDir(dir, func(p string, d fs.DirEntry, err error) error {
		if err != nil {
			if errors.Is(err, fs.ErrNotExist) && p == dir {
				return nil
			}
			return err
		}
		if !d.IsDir() && d.Name() == "manifest.json" {
			out = append(out, p)
		}
		return nil
	})
	if err != nil {
		t.Fatalf("walking %s: %v", dir, err)
	}
	return out
}

func notExist(t *testing.T, path, why string) {
	t.Helper()
	if _, err := os.Stat(path); !errors.Is(err, fs.ErrNotExist) {
		t.Errorf("%s exists (%v); %s", path, err, why)
	}
}

func TestUsageErrorsExit2(t *testing.T) {
	cfg, _ := fixtureJob(t)
	cases := []struct {
		name string
		args []string
		says []string // in stderr
	}{
		{"no arguments", nil, []string{"no command", "Usage:"}},
		{"unknown command", []string{"frobnicate"}, []string{`"frobnicate"`, "Usage:"}},
		{"run without --config", []string{"run"}, []string{"--config"}},
		{"run --parallel 0", []string{"run", "--config", cfg, "--parallel", "0"}, []string{"--parallel"}},
		{"run --parallel -3", []string{"run", "--config", cfg, "--parallel", "-3"}, []string{"--parallel"}},
		{"demo --parallel 0", []string{"demo", "--dir", t.TempDir(), "--parallel", "0"}, []string{"--parallel"}},
		{"unknown flag", []string{"run", "--config", cfg, "--colour"}, []string{"colour"}},
		{"stray argument", []string{"run", "--config", cfg, "extra"}, []string{`"extra"`}},
		{"--parallel not a number", []string{"run", "--config", cfg, "--parallel", "many"}, []string{"many"}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			code, _, errOut := runMain(t, c.args...)
			if code != exitUsage {
				t.Errorf("exit %d, want 2\n%s", code, errOut)
			}
			for _, s := range c.says {
				if !strings.Contains(errOut, s) {
					t.Errorf("stderr does not say %q:\n%s", s, errOut)
				}
			}
		})
	}
	// None of those may have started work.
	notExist(t, filepath.Join(filepath.Dir(cfg), "work"), "a usage error must stop before any work")
}

// TestHelpExits0: asked-for help is printed to stdout, nothing to stderr.
func TestHelpExits0(t *testing.T) {
	for _, args := range [][]string{{"--help"}, {"-h"}, {"help"}} {
		code, out, errOut := runMain(t, args...)
		if code != exitOK || errOut != "" {
			t.Errorf("%v: exit %d, stderr %q; want 0 and nothing", args, code, errOut)
		}
		text := out
		if !strings.Contains(text, "Usage:") {
			t.Errorf("%v: no usage text:\n%s", args, text)
		}
		for name := range commands() {
			if !strings.Contains(text, "hindcast "+name) {
				t.Errorf("%v: usage does not show command %s:\n%s", args, name, text)
			}
		}
	}
	for name, spec := range commands() {
		// Every flag the command defines must be in its help.
		fs := flag.NewFlagSet(name, flag.ContinueOnError)
		fs.SetOutput(io.Discard)
		spec.flags(fs, &Command{})
		for _, args := range [][]string{{name, "--help"}, {name, "-h"}, {"help", name}} {
			code, out, errOut := runMain(t, args...)
			if code != exitOK || errOut != "" {
				t.Errorf("%q: exit %d, stderr %q; want 0 and nothing", args, code, errOut)
			}
			text := out
			if !strings.HasPrefix(text, "hindcast "+name+": "+spec.summary+"\n\nUsage:\n  hindcast "+spec.synopsis+"\n") {
				t.Errorf("%q: help does not start with the command's summary and usage:\n%s", args, text)
			}
			fs.VisitAll(func(f *flag.Flag) {
				// Two dashes as README writes them; a one-letter flag keeps one (-o).
				dashed := "--" + f.Name
				if len(f.Name) == 1 {
					dashed = "-" + f.Name
				}
				if !strings.Contains(text, "\n  "+dashed+" ") && !strings.Contains(text, "\n  "+dashed+"\n") {
					t.Errorf("%q: usage does not list %s:\n%s", args, dashed, text)
				}
			})
		}
	}
}

// lineOf is the 1-based line of the first line of text containing s.
func lineOf(t *testing.T, text, s string) int {
	t.Helper()
	for i, l := range strings.Split(text, "\n") {
		if strings.Contains(l, s) {
			return i + 1
		}
	}
	t.Fatalf("no line with %q", s)
	return 0
}

func TestConfigErrorsNameKeyAndLine(t *testing.T) {
	base := fixConfig("logs", "float32")
	cases := []struct {
		name      string
		old, new  string
		key, line string // the key named, and the text of its line
	}{
		{"unknown key", "  gamma: 0.5\n", "  gamma: 0.5\n  gama: 0.4\n", "goals.gama", "gama:"},
		{"unknown embodiment key", "    cameras: [wrist]\n", "    cameras: [wrist]\n    camera: [wrist]\n", "embodiments.arm.camera", "camera: [wrist]"},
		{"gamma not below 1", "  gamma: 0.5\n", "  gamma: 1.5\n", "goals.gamma", "gamma: 1.5"},
		{"partitions not a number", "partitions: 2\n", "partitions: two\n", "partitions", "partitions: two"},
		{"min_steps below 2", "  min_steps: 3\n", "  min_steps: 1\n", "episodes.min_steps", "min_steps: 1"},
		{"unknown compression", "  compression: zstd\n", "  compression: lzma\n", "parquet.compression", "compression: lzma"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			if !strings.Contains(base, c.old) {
				t.Fatalf("fixture config has no %q", c.old)
			}
			text := strings.Replace(base, c.old, c.new, 1)
			dir := t.TempDir()
			cfg := filepath.Join(dir, "hindcast.yaml")
			writeFile(t, cfg, []byte(text))
			code, _, errOut := runMain(t, "run", "--config", cfg, "--version", "v1")
			if code != exitUsage {
				t.Errorf("exit %d, want 2\n%s", code, errOut)
			}
			// SPEC §2: the error names the key and its line.
			if !strings.Contains(errOut, c.key) {
				t.Errorf("stderr does not name %s:\n%s", c.key, errOut)
			}
			if where := "hindcast.yaml:" + strconv.Itoa(lineOf(t, text, c.line)); !strings.Contains(errOut, where) {
				t.Errorf("stderr does not say %s:\n%s", where, errOut)
			}
			notExist(t, filepath.Join(dir, "work"), "a config error must stop before any work")
			notExist(t, filepath.Join(dir, "out"), "a config error must stop before any work")
		})
	}
	t.Run("config file missing", func(t *testing.T) {
		missing := filepath.Join(t.TempDir(), "absent.yaml")
		code, _, errOut := runMain(t, "run", "--config", missing)
		if code != exitUsage || !strings.Contains(errOut, missing) {
			t.Errorf("exit %d, want 2 naming %s:\n%s", code, missing, errOut)
		}
	})
}

func TestMissingSourceFolderExits1(t *testing.T) {
	dir := t.TempDir()
	logs := filepath.Join(dir, "no-such-logs")
	cfg := filepath.Join(dir, "hindcast.yaml")
	writeFile(t, cfg, []byte(fixConfig(logs, "float32")))
	code, _, errOut := runMain(t, "run", "--config", cfg, "--version", "v1")
	if code != exitRuntime {
		t.Errorf("exit %d, want 1\n%s", code, errOut)
	}
	if !strings.Contains(errOut, logs) {
		t.Errorf("stderr does not name the folder %s:\n%s", logs, errOut)
	}
	// The user ran `run`: the message names the stage and what it did, and
	// no inner step ("plan") the user never asked for.
	human, rec := splitExitRecord(t, errOut)
	if rec.Kind != kindRuntime || rec.Exit != exitRuntime {
		t.Errorf("final record %+v, want kind runtime, exit 1", rec)
	}
	last := strings.TrimSpace(human[strings.LastIndex(strings.TrimSpace(human), "\n")+1:])
	if want := "hindcast run: ingest: list file://" + filepath.ToSlash(logs) + "/: "; !strings.HasPrefix(last, want) || strings.Contains(last, "plan:") {
		t.Errorf("last line %q, want it to start %q with no \"plan:\"", last, want)
	}
	if m := manifests(t, dir); len(m) != 0 {
		t.Errorf("a failed run wrote %v", m)
	}
	notExist(t, filepath.Join(dir, "out", fixDataset, "v1"), "nothing is published unless every stage succeeded")
}

// TestUnreadableObjectExits1 makes one listed object unreadable. chmod 000
// does that for an ordinary user; as root (which reads through modes) the
// object becomes a symlink to nothing, which lists but cannot be opened.
func TestUnreadableObjectExits1(t *testing.T) {
	cfg, dir := fixtureJob(t)
	key := "cart/locked.jsonl"
	path := filepath.Join(dir, "logs", filepath.FromSlash(key))
	writeFile(t, path, []byte(`{"unit":"cart-09","embodiment":"cart","t":1,"obs":[0,0]}`+"\n"))
	if err := os.Chmod(path, 0); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { os.Chmod(path, 0o644) })
	how := "chmod 000"
	if _, err := os.ReadFile(path); err == nil {
		if err := os.Remove(path); err != nil {
			t.Fatal(err)
		}
		if err := os.Symlink(filepath.Join(dir, "nowhere", "gone.jsonl"), path); err != nil {
			t.Fatal(err)
		}
		how = "dangling symlink"
		if _, err := os.ReadFile(path); err == nil {
			t.Fatalf("cannot make %s unreadable", path)
		}
	}
	code, _, errOut := runMain(t, "run", "--config", cfg, "--version", "v1")
	if code != exitRuntime {
		t.Errorf("%s: exit %d, want 1\n%s", how, code, errOut)
	}
	if !strings.Contains(errOut, key) {
		t.Errorf("%s: stderr does not name the object %s:\n%s", how, key, errOut)
	}
	if m := manifests(t, dir); len(m) != 0 {
		t.Errorf("%s: a failed run wrote %v", how, m)
	}
	notExist(t, filepath.Join(dir, "job", "out", fixDataset, "v1"), "nothing is published unless every stage succeeded")
}

func TestExistingVersionExits1(t *testing.T) {
	cfg, dir := fixtureJob(t)
	mustRun(t, "run", "--config", cfg, "--version", "v1")
	vdir := filepath.Join(dir, "job", "out", fixDataset, "v1")
	before := versionFiles(t, vdir)
	if _, ok := before["manifest.json"]; !ok || len(before) < 2 {
		t.Fatalf("first run committed %d files", len(before))
	}
	// The logs change, so a second commit would write other bytes.
	writeFile(t, filepath.Join(dir, "logs", "cart", "cart-07.jsonl.gz"), []byte{})
	code, _, errOut := runMain(t, "run", "--config", cfg, "--version", "v1")
	if code != exitRuntime {
		t.Errorf("exit %d, want 1\n%s", code, errOut)
	}
	if !strings.Contains(errOut, "v1") || !strings.Contains(errOut, "exists") {
		t.Errorf("stderr does not say that v1 exists:\n%s", errOut)
	}
	after := versionFiles(t, vdir)
	if len(after) != len(before) {
		t.Errorf("version v1 had %d files, now %d", len(before), len(after))
	}
	for p, b := range before {
		if string(after[p]) != string(b) {
			t.Errorf("%s of version v1 changed", p)
		}
	}
}

func TestBadVersionExits2(t *testing.T) {
	cfg, dir := fixtureJob(t)
	for _, v := range []string{"a/b", ".", "..", strings.Repeat("v", 65), "with space", "naïve"} {
		code, _, errOut := runMain(t, "run", "--config", cfg, "--version", v)
		if code != exitUsage {
			t.Errorf("--version %q: exit %d, want 2\n%s", v, code, errOut)
		}
		if !strings.Contains(errOut, strconv.Quote(v)) {
			t.Errorf("--version %q: stderr does not name it:\n%s", v, errOut)
		}
	}
	notExist(t, filepath.Join(dir, "job", "work"), "a bad version must stop before any work")
	if m := manifests(t, dir); len(m) != 0 {
		t.Errorf("a bad version committed %v", m)
	}
	// 64 characters is the longest version allowed (SPEC §6).
	mustRun(t, "run", "--config", cfg, "--version", strings.Repeat("v", 64))
}
