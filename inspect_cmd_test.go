package main

import (
	"bytes"
	"context"
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"hindcast/fleet"
)

// inspectDemo runs the demo once (with the quarantine on) and returns the
// version folder.
func inspectDemo(t *testing.T) string {
	t.Helper()
	dir := t.TempDir()
	if err := fleet.Demo(dir); err != nil {
		t.Fatal(err)
	}
	cfg := filepath.Join(dir, "hindcast.yaml")
	b, err := os.ReadFile(cfg)
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(cfg, append(b, []byte("\nquarantine: true\n")...), 0o644); err != nil {
		t.Fatal(err)
	}
	var out, errb bytes.Buffer
	if code := Main(context.Background(), []string{"run", "--config", cfg, "--version", "v1"}, &out, &errb); code != 0 {
		t.Fatalf("run: exit %d: %s", code, errb.String())
	}
	return filepath.Join(dir, "datasets", "larkspur-aisles", "v1")
}

func runInspect(t *testing.T, args ...string) (int, string, string) {
	t.Helper()
	var out, errb bytes.Buffer
	code := Main(context.Background(), args, &out, &errb)
	return code, out.String(), errb.String()
}

// TestInspectCommands drives show, trace, verify, diff and report through
// the CLI: exit codes, --json answers that are RFC 8259 JSON, and the
// errors on something that is not a version.
func TestInspectCommands(t *testing.T) {
	v := inspectDemo(t)
	var m struct {
		Funnel struct {
			Lines   int64            `json:"lines"`
			Dropped map[string]int64 `json:"dropped"`
		} `json:"funnel"`
		Sources []struct {
			Key     string           `json:"key"`
			Kept    int64            `json:"kept"`
			Dropped map[string]int64 `json:"dropped"`
		} `json:"sources"`
		Quarantine struct {
			Rows int64 `json:"rows"`
		} `json:"quarantine"`
	}
	raw, err := os.ReadFile(filepath.Join(v, "manifest.json"))
	if err != nil {
		t.Fatal(err)
	}
	if err := json.Unmarshal(raw, &m); err != nil {
		t.Fatal(err)
	}

	code, out, _ := runInspect(t, "show", v, "--json")
	if code != 0 {
		t.Fatalf("show --json: exit %d", code)
	}
	var show map[string]any
	if err := json.Unmarshal([]byte(out), &show); err != nil {
		t.Fatalf("show --json is not JSON (RFC 8259): %v", err)
	}
	// Examples of dropped lines: at most three per reason, from the
	// quarantine file.
	perReason := map[string]int{}
	for _, l := range show["quarantine"].([]any) {
		perReason[l.(map[string]any)["reason"].(string)]++
	}
	for r, n := range m.Funnel.Dropped {
		if want := min(int(n), 3); perReason[r] != want {
			t.Errorf("show: %d quarantine examples of %s, want %d", perReason[r], r, want)
		}
	}
	if code, out, _ := runInspect(t, "show", v); code != 0 || !strings.Contains(out, "quarantine: 90 dropped lines") {
		t.Errorf("show: exit %d, output lacks the quarantine line:\n%s", code, out)
	}

	// A source with kept frames traces to files given by path.
	var src string
	for _, s := range m.Sources {
		if s.Kept > 0 {
			src = s.Key
			break
		}
	}
	code, out, _ = runInspect(t, "trace", v, "--source", src, "--json")
	if code != 0 {
		t.Fatalf("trace --json: exit %d", code)
	}
	var tr struct {
		Files []struct {
			Path string `json:"path"`
		} `json:"files"`
	}
	if err := json.Unmarshal([]byte(out), &tr); err != nil || len(tr.Files) == 0 {
		t.Fatalf("trace --json: %v, %d files", err, len(tr.Files))
	}
	for _, f := range tr.Files {
		if _, err := os.Stat(filepath.Join(v, f.Path)); err != nil {
			t.Errorf("trace names %s, not in the version: %v", f.Path, err)
		}
	}
	// A source with dropped lines: trace lists them from the quarantine,
	// as many as the manifest counts for it.
	var lossy string
	var lossyDropped int64
	for _, s := range m.Sources {
		var n int64
		for _, c := range s.Dropped {
			n += c
		}
		if n > 0 {
			lossy, lossyDropped = s.Key, n
			break
		}
	}
	code, out, _ = runInspect(t, "trace", v, "--source", lossy, "--json")
	var lt struct {
		Dropped []struct {
			Src string `json:"src"`
		} `json:"dropped"`
	}
	if err := json.Unmarshal([]byte(out), &lt); code != 0 || err != nil || int64(len(lt.Dropped)) != lossyDropped {
		t.Errorf("trace --source %s: exit %d, %v, %d dropped lines, want %d", lossy, code, err, len(lt.Dropped), lossyDropped)
	}
	for _, d := range lt.Dropped {
		if d.Src != lossy {
			t.Errorf("trace --source %s lists a dropped line of %s", lossy, d.Src)
		}
	}
	if code, _, errOut := runInspect(t, "trace", v, "--episode", "x", "--source", src); code != 2 || !strings.Contains(errOut, "one of --source") {
		t.Errorf("trace with two queries: exit %d, %s", code, errOut)
	}

	if code, out, _ := runInspect(t, "verify", v); code != 0 || !strings.Contains(out, "OK") {
		t.Errorf("verify of a clean version: exit %d\n%s", code, out)
	}
	// One changed byte in a shard: verify exits 1 naming the file.
	shard := filepath.Join(v, tr.Files[0].Path)
	b, err := os.ReadFile(shard)
	if err != nil {
		t.Fatal(err)
	}
	b[len(b)/2] ^= 0xff
	if err := os.WriteFile(shard, b, 0o644); err != nil {
		t.Fatal(err)
	}
	if code, out, _ := runInspect(t, "verify", v); code != 1 || !strings.Contains(out, tr.Files[0].Path) {
		t.Errorf("verify of a changed file: exit %d, want 1 naming %s\n%s", code, tr.Files[0].Path, out)
	}

	if code, out, _ := runInspect(t, "diff", v, v, "--json"); code != 0 || !json.Valid([]byte(out)) {
		t.Errorf("diff --json: exit %d, valid JSON %v", code, json.Valid([]byte(out)))
	}

	html := filepath.Join(t.TempDir(), "r.html")
	if code, _, errOut := runInspect(t, "report", v, "-o", html); code != 0 {
		t.Fatalf("report: exit %d: %s", code, errOut)
	}
	if page, err := os.ReadFile(html); err != nil || !bytes.Contains(page, []byte(`data-plot="episode-lengths"`)) {
		t.Errorf("report: %v, page lacks the episode length plot", err)
	}

	// Not a version: every command says so and exits 1.
	for _, cmd := range [][]string{{"show", t.TempDir()}, {"verify", t.TempDir()}, {"report", t.TempDir(), "-o", html},
		{"trace", t.TempDir(), "--episode", "x"}, {"diff", v, t.TempDir()}} {
		if code, _, errOut := runInspect(t, cmd...); code != 1 || !strings.Contains(errOut, "not a dataset version") {
			t.Errorf("%v: exit %d, %q", cmd, code, errOut)
		}
	}
	// A manifest of an unknown format.
	bad := t.TempDir()
	if err := os.WriteFile(filepath.Join(bad, "manifest.json"), []byte(`{"format": 99}`), 0o644); err != nil {
		t.Fatal(err)
	}
	if code, _, errOut := runInspect(t, "show", bad); code != 1 || !strings.Contains(errOut, "manifest format 99") {
		t.Errorf("show of format 99: exit %d, %q", code, errOut)
	}
	if code, _, _ := runInspect(t, "show"); code != 2 {
		t.Errorf("show without a version: exit %d, want 2", code)
	}
}
