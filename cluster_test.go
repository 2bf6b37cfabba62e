package main

// The simulated cluster: the stage graph (ingest → episodes → goals → pack →
// commit) run as separate OS processes of one built hindcast binary, N
// workers per stage started at once with a barrier between stages, as a
// cluster's scheduler runs it (jobs/). The version the workers commit must be
// the one `hindcast run` writes, byte for byte, whatever N and wherever the
// work area and the output are (SPEC §6).
//
// This file also holds the helpers that cache_test.go and crash_test.go
// share: the one binary of the test process, running it, and reading and
// comparing versions.

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/binary"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"maps"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/aws/aws-sdk-go-v2/aws"
	"github.com/aws/aws-sdk-go-v2/service/s3"
	"gopkg.in/yaml.v3"

	"hindcast/fleet"
	"hindcast/internal/s3test"
)

// ---------------------------------------------------------------------------
// The binary

// clBinary is the hindcast binary every process-level test of this package
// runs. Stage keys hold a build id (pipeline.CodeID hashes the executable),
// so all processes of a test must run the very same file: it is built once.
var clBinary struct {
	once sync.Once
	path string
	err  error
}

// buildHindcast builds the hindcast binary once per test process and
// returns its path. It is built into a folder beside the test binary, which
// `go test` removes with its work folder when the run ends.
func buildHindcast(t testing.TB) string {
	t.Helper()
	clBinary.once.Do(func() {
		base := os.TempDir()
		if exe, err := os.Executable(); err == nil {
			base = filepath.Dir(exe)
		}
		dir, err := os.MkdirTemp(base, "hindcast-bin-")
		if err != nil {
			clBinary.err = fmt.Errorf("folder for the binary: %w", err)
			return
		}
		out := filepath.Join(dir, "hindcast")
		cmd := exec.Command("go", "build", "-o", out, ".")
		if b, err := cmd.CombinedOutput(); err != nil {
			clBinary.err = fmt.Errorf("go build: %w\n%s", err, b)
			return
		}
		clBinary.path = out
	})
	if clBinary.err != nil {
		t.Fatalf("build hindcast: %v", clBinary.err)
	}
	return clBinary.path
}

// clProcTimeout bounds any one child process: a hung child fails its test
// instead of the whole package's deadline.
const clProcTimeout = 3 * time.Minute

// clResult is what one child process did.
type clResult struct {
	args           []string
	code           int
	stdout, stderr string
}

func (r clResult) String() string {
	return fmt.Sprintf("hindcast %s: exit %d\nstdout:\n%s\nstderr:\n%s",
		strings.Join(r.args, " "), r.code, clTail(r.stdout, 3000), clTail(r.stderr, 3000))
}

func clTail(s string, n int) string {
	if len(s) > n {
		return "…" + s[len(s)-n:]
	}
	return s
}

// clCommand prepares a child process of the binary; env is appended to the
// test's own environment (the last value of a variable wins).
func clCommand(ctx context.Context, bin string, env []string, args ...string) (*exec.Cmd, *bytes.Buffer, *bytes.Buffer) {
	cmd := exec.CommandContext(ctx, bin, args...)
	cmd.Env = append(os.Environ(), env...)
	var stdout, stderr bytes.Buffer
	cmd.Stdout, cmd.Stderr = &stdout, &stderr
	return cmd, &stdout, &stderr
}

// clExitCode turns Wait's error into an exit code (-1 when the process did
// not exit by itself).
func clExitCode(t *testing.T, cmd *exec.Cmd, err error) int {
	t.Helper()
	if err == nil {
		return 0
	}
	var ee *exec.ExitError
	if errors.As(err, &ee) {
		return ee.ExitCode()
	}
	t.Fatalf("%s: %v", strings.Join(cmd.Args, " "), err)
	return -1
}

// clRun runs one command line of the binary to its end.
func clRun(t *testing.T, bin string, env []string, args ...string) clResult {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), clProcTimeout)
	defer cancel()
	cmd, stdout, stderr := clCommand(ctx, bin, env, args...)
	code := clExitCode(t, cmd, cmd.Run())
	return clResult{args: args, code: code, stdout: stdout.String(), stderr: stderr.String()}
}

// clMustRun runs a command line that must exit 0.
func clMustRun(t *testing.T, bin string, env []string, args ...string) clResult {
	t.Helper()
	r := clRun(t, bin, env, args...)
	if r.code != 0 {
		t.Fatalf("want exit 0:\n%s", r)
	}
	return r
}

// clRunAll starts every command line at once and waits for all of them: a
// stage's workers between two barriers.
func clRunAll(t *testing.T, bin string, env []string, cmds [][]string) []clResult {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), clProcTimeout)
	defer cancel()
	type proc struct {
		cmd            *exec.Cmd
		stdout, stderr *bytes.Buffer
	}
	procs := make([]proc, len(cmds))
	for i, args := range cmds {
		cmd, stdout, stderr := clCommand(ctx, bin, env, args...)
		if err := cmd.Start(); err != nil {
			t.Fatalf("start %s: %v", strings.Join(args, " "), err)
		}
		procs[i] = proc{cmd, stdout, stderr}
	}
	res := make([]clResult, len(cmds))
	for i, p := range procs {
		code := clExitCode(t, p.cmd, p.cmd.Wait())
		res[i] = clResult{args: cmds[i], code: code, stdout: p.stdout.String(), stderr: p.stderr.String()}
	}
	return res
}

// ---------------------------------------------------------------------------
// Fixtures

// clWrite writes a file, creating its folder.
func clWrite(t *testing.T, path string, data []byte) {
	t.Helper()
	if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(path, data, 0o644); err != nil {
		t.Fatal(err)
	}
}

// clReplace replaces old by new in s, which must hold old exactly once: a
// config edit that silently did nothing would make a test vacuous.
func clReplace(t *testing.T, s, old, new string) string {
	t.Helper()
	if n := strings.Count(s, old); n != 1 {
		t.Fatalf("config edit: %q occurs %d times, want once", old, n)
	}
	return strings.Replace(s, old, new, 1)
}

// clDemoFleet is the demo fleet every demo test of the process reads: it is
// written once (fleet.Demo is slow under the race detector) beside the
// binary, and only read after (the pipeline never writes its source). Its
// one object with absolute file:// image URIs names this folder, so every
// comparison of a test is over this one folder.
var clDemoFleet struct {
	once sync.Once
	dir  string
	err  error
}

// clDemo returns the shared demo fleet's logs folder and its config's text
// with source.uri pointing there; work and output stay plain paths
// (relative to wherever the config is written: SPEC §2).
func clDemo(t *testing.T) (logs, text string) {
	t.Helper()
	clDemoFleet.once.Do(func() {
		base := os.TempDir()
		if exe, err := os.Executable(); err == nil {
			base = filepath.Dir(exe)
		}
		dir, err := os.MkdirTemp(base, "hindcast-demo-")
		if err == nil {
			err = fleet.Demo(dir)
		}
		clDemoFleet.dir, clDemoFleet.err = dir, err
	})
	if clDemoFleet.err != nil {
		t.Fatalf("demo fleet: %v", clDemoFleet.err)
	}
	b, err := os.ReadFile(filepath.Join(clDemoFleet.dir, "hindcast.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	logs = filepath.Join(clDemoFleet.dir, "logs")
	return logs, clReplace(t, string(b), "\n  uri: logs\n", "\n  uri: "+logs+"\n")
}

// clDemoConfig writes a variant of the demo config into dir with its own
// work area and output (plain paths, relative to dir: SPEC §2) and returns
// its path.
func clDemoConfig(t *testing.T, dir, text, name, work, output string) string {
	t.Helper()
	text = clReplace(t, text, "\nwork: work\n", "\nwork: "+work+"\n")
	text = clReplace(t, text, "\noutput: datasets\n", "\noutput: "+output+"\n")
	p := filepath.Join(dir, name)
	clWrite(t, p, []byte(text))
	return p
}

// clSourceObjects lists the keys (slash-separated, relative to root) of the
// files under root that the default include patterns take: the JSON Lines
// objects, plain or compressed (SPEC §2, include default), sorted in byte
// order as SPEC §3.1 lists them.
func clSourceObjects(t *testing.T, root string) []string {
	t.Helper()
	var keys []string
	err := filepath.WalkDir(root, func(p string, d fs.DirEntry, err error) error {
		if err != nil || d.IsDir() {
			return err
		}
		name := d.Name()
		if strings.HasSuffix(name, ".jsonl") || strings.HasSuffix(name, ".jsonl.gz") || strings.HasSuffix(name, ".jsonl.zst") {
			rel, err := filepath.Rel(root, p)
			if err != nil {
				return err
			}
			keys = append(keys, filepath.ToSlash(rel))
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	slices.Sort(keys) // Go compares strings bytewise
	return keys
}

// clPartition is SPEC §3.4's partition of a unit:
// BE_uint64(sha256(unit)[0:8]) mod partitions.
func clPartition(unit string, partitions int) int {
	h := sha256.Sum256([]byte(unit))
	return int(binary.BigEndian.Uint64(h[:8]) % uint64(partitions))
}

// clPartName is a partition's item id as the work records name it: "p" and
// five digits, as the version's file names (SPEC §4 PPPPP).
func clPartName(p int) string { return fmt.Sprintf("p%05d", p) }

// ---------------------------------------------------------------------------
// Versions

// clManifest is the part of manifest.json these tests read (SPEC §5).
type clManifest struct {
	Dataset      string `json:"dataset"`
	Version      string `json:"version"`
	ConfigSHA256 string `json:"config_sha256"`
	Config       struct {
		Episodes struct {
			MinSteps int `json:"min_steps"`
		} `json:"episodes"`
		Goals struct {
			Future int `json:"future"`
		} `json:"goals"`
	} `json:"config"`
	Sources []struct {
		Key   string `json:"key"`
		Bytes int64  `json:"bytes"`
	} `json:"sources"`
	Funnel struct {
		Objects  int64 `json:"objects"`
		Lines    int64 `json:"lines"`
		Frames   int64 `json:"frames"`
		Episodes int64 `json:"episodes"`
		Pairs    int64 `json:"pairs"`
	} `json:"funnel"`
	Files []struct {
		Path   string `json:"path"`
		Bytes  int64  `json:"bytes"`
		SHA256 string `json:"sha256"`
	} `json:"files"`
	Stages []clStage `json:"stages"`
	Digest string    `json:"digest"`
}

type clStage struct {
	Name   string `json:"name"`
	Key    string `json:"key"`
	Cached bool   `json:"cached"`
	Items  int    `json:"items"`
	Reused int    `json:"reused"`
}

// clVersion is a committed version as read back: its files by path
// relative to the version folder (manifest.json included) and its manifest.
type clVersion struct {
	where    string
	files    map[string][]byte
	manifest clManifest
}

// clParseVersion checks that a version's files are exactly those its
// manifest lists plus the manifest itself (nothing else in the folder is
// part of the version, and nothing is missing), with the recorded sizes and
// SHA-256, and returns it.
func clParseVersion(t *testing.T, where string, files map[string][]byte) clVersion {
	t.Helper()
	raw, ok := files["manifest.json"]
	if !ok {
		t.Fatalf("%s: no manifest.json among %d files", where, len(files))
	}
	v := clVersion{where: where, files: files}
	if err := json.Unmarshal(raw, &v.manifest); err != nil {
		t.Fatalf("%s: manifest: %v", where, err)
	}
	want := map[string]bool{"manifest.json": true}
	for _, f := range v.manifest.Files {
		want[f.Path] = true
		b, ok := files[f.Path]
		if !ok {
			t.Errorf("%s: manifest lists %s, not in the folder", where, f.Path)
			continue
		}
		if sum := fmt.Sprintf("%x", sha256.Sum256(b)); sum != f.SHA256 || int64(len(b)) != f.Bytes {
			t.Errorf("%s: %s has %d bytes sha256 %s, manifest says %d bytes %s", where, f.Path, len(b), sum, f.Bytes, f.SHA256)
		}
	}
	for p := range files {
		if !want[p] {
			t.Errorf("%s: %s is in the version folder but not in its manifest", where, p)
		}
	}
	if len(v.manifest.Files) == 0 {
		t.Errorf("%s: manifest lists no files", where)
	}
	return v
}

// clLocalFiles reads every file under dir, by slash path relative to dir.
func clLocalFiles(t *testing.T, dir string) map[string][]byte {
	t.Helper()
	files := map[string][]byte{}
	err := filepath.WalkDir(dir, func(p string, d fs.DirEntry, err error) error {
		if err != nil || d.IsDir() {
			return err
		}
		b, err := os.ReadFile(p)
		if err != nil {
			return err
		}
		rel, _ := filepath.Rel(dir, p)
		files[filepath.ToSlash(rel)] = b
		return nil
	})
	if err != nil {
		t.Fatalf("read version folder: %v", err)
	}
	return files
}

// clLocalVersion reads the version output/<dataset>/<version>/ of a local
// output folder (SPEC §4).
func clLocalVersion(t *testing.T, output, dataset, version string) clVersion {
	t.Helper()
	dir := filepath.Join(output, dataset, version)
	return clParseVersion(t, dir, clLocalFiles(t, dir))
}

// clSameContent asserts that two versions hold byte-identical files (every
// Parquet file, same paths) and the same digest; their manifests differ only
// in what SPEC §5 lets differ (version, created, stage records).
func clSameContent(t *testing.T, want, got clVersion) {
	t.Helper()
	if got.manifest.Digest != want.manifest.Digest || got.manifest.Digest == "" {
		t.Errorf("digest of %s = %q, of %s = %q", got.where, got.manifest.Digest, want.where, want.manifest.Digest)
	}
	paths := func(v clVersion) []string {
		var ps []string
		for p := range v.files {
			if p != "manifest.json" {
				ps = append(ps, p)
			}
		}
		slices.Sort(ps)
		return ps
	}
	wp, gp := paths(want), paths(got)
	if !slices.Equal(wp, gp) {
		t.Errorf("files of %s:\n%v\nfiles of %s:\n%v", got.where, gp, want.where, wp)
	}
	for _, p := range wp {
		if g, ok := got.files[p]; ok && !bytes.Equal(g, want.files[p]) {
			t.Errorf("%s differs between %s (%d bytes) and %s (%d bytes)", p, got.where, len(g), want.where, len(want.files[p]))
		}
	}
}

// clS3Files reads every object under prefix of a bucket with the server's
// own client (not the store under test), by key relative to prefix.
func clS3Files(t *testing.T, srv *s3test.Server, bucket, prefix string) map[string][]byte {
	t.Helper()
	ctx := context.Background()
	c := srv.Client()
	files := map[string][]byte{}
	p := s3.NewListObjectsV2Paginator(c, &s3.ListObjectsV2Input{Bucket: aws.String(bucket), Prefix: aws.String(prefix)})
	for p.HasMorePages() {
		page, err := p.NextPage(ctx)
		if err != nil {
			t.Fatalf("list s3://%s/%s: %v", bucket, prefix, err)
		}
		for _, o := range page.Contents {
			out, err := c.GetObject(ctx, &s3.GetObjectInput{Bucket: aws.String(bucket), Key: o.Key})
			if err != nil {
				t.Fatalf("get s3://%s/%s: %v", bucket, *o.Key, err)
			}
			b, err := io.ReadAll(out.Body)
			out.Body.Close()
			if err != nil {
				t.Fatalf("get s3://%s/%s: %v", bucket, *o.Key, err)
			}
			files[strings.TrimPrefix(*o.Key, prefix)] = b
		}
	}
	return files
}

// clDigestLine is the digest that `run` and `commit` print last but one.
var clDigestLine = regexp.MustCompile(`(?m)^digest\s+([0-9a-f]{64})$`)

func clPrintedDigest(t *testing.T, r clResult) string {
	t.Helper()
	m := clDigestLine.FindStringSubmatch(r.stdout)
	if m == nil {
		t.Fatalf("no digest line printed:\n%s", r)
	}
	return m[1]
}

// clSeals returns the item ids sealed under work/<stage>/ of a local work
// area: each item's completion record _done.json names its item.
func clSeals(t *testing.T, work, stage string) map[string]string {
	t.Helper()
	ids := map[string]string{} // item key (folder) → id
	entries, err := os.ReadDir(filepath.Join(work, stage))
	if errors.Is(err, fs.ErrNotExist) {
		return ids
	}
	if err != nil {
		t.Fatal(err)
	}
	for _, e := range entries {
		b, err := os.ReadFile(filepath.Join(work, stage, e.Name(), "_done.json"))
		if errors.Is(err, fs.ErrNotExist) {
			continue
		}
		if err != nil {
			t.Fatal(err)
		}
		var rec struct {
			ID string `json:"id"`
		}
		if err := json.Unmarshal(b, &rec); err != nil {
			t.Fatalf("%s/%s/_done.json: %v", stage, e.Name(), err)
		}
		ids[e.Name()] = rec.ID
	}
	return ids
}

// ---------------------------------------------------------------------------
// The stage graph as a cluster runs it

// clStageNames is the stage graph in run order.
var clStageNames = []string{"ingest", "episodes", "goals", "pack"}

// clTask is one node of the DAG: its processes, all started at once.
type clTask struct {
	name  string
	procs [][]string
}

// clFixedDAG is the DAG without jobs/nightly.yaml: every stage over n
// workers, then the commit.
func clFixedDAG(cfg, version string, n int) []clTask {
	var dag []clTask
	for _, st := range clStageNames {
		task := clTask{name: st}
		for i := range n {
			task.procs = append(task.procs, []string{"stage", st, "--config", cfg, "--worker", fmt.Sprintf("%d/%d", i, n), "--parallel", "2"})
		}
		dag = append(dag, task)
	}
	return append(dag, clTask{name: "commit", procs: [][]string{{"commit", "--config", cfg, "--version", version}}})
}

// clNightly is the cluster manifest whose DAG the test runs when it exists.
const clNightly = "jobs/nightly.yaml"

// clArgoDAG derives the DAG of an Argo (Cron)Workflow: the tasks of its
// entrypoint's dag in dependency order, each task expanded through its
// template (a container, or a fan-out of steps or dag tasks with
// withSequence/withItems) into the container args of its processes, with
// the {{…}} placeholders substituted, the workflow parameter `workers` set
// to n, every --config replaced by cfg and the commit's --version by
// version. It follows Argo's documented field names (spec.workflowSpec,
// templates[].dag.tasks, dependencies/depends, arguments.parameters,
// withSequence.count, {{inputs.parameters.X}}, {{workflow.parameters.X}},
// {{item}}; argo-workflows docs, "Workflow Variables" and "Loops").
func clArgoDAG(doc []byte, cfg, version string, n int) ([]clTask, error) {
	var root map[string]any
	if err := yaml.Unmarshal(doc, &root); err != nil {
		return nil, err
	}
	spec := clMap(root["spec"])
	if ws := clMap(spec["workflowSpec"]); ws != nil {
		spec = ws
	}
	if spec == nil {
		return nil, errors.New("no spec or spec.workflowSpec")
	}
	wfParams := map[string]string{}
	for _, p := range clList(clMap(spec["arguments"])["parameters"]) {
		pm := clMap(p)
		wfParams[clString(pm["name"])] = clString(pm["value"])
	}
	wfParams["workers"] = strconv.Itoa(n)
	templates := map[string]map[string]any{}
	for _, tm := range clList(spec["templates"]) {
		m := clMap(tm)
		templates[clString(m["name"])] = m
	}
	entry := templates[clString(spec["entrypoint"])]
	if entry == nil || clMap(entry["dag"]) == nil {
		return nil, fmt.Errorf("entrypoint %q is not a dag template", clString(spec["entrypoint"]))
	}
	x := &clArgo{templates: templates, wf: wfParams}
	type node struct {
		name string
		deps []string
		task map[string]any
	}
	var nodes []node
	word := regexp.MustCompile(`[A-Za-z0-9_-]+`)
	for _, tk := range clList(clMap(entry["dag"])["tasks"]) {
		m := clMap(tk)
		nd := node{name: clString(m["name"]), task: m}
		for _, d := range clList(m["dependencies"]) {
			nd.deps = append(nd.deps, clString(d))
		}
		// depends: "a && (b.Succeeded || c)": task names are the words
		// not after a dot.
		if dep := clString(m["depends"]); dep != "" {
			for _, loc := range word.FindAllStringIndex(dep, -1) {
				if loc[0] > 0 && dep[loc[0]-1] == '.' {
					continue
				}
				nd.deps = append(nd.deps, dep[loc[0]:loc[1]])
			}
		}
		nodes = append(nodes, nd)
	}
	// Kahn's order; a task runs once every task it depends on has finished,
	// which is how the test's barriers run it too.
	done := map[string]bool{}
	var dag []clTask
	for len(done) < len(nodes) {
		progressed := false
		for _, nd := range nodes {
			if done[nd.name] || slices.ContainsFunc(nd.deps, func(d string) bool { return !done[d] }) {
				continue
			}
			procs, err := x.task(nd.task, nil)
			if err != nil {
				return nil, fmt.Errorf("task %s: %w", nd.name, err)
			}
			for _, args := range procs {
				if err := clPatchArgs(args, cfg, version); err != nil {
					return nil, fmt.Errorf("task %s: %w", nd.name, err)
				}
			}
			dag = append(dag, clTask{name: nd.name, procs: procs})
			done[nd.name] = true
			progressed = true
			break // re-scan: keep the declaration order among ready tasks
		}
		if !progressed {
			return nil, errors.New("dependency cycle or unknown dependency")
		}
	}
	return dag, nil
}

// clPatchArgs points a process at the test's config and version.
func clPatchArgs(args []string, cfg, version string) error {
	for i, a := range args {
		if strings.Contains(a, "{{") {
			return fmt.Errorf("placeholder left in %q", a)
		}
		if i+1 < len(args) && a == "--config" {
			args[i+1] = cfg
		}
		if i+1 < len(args) && a == "--version" {
			args[i+1] = version
		}
	}
	return nil
}

// clArgo expands templates into processes.
type clArgo struct {
	templates map[string]map[string]any
	wf        map[string]string
}

var clPlaceholder = regexp.MustCompile(`\{\{\s*([^}]+?)\s*\}\}`)

func (x *clArgo) subst(s string, inputs map[string]string, item *string) (string, error) {
	var err error
	out := clPlaceholder.ReplaceAllStringFunc(s, func(m string) string {
		name := clPlaceholder.FindStringSubmatch(m)[1]
		switch {
		case name == "item" && item != nil:
			return *item
		case strings.HasPrefix(name, "inputs.parameters."):
			if v, ok := inputs[strings.TrimPrefix(name, "inputs.parameters.")]; ok {
				return v
			}
		case strings.HasPrefix(name, "workflow.parameters."):
			if v, ok := x.wf[strings.TrimPrefix(name, "workflow.parameters.")]; ok {
				return v
			}
		}
		err = fmt.Errorf("cannot substitute %s", m)
		return m
	})
	return out, err
}

// task expands one dag task or step (with its loop) called from a template
// whose inputs are given.
func (x *clArgo) task(tk map[string]any, inputs map[string]string) ([][]string, error) {
	items := []*string{nil}
	if seq := clMap(tk["withSequence"]); seq != nil {
		start, end := 0, -1
		if c := clString(seq["count"]); c != "" {
			c, err := x.subst(c, inputs, nil)
			if err != nil {
				return nil, err
			}
			cnt, err := strconv.Atoi(c)
			if err != nil {
				return nil, fmt.Errorf("withSequence count %q", c)
			}
			if s := clString(seq["start"]); s != "" {
				if start, err = strconv.Atoi(s); err != nil {
					return nil, err
				}
			}
			end = start + cnt - 1
		} else {
			var err error
			s, err1 := x.subst(clString(seq["start"]), inputs, nil)
			e, err2 := x.subst(clString(seq["end"]), inputs, nil)
			if err = errors.Join(err1, err2); err != nil {
				return nil, err
			}
			if start, err = strconv.Atoi(s); err != nil {
				return nil, err
			}
			if end, err = strconv.Atoi(e); err != nil {
				return nil, err
			}
		}
		items = nil
		for i := start; i <= end; i++ {
			v := strconv.Itoa(i)
			items = append(items, &v)
		}
	}
	if wi := clList(tk["withItems"]); wi != nil {
		items = nil
		for _, it := range wi {
			v := clString(it)
			items = append(items, &v)
		}
	}
	var procs [][]string
	for _, item := range items {
		args := map[string]string{}
		for _, p := range clList(clMap(tk["arguments"])["parameters"]) {
			pm := clMap(p)
			v, err := x.subst(clString(pm["value"]), inputs, item)
			if err != nil {
				return nil, err
			}
			args[clString(pm["name"])] = v
		}
		ps, err := x.template(clString(tk["template"]), args)
		if err != nil {
			return nil, err
		}
		procs = append(procs, ps...)
	}
	return procs, nil
}

// template expands a template called with the given arguments.
func (x *clArgo) template(name string, args map[string]string) ([][]string, error) {
	tm := x.templates[name]
	if tm == nil {
		return nil, fmt.Errorf("no template %q", name)
	}
	inputs := map[string]string{}
	for _, p := range clList(clMap(tm["inputs"])["parameters"]) {
		pm := clMap(p)
		n := clString(pm["name"])
		if v, ok := args[n]; ok {
			inputs[n] = v
		} else if v, ok := pm["value"]; ok {
			inputs[n] = clString(v)
		} else if v, ok := pm["default"]; ok {
			inputs[n] = clString(v)
		}
	}
	if c := clMap(tm["container"]); c != nil {
		var out []string
		for _, a := range clList(c["args"]) {
			s, err := x.subst(clString(a), inputs, nil)
			if err != nil {
				return nil, err
			}
			out = append(out, s)
		}
		return [][]string{out}, nil
	}
	var inner []any
	if d := clMap(tm["dag"]); d != nil {
		inner = clList(d["tasks"])
	}
	for _, group := range clList(tm["steps"]) {
		inner = append(inner, clList(group)...)
	}
	if inner == nil {
		return nil, fmt.Errorf("template %q has no container, dag or steps", name)
	}
	var procs [][]string
	for _, it := range inner {
		ps, err := x.task(clMap(it), inputs)
		if err != nil {
			return nil, err
		}
		procs = append(procs, ps...)
	}
	return procs, nil
}

func clMap(v any) map[string]any { m, _ := v.(map[string]any); return m }
func clList(v any) []any         { l, _ := v.([]any); return l }
func clString(v any) string {
	switch v := v.(type) {
	case nil:
		return ""
	case string:
		return v
	}
	return fmt.Sprint(v)
}

// clDAG is the DAG the test runs: jobs/nightly.yaml's when it exists, else
// the fixed order.
func clDAG(t *testing.T, cfg, version string, n int) []clTask {
	t.Helper()
	doc, err := os.ReadFile(clNightly)
	if errors.Is(err, fs.ErrNotExist) {
		t.Logf("%s does not exist: running the fixed stage order", clNightly)
		return clFixedDAG(cfg, version, n)
	}
	if err != nil {
		t.Fatal(err)
	}
	dag, err := clArgoDAG(doc, cfg, version, n)
	if err != nil {
		t.Fatalf("%s: %v", clNightly, err)
	}
	var names []string
	for _, task := range dag {
		names = append(names, task.name)
	}
	if want := append(slices.Clone(clStageNames), "commit"); !slices.Equal(names, want) {
		t.Fatalf("%s: tasks in dependency order %v, want %v", clNightly, names, want)
	}
	t.Logf("running the DAG of %s: %v", clNightly, names)
	return dag
}

// clWorkerLine is what `hindcast stage` prints when its share is done.
var clWorkerLine = regexp.MustCompile(`(?m)^stage (\S+) worker (\d+)/(\d+): (\d+) items, (\d+) reused, `)

// clRunCluster runs the DAG over n workers per stage, a barrier between
// tasks, and checks every process: exit 0, and each worker reporting its
// share of the stage's items (SPEC-free, the Share rule of pipeline/run.go:
// positions i, i+n, … of the items), none reused in a fresh work area.
// items gives each stage's item count. It returns the commit's result.
func clRunCluster(t *testing.T, bin string, env []string, cfg, version string, n int, items map[string]int) clResult {
	t.Helper()
	var commit clResult
	for _, task := range clDAG(t, cfg, version, n) {
		start := time.Now()
		res := clRunAll(t, bin, env, task.procs)
		t.Logf("N=%d %s: %d processes, %.2fs", n, task.name, len(res), time.Since(start).Seconds())
		if task.name == "commit" {
			if len(res) != 1 {
				t.Fatalf("commit task runs %d processes, want 1", len(res))
			}
			if res[0].code != 0 {
				t.Fatalf("commit: want exit 0:\n%s", res[0])
			}
			commit = res[0]
			continue
		}
		if len(res) != n {
			t.Fatalf("%s: %d processes, want %d workers", task.name, len(res), n)
		}
		seen := map[int]bool{}
		for _, r := range res {
			if r.code != 0 {
				t.Fatalf("%s: want exit 0:\n%s", task.name, r)
			}
			m := clWorkerLine.FindStringSubmatch(r.stdout)
			if m == nil {
				t.Fatalf("%s: no worker line:\n%s", task.name, r)
			}
			w, _ := strconv.Atoi(m[2])
			of, _ := strconv.Atoi(m[3])
			got, _ := strconv.Atoi(m[4])
			reused, _ := strconv.Atoi(m[5])
			total := items[task.name]
			want := (total - w + n - 1) / n // |{w, w+n, …} ∩ [0, total)|
			if m[1] != task.name || of != n || got != want || reused != 0 || seen[w] {
				t.Errorf("%s: worker line %q, want stage %s worker %d/%d: %d items, 0 reused", task.name, m[0], task.name, w, n, want)
			}
			seen[w] = true
		}
	}
	return commit
}

// ---------------------------------------------------------------------------
// Tests

// TestClusterArgoDAGReading checks the reading of an Argo CronWorkflow on a
// small one of the shape jobs/ uses, so that the cluster test really runs
// the manifest's DAG once it exists.
func TestClusterArgoDAGReading(t *testing.T) {
	const doc = `apiVersion: argoproj.io/v1alpha1
kind: CronWorkflow
metadata: {name: nightly}
spec:
  schedule: "0 2 * * *"
  workflowSpec:
    entrypoint: nightly
    arguments:
      parameters:
        - {name: workers, value: "8"}
        - {name: version, value: "{{workflow.creationTimestamp}}"}
    templates:
      - name: nightly
        dag:
          tasks:
            - {name: goals, template: stage, dependencies: [episodes], arguments: {parameters: [{name: stage, value: goals}]}}
            - {name: ingest, template: stage, arguments: {parameters: [{name: stage, value: ingest}]}}
            - {name: episodes, template: stage, depends: "ingest.Succeeded", arguments: {parameters: [{name: stage, value: episodes}]}}
            - {name: pack, template: stage, depends: "goals", arguments: {parameters: [{name: stage, value: pack}]}}
            - {name: commit, template: commit, dependencies: [pack]}
      - name: stage
        inputs: {parameters: [{name: stage}]}
        steps:
          - - name: worker
              template: worker
              withSequence: {count: "{{workflow.parameters.workers}}"}
              arguments:
                parameters:
                  - {name: stage, value: "{{inputs.parameters.stage}}"}
                  - {name: worker, value: "{{item}}"}
      - name: worker
        inputs: {parameters: [{name: stage}, {name: worker}]}
        container:
          image: hindcast
          args: ["stage", "{{inputs.parameters.stage}}", "--config", "/etc/hindcast/nightly.yaml", "--worker", "{{inputs.parameters.worker}}/{{workflow.parameters.workers}}", "--parallel", "2"]
      - name: commit
        container:
          image: hindcast
          args: ["commit", "--config", "/etc/hindcast/nightly.yaml", "--version", "{{workflow.parameters.version}}"]
`
	// The version parameter holds a placeholder Argo fills in; the test
	// replaces the value after --version, so it is given a plain one here.
	dag, err := clArgoDAG([]byte(strings.Replace(doc, "{{workflow.creationTimestamp}}", "nightly-1", 1)), "/tmp/c.yaml", "v9", 2)
	if err != nil {
		t.Fatal(err)
	}
	want := clFixedDAG("/tmp/c.yaml", "v9", 2)
	if len(dag) != len(want) {
		t.Fatalf("derived %d tasks, want %d: %v", len(dag), len(want), dag)
	}
	for i := range want {
		if dag[i].name != want[i].name || !slices.EqualFunc(dag[i].procs, want[i].procs, slices.Equal) {
			t.Errorf("task %d: got %s %q, want %s %q", i, dag[i].name, dag[i].procs, want[i].name, want[i].procs)
		}
	}
}

// clDemoItems is each stage's item count for the demo config: one ingest
// item per selected object, one item per partition after it.
func clDemoItems(t *testing.T, logs string, partitions int) map[string]int {
	return map[string]int{
		"ingest":   len(clSourceObjects(t, logs)),
		"episodes": partitions, "goals": partitions, "pack": partitions,
	}
}

// TestClusterLocal runs the DAG with 1, 3 and 4 workers per stage on local
// work and output folders and compares each version with `hindcast run`'s.
func TestClusterLocal(t *testing.T) {
	bin := buildHindcast(t)
	dir := t.TempDir()
	logs, text := clDemo(t)
	const partitions = 4 // the demo config's
	items := clDemoItems(t, logs, partitions)
	ref := clDemoConfig(t, dir, text, "ref.yaml", "ref-work", "ref-out")
	r := clMustRun(t, bin, nil, "run", "--config", ref, "--version", "ref", "--parallel", "2")
	want := clLocalVersion(t, filepath.Join(dir, "ref-out"), "larkspur-aisles", "ref")
	if d := clPrintedDigest(t, r); d != want.manifest.Digest {
		t.Errorf("run printed digest %s, manifest has %s", d, want.manifest.Digest)
	}
	for _, n := range []int{1, 3, 4} {
		t.Run(fmt.Sprintf("N=%d", n), func(t *testing.T) {
			name := fmt.Sprintf("n%d", n)
			cfg := clDemoConfig(t, dir, text, name+".yaml", name+"-work", name+"-out")
			commit := clRunCluster(t, bin, nil, cfg, "nightly", n, items)
			got := clLocalVersion(t, filepath.Join(dir, name+"-out"), "larkspur-aisles", "nightly")
			clSameContent(t, want, got)
			if d := clPrintedDigest(t, commit); d != want.manifest.Digest {
				t.Errorf("commit printed digest %s, want %s", d, want.manifest.Digest)
			}
			// The manifest's stage records come from the workers' seals.
			for i, st := range got.manifest.Stages {
				if st.Name != clStageNames[i] || st.Items != items[st.Name] || st.Key != want.manifest.Stages[i].Key {
					t.Errorf("stage record %d = %+v, want %s with %d items and key %s", i, st, clStageNames[i], items[clStageNames[i]], want.manifest.Stages[i].Key)
				}
			}
		})
	}
}

// TestClusterS3 runs the DAG with work and output on S3 (versitygw), the
// source local, credentials passed to the workers through the environment
// and the endpoint through the config's storage.endpoint, and compares each
// version with the local `hindcast run`'s: same bytes, same digest (SPEC §6).
func TestClusterS3(t *testing.T) {
	srv := s3test.Start(t, "cluster")
	bin := buildHindcast(t)
	dir := t.TempDir()
	logs, text := clDemo(t)
	items := clDemoItems(t, logs, 4)
	ref := clDemoConfig(t, dir, text, "ref.yaml", "ref-work", "ref-out")
	clMustRun(t, bin, nil, "run", "--config", ref, "--version", "ref", "--parallel", "2")
	want := clLocalVersion(t, filepath.Join(dir, "ref-out"), "larkspur-aisles", "ref")
	// The test's own environment may hold other AWS settings: the server's
	// come last and win.
	env := srv.Env()
	for _, n := range []int{1, 3, 4} {
		t.Run(fmt.Sprintf("N=%d", n), func(t *testing.T) {
			name := fmt.Sprintf("n%d", n)
			s3text := text + "storage:\n  endpoint: " + srv.Endpoint + "\n"
			cfg := clDemoConfig(t, dir, s3text, name+"-s3.yaml", "s3://cluster/"+name+"/work", "s3://cluster/"+name+"/out")
			commit := clRunCluster(t, bin, env, cfg, "nightly", n, items)
			prefix := name + "/out/larkspur-aisles/nightly/"
			got := clParseVersion(t, "s3://cluster/"+prefix, clS3Files(t, srv, "cluster", prefix))
			clSameContent(t, want, got)
			if d := clPrintedDigest(t, commit); d != want.manifest.Digest {
				t.Errorf("commit printed digest %s, want %s", d, want.manifest.Digest)
			}
		})
	}
}

// TestClusterIncompleteUpstream: a worker whose upstream stage is not
// complete does nothing and says which stage is missing (exit 1, SPEC §6
// runtime failure); so does a commit before pack.
func TestClusterIncompleteUpstream(t *testing.T) {
	bin := buildHindcast(t)
	dir := t.TempDir()
	_, text := clDemo(t)
	cfg := clDemoConfig(t, dir, text, "c.yaml", "work1", "out1")
	work := filepath.Join(dir, "work1")

	check := func(r clResult, stage string) {
		t.Helper()
		if r.code != 1 || !strings.Contains(r.stderr, "stage "+stage+" is not complete") {
			t.Errorf("want exit 1 naming %q:\n%s", "stage "+stage+" is not complete", r)
		}
	}
	// Nothing ran: episodes names ingest, and writes nothing of its own.
	check(clRun(t, bin, nil, "stage", "episodes", "--config", cfg, "--worker", "0/1"), "ingest")
	if ids := clSeals(t, work, "episodes"); len(ids) != 0 {
		t.Errorf("episodes sealed %v with ingest missing", ids)
	}
	// A third of ingest ran: still incomplete.
	clMustRun(t, bin, nil, "stage", "ingest", "--config", cfg, "--worker", "0/3", "--parallel", "2")
	check(clRun(t, bin, nil, "stage", "episodes", "--config", cfg, "--worker", "1/2"), "ingest")
	// Pack needs goals, whose own upstream is what is missing first.
	check(clRun(t, bin, nil, "stage", "pack", "--config", cfg, "--worker", "0/1"), "ingest")
	for _, w := range []string{"1/3", "2/3"} {
		clMustRun(t, bin, nil, "stage", "ingest", "--config", cfg, "--worker", w, "--parallel", "2")
	}
	clMustRun(t, bin, nil, "stage", "episodes", "--config", cfg, "--worker", "0/1", "--parallel", "2")
	check(clRun(t, bin, nil, "stage", "pack", "--config", cfg, "--worker", "0/1"), "goals")
	check(clRun(t, bin, nil, "commit", "--config", cfg, "--version", "v1"), "goals")
	if _, err := os.Stat(filepath.Join(dir, "out1", "larkspur-aisles", "v1", "manifest.json")); !errors.Is(err, fs.ErrNotExist) {
		t.Errorf("a commit over incomplete stages left a manifest (stat: %v)", err)
	}
}

// TestClusterCompletionIndex: `--workers 3` takes the worker's index from
// JOB_COMPLETION_INDEX (a Kubernetes Indexed Job's, "Indexed Job for
// Parallel Processing with Static Work Assignment") and runs exactly that
// share: the items at positions 2, 5, 8, … of the stage's item order.
func TestClusterCompletionIndex(t *testing.T) {
	bin := buildHindcast(t)
	dir := t.TempDir()
	logs, text := clDemo(t)
	text = clReplace(t, text, "\npartitions: 4\n", "\npartitions: 8\n")
	cfg := clDemoConfig(t, dir, text, "c.yaml", "work1", "out1")
	work := filepath.Join(dir, "work1")
	idx := []string{"JOB_COMPLETION_INDEX=2"}

	// Ingest items are the objects in byte order of their keys (SPEC §3.1).
	objs := clSourceObjects(t, logs)
	var want []string
	for i := 2; i < len(objs); i += 3 {
		want = append(want, objs[i])
	}
	r := clMustRun(t, bin, idx, "stage", "ingest", "--config", cfg, "--workers", "3", "--parallel", "2")
	if !strings.Contains(r.stdout, fmt.Sprintf("stage ingest worker 2/3: %d items, 0 reused", len(want))) {
		t.Errorf("ingest worker line, want worker 2/3 with %d items:\n%s", len(want), r)
	}
	got := slices.Sorted(maps.Values(clSeals(t, work, "ingest")))
	if !slices.Equal(got, want) {
		t.Errorf("worker 2 of 3 sealed ingest items\n%v\nwant\n%v", got, want)
	}

	// Complete ingest, then episodes' share: partitions 2 and 5 of 8.
	for _, w := range []string{"0/3", "1/3"} {
		clMustRun(t, bin, nil, "stage", "ingest", "--config", cfg, "--worker", w, "--parallel", "2")
	}
	if n := len(clSeals(t, work, "ingest")); n != len(objs) {
		t.Fatalf("ingest sealed %d items after all three workers, want %d", n, len(objs))
	}
	clMustRun(t, bin, idx, "stage", "episodes", "--config", cfg, "--workers", "3", "--parallel", "2")
	got = slices.Sorted(maps.Values(clSeals(t, work, "episodes")))
	if want := []string{clPartName(2), clPartName(5)}; !slices.Equal(got, want) {
		t.Errorf("worker 2 of 3 sealed episodes items %v, want %v", got, want)
	}

	// An index outside 0…N−1, or none, is a usage error (exit 2).
	for _, env := range [][]string{{"JOB_COMPLETION_INDEX=3"}, {"JOB_COMPLETION_INDEX="}} {
		if r := clRun(t, bin, env, "stage", "goals", "--config", cfg, "--workers", "3"); r.code != 2 || !strings.Contains(r.stderr, "JOB_COMPLETION_INDEX") {
			t.Errorf("%v: want exit 2 naming JOB_COMPLETION_INDEX:\n%s", env, r)
		}
	}
}
