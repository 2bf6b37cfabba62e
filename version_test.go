package main

import (
	"bytes"
	"regexp"
	"runtime"
	"runtime/debug"
	"strings"
	"testing"

	"hindcast/pipeline"
)

// TestHelpFlagsTwoDashes: every command's --help writes its flags as README
// does (--config), never with one dash, except one-letter flags (-o).
func TestHelpFlagsTwoDashes(t *testing.T) {
	oneDash := regexp.MustCompile(`(?m)^  -[a-z][a-z0-9-]+`)
	twoDash := regexp.MustCompile(`(?m)^  --[a-z][a-z0-9-]+`)
	counts := map[string]int{}
	for _, name := range commandOrder {
		var out, errOut bytes.Buffer
		if code := Main(t.Context(), []string{name, "--help"}, &out, &errOut); code != exitOK {
			t.Fatalf("%s --help: exit %d, stderr %q", name, code, errOut.String())
		}
		if m := oneDash.FindString(out.String()); m != "" {
			t.Errorf("%s --help lists a long flag with one dash: %q", name, m)
		}
		counts[name] = len(twoDash.FindAllString(out.String(), -1))
	}
	// Flag counts as declared in commands(): run has baseline, config,
	// cpuprofile, parallel, version, waive; report has only -o; version has
	// none; bench has dir, frames, runs, peer, zst, s3-endpoint, s3-bucket,
	// recordings, recording-mb, parallel.
	for name, want := range map[string]int{"run": 6, "report": 0, "version": 0, "plan": 2, "bench": 10} {
		if counts[name] != want {
			t.Errorf("%s --help lists %d --flags, want %d", name, counts[name], want)
		}
	}
	var out bytes.Buffer
	Main(t.Context(), []string{"report", "--help"}, &out, &out)
	if !strings.Contains(out.String(), "\n  -o string\n") {
		t.Errorf("report --help does not list -o:\n%s", out.String())
	}
}

// TestToolInfoFallbacks: the VCS stamp wins, then the linker's commit, then
// "unknown"; the linker's version replaces ToolVersion only when set.
func TestToolInfoFallbacks(t *testing.T) {
	stamped := &debug.BuildInfo{Settings: []debug.BuildSetting{{Key: "vcs.revision", Value: "abc123"}, {Key: "vcs.modified", Value: "false"}}}
	dirty := &debug.BuildInfo{Settings: []debug.BuildSetting{{Key: "vcs.revision", Value: "abc123"}, {Key: "vcs.modified", Value: "true"}}}
	unstamped := &debug.BuildInfo{}
	for _, tc := range []struct {
		name            string
		bi              *debug.BuildInfo
		version, commit string
		want            pipeline.ToolInfo
	}{
		{"no build info, no stamps", nil, "", "", pipeline.ToolInfo{Version: pipeline.ToolVersion, Commit: "unknown"}},
		{"-buildvcs=false, no ldflags", unstamped, "", "", pipeline.ToolInfo{Version: pipeline.ToolVersion, Commit: "unknown"}},
		{"-buildvcs=false with ldflags", unstamped, "9.9.9", "def456", pipeline.ToolInfo{Version: "9.9.9", Commit: "def456"}},
		{"VCS stamp wins over ldflags", stamped, "", "def456", pipeline.ToolInfo{Version: pipeline.ToolVersion, Commit: "abc123"}},
		{"edited tree", dirty, "", "", pipeline.ToolInfo{Version: pipeline.ToolVersion, Commit: "abc123+modified"}},
	} {
		if got := toolInfoFrom(tc.bi, tc.version, tc.commit); got != tc.want {
			t.Errorf("%s: got %+v, want %+v", tc.name, got, tc.want)
		}
	}
}

// TestVersionCommand: `hindcast version` prints release, commit and Go
// version on three lines.
func TestVersionCommand(t *testing.T) {
	var out, errOut bytes.Buffer
	if code := Main(t.Context(), []string{"version"}, &out, &errOut); code != exitOK {
		t.Fatalf("version: exit %d, stderr %q", code, errOut.String())
	}
	lines := strings.Split(strings.TrimSuffix(out.String(), "\n"), "\n")
	if len(lines) != 3 {
		t.Fatalf("version printed %d lines, want 3:\n%s", len(lines), out.String())
	}
	ti := toolInfo()
	if lines[0] != "hindcast "+ti.Version || lines[1] != "commit "+ti.Commit {
		t.Errorf("version: got %q, want release %s and commit %s", lines[:2], ti.Version, ti.Commit)
	}
	if !strings.HasPrefix(lines[2], "go go1.") || !strings.HasSuffix(lines[2], " "+runtime.GOOS+"/"+runtime.GOARCH) {
		t.Errorf("version: Go line %q", lines[2])
	}
}
