package main

// End-to-end tests of whole runs on S3 (a real server, versitygw, through
// internal/s3test): the demo fleet run from a local folder and from a bucket
// gives the same digest and byte-identical shards (SPEC §6: "so does running
// it with the objects, the work area or the output on another storage");
// runs through a fault-injecting proxy (internal/faultproxy) finish with the
// fault-free digest and count their retries; a persistent fault fails the
// run without publishing anything; the secret key never shows.

import (
	"bufio"
	"bytes"
	"compress/gzip"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"math"
	"os"
	"path/filepath"
	"reflect"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/aws/aws-sdk-go-v2/aws"
	"github.com/aws/aws-sdk-go-v2/service/s3"
	"golang.org/x/sync/errgroup"

	"hindcast/fleet"
	"hindcast/internal/faultproxy"
	"hindcast/internal/s3test"
	"hindcast/pipeline"
	"hindcast/stages"
)

// s3SetEnv points the SDK's default credential chain at the server's keys
// only (no token, profile, shared files, instance metadata or endpoint
// override from the developer's environment). t.Setenv: not parallel.
func s3SetEnv(t *testing.T, srv *s3test.Server) {
	t.Helper()
	none := filepath.Join(t.TempDir(), "none")
	for k, v := range map[string]string{
		"AWS_ACCESS_KEY_ID":           srv.AccessKey,
		"AWS_SECRET_ACCESS_KEY":       srv.SecretKey,
		"AWS_REGION":                  srv.Region,
		"AWS_SESSION_TOKEN":           "",
		"AWS_PROFILE":                 "",
		"AWS_ENDPOINT_URL":            "",
		"AWS_ENDPOINT_URL_S3":         "",
		"AWS_EC2_METADATA_DISABLED":   "true",
		"AWS_CONFIG_FILE":             none,
		"AWS_SHARED_CREDENTIALS_FILE": none,
	} {
		t.Setenv(k, v)
	}
}

// s3Run runs one command line through Main.
func s3Run(args ...string) (int, string, string) {
	var stdout, stderr bytes.Buffer
	code := Main(context.Background(), args, &stdout, &stderr)
	return code, stdout.String(), stderr.String()
}

// s3MustRun runs a command line that must succeed and checks that the
// secret key shows nowhere in what it printed.
func s3MustRun(t *testing.T, secret string, args ...string) (string, string) {
	t.Helper()
	code, out, errOut := s3Run(args...)
	if code != exitOK {
		if len(errOut) > 4000 {
			errOut = "…" + errOut[len(errOut)-4000:]
		}
		t.Fatalf("hindcast %s: exit %d\nstdout:\n%s\nstderr:\n%s", strings.Join(args, " "), code, out, errOut)
	}
	s3NoSecret(t, secret, "stdout", out)
	s3NoSecret(t, secret, "stderr", errOut)
	return out, errOut
}

func s3NoSecret(t *testing.T, secret, what, text string) {
	t.Helper()
	if strings.Contains(text, secret) {
		t.Errorf("the secret key appears in %s", what)
	}
}

// s3ManifestDoc is the part of manifest.json (SPEC §5) these tests compare.
type s3ManifestDoc struct {
	Digest     string `json:"digest"`
	SourceRoot string `json:"source_root"`
	Sources    []struct {
		Key         string           `json:"key"`
		URI         string           `json:"uri"`
		Bytes       int64            `json:"bytes"`
		SHA256      string           `json:"sha256"`
		ETag        string           `json:"etag"`
		Lines       int64            `json:"lines"`
		Kept        int64            `json:"kept"`
		Dropped     map[string]int64 `json:"dropped"`
		DuplicateOf *string          `json:"duplicate_of"`
		Incomplete  bool             `json:"incomplete"`
	} `json:"sources"`
	Funnel json.RawMessage `json:"funnel"`
	Files  []struct {
		Path   string `json:"path"`
		SHA256 string `json:"sha256"`
		Bytes  int64  `json:"bytes"`
	} `json:"files"`
}

func s3ParseManifest(t *testing.T, raw []byte) *s3ManifestDoc {
	t.Helper()
	var m s3ManifestDoc
	if err := json.Unmarshal(raw, &m); err != nil {
		t.Fatalf("manifest: %v", err)
	}
	if m.Digest == "" || len(m.Files) == 0 || len(m.Sources) == 0 {
		t.Fatalf("manifest without digest, files or sources:\n%s", raw)
	}
	return &m
}

// s3Get reads an object with the test's own client.
func s3Get(t *testing.T, c *s3.Client, bucket, key string) []byte {
	t.Helper()
	out, err := c.GetObject(context.Background(), &s3.GetObjectInput{Bucket: aws.String(bucket), Key: aws.String(key)})
	if err != nil {
		t.Fatalf("get s3://%s/%s: %v", bucket, key, err)
	}
	defer out.Body.Close()
	b, err := io.ReadAll(out.Body)
	if err != nil {
		t.Fatalf("get s3://%s/%s: %v", bucket, key, err)
	}
	return b
}

// s3Keys lists every key under prefix with the test's own client.
func s3Keys(t *testing.T, c *s3.Client, bucket, prefix string) []string {
	t.Helper()
	var keys []string
	p := s3.NewListObjectsV2Paginator(c, &s3.ListObjectsV2Input{Bucket: aws.String(bucket), Prefix: aws.String(prefix)})
	for p.HasMorePages() {
		page, err := p.NextPage(context.Background())
		if err != nil {
			t.Fatalf("list s3://%s/%s: %v", bucket, prefix, err)
		}
		for _, o := range page.Contents {
			keys = append(keys, aws.ToString(o.Key))
		}
	}
	return keys
}

// s3Upload puts every file under dir at prefix + its slash-separated path.
func s3Upload(t *testing.T, c *s3.Client, bucket, dir, prefix string) int {
	t.Helper()
	var files []string
	err := filepath.WalkDir(dir, func(p string, d fs.DirEntry, err error) error {
		if err == nil && !d.IsDir() {
			files = append(files, p)
		}
		return err
	})
	if err != nil {
		t.Fatal(err)
	}
	var g errgroup.Group
	g.SetLimit(8)
	for _, p := range files {
		g.Go(func() error {
			rel, err := filepath.Rel(dir, p)
			if err != nil {
				return err
			}
			b, err := os.ReadFile(p)
			if err != nil {
				return err
			}
			_, err = c.PutObject(context.Background(), &s3.PutObjectInput{Bucket: aws.String(bucket),
				Key: aws.String(prefix + filepath.ToSlash(rel)), Body: bytes.NewReader(b)})
			return err
		})
	}
	if err := g.Wait(); err != nil {
		t.Fatalf("upload %s: %v", dir, err)
	}
	return len(files)
}

var s3StorageLine = regexp.MustCompile(`(?m)^storage\s+(\d+) requests, (\d+) retries`)

// s3Retries reads the retries of the summary line "storage   N requests,
// R retries, …" that Main prints on stdout.
func s3Retries(t *testing.T, stdout string) int {
	t.Helper()
	m := s3StorageLine.FindStringSubmatch(stdout)
	if m == nil {
		t.Fatalf("no storage line in stdout:\n%s", stdout)
	}
	n, _ := strconv.Atoi(m[2])
	return n
}

// s3LogRetries reads "retries" from the JSON log record with msg "storage".
func s3LogRetries(t *testing.T, stderr string) int64 {
	t.Helper()
	sc := bufio.NewScanner(strings.NewReader(stderr))
	sc.Buffer(make([]byte, 1<<20), 1<<20)
	for sc.Scan() {
		var rec map[string]any
		if json.Unmarshal(sc.Bytes(), &rec) != nil || rec["msg"] != "storage" {
			continue
		}
		v, ok := rec["retries"].(float64)
		if !ok {
			t.Fatalf("storage log record without retries: %s", sc.Text())
		}
		return int64(v)
	}
	t.Fatalf("no JSON log record with msg \"storage\" in stderr")
	return 0
}

// s3Replace replaces the one line of text that matches pattern.
func s3Replace(t *testing.T, text, pattern, repl string) string {
	t.Helper()
	re := regexp.MustCompile(pattern)
	if n := len(re.FindAllStringIndex(text, -1)); n != 1 {
		t.Fatalf("%d lines match %q in the config, want 1", n, pattern)
	}
	return re.ReplaceAllLiteralString(text, repl)
}

func s3JSONEqual(a, b json.RawMessage) bool {
	var x, y any
	return json.Unmarshal(a, &x) == nil && json.Unmarshal(b, &y) == nil && reflect.DeepEqual(x, y)
}

// ---------------------------------------------------------------------------
// The demo, local and on S3

func TestS3DemoEndToEnd(t *testing.T) {
	const bucket = "hc-demo"
	srv := s3test.Start(t, bucket)
	s3SetEnv(t, srv)
	c := srv.Client()

	dir := t.TempDir()
	if err := fleet.Demo(dir); err != nil {
		t.Fatal(err)
	}
	cfgA := filepath.Join(dir, "hindcast.yaml")
	// The demo's file:// image references name the local logs folder; the
	// S3 run below reads them as an image root (SPEC §1), and both runs
	// name it, so that their configs differ only in where things are.
	demoCfg, err := os.ReadFile(cfgA)
	if err != nil {
		t.Fatal(err)
	}
	withRoots := s3Replace(t, string(demoCfg), `(?m)^  uri: logs$`,
		"  uri: logs\n  image_roots: [\"file://"+filepath.ToSlash(filepath.Join(dir, "logs"))+"/\"]")
	if err := os.WriteFile(cfgA, []byte(withRoots), 0o644); err != nil {
		t.Fatal(err)
	}
	s3MustRun(t, srv.SecretKey, "run", "--config", cfgA, "--version", "a", "--parallel", "2")
	rawA, err := os.ReadFile(filepath.Join(dir, "datasets", "larkspur-aisles", "a", "manifest.json"))
	if err != nil {
		t.Fatal(err)
	}
	mA := s3ParseManifest(t, rawA)

	// The same logs, images included, in the bucket: relative image keys
	// then resolve there; the file:// ones still name the local folder,
	// an image root.
	n := s3Upload(t, c, bucket, filepath.Join(dir, "logs"), "logs/")
	base, err := os.ReadFile(cfgA)
	if err != nil {
		t.Fatal(err)
	}
	yb := string(base)
	yb = s3Replace(t, yb, `(?m)^  uri: logs$`, "  uri: s3://"+bucket+"/logs/")
	yb = s3Replace(t, yb, `(?m)^work: work$`, "work: s3://"+bucket+"/work/")
	yb = s3Replace(t, yb, `(?m)^output: datasets$`, "output: s3://"+bucket+"/datasets/")
	yb += "storage:\n  endpoint: " + srv.Endpoint + "\n"
	cfgB := filepath.Join(t.TempDir(), "hindcast-s3.yaml")
	if err := os.WriteFile(cfgB, []byte(yb), 0o644); err != nil {
		t.Fatal(err)
	}
	outB, errB := s3MustRun(t, srv.SecretKey, "run", "--config", cfgB, "--version", "b", "--parallel", "2")
	rawB := s3Get(t, c, bucket, "datasets/larkspur-aisles/b/manifest.json")
	s3NoSecret(t, srv.SecretKey, "the manifest", string(rawB))
	mB := s3ParseManifest(t, rawB)

	if mA.Digest != mB.Digest {
		t.Errorf("digest local %s, on S3 %s", mA.Digest, mB.Digest)
	}
	if !s3JSONEqual(mA.Funnel, mB.Funnel) {
		t.Errorf("funnel local %s\non S3 %s", mA.Funnel, mB.Funnel)
	}
	if got, want := mB.SourceRoot, "s3://"+bucket+"/logs/"; got != want {
		t.Errorf("source_root %q, want %q", got, want)
	}
	// Every uploaded log object is listed (images are not under include).
	if len(mA.Sources) != len(mB.Sources) || len(mB.Sources) >= n {
		t.Errorf("%d sources local, %d on S3 (of %d uploaded files)", len(mA.Sources), len(mB.Sources), n)
	}
	for i := range min(len(mA.Sources), len(mB.Sources)) {
		a, b := mA.Sources[i], mB.Sources[i]
		if b.URI != "s3://"+bucket+"/logs/"+b.Key || b.ETag == "" {
			t.Errorf("source %s: uri %q etag %q; want s3://%s/logs/%s and an etag", b.Key, b.URI, b.ETag, bucket, b.Key)
		}
		local, err := os.ReadFile(filepath.Join(dir, "logs", filepath.FromSlash(b.Key)))
		if err != nil || int64(len(local)) != b.Bytes {
			t.Errorf("source %s: %d bytes in the manifest, %d on disk (%v)", b.Key, b.Bytes, len(local), err)
		}
		a.URI, a.ETag, b.URI, b.ETag = "", "", "", ""
		if !reflect.DeepEqual(a, b) {
			t.Errorf("source local %+v\non S3 %+v", a, b)
		}
	}
	// Byte-identical shards: B's files downloaded, compared with A's.
	if len(mA.Files) != len(mB.Files) {
		t.Fatalf("%d files local, %d on S3", len(mA.Files), len(mB.Files))
	}
	for i, fa := range mA.Files {
		fb := mB.Files[i]
		if fa != fb {
			t.Errorf("file local %+v, on S3 %+v", fa, fb)
			continue
		}
		local, err := os.ReadFile(filepath.Join(dir, "datasets", "larkspur-aisles", "a", filepath.FromSlash(fa.Path)))
		if err != nil {
			t.Fatal(err)
		}
		if remote := s3Get(t, c, bucket, "datasets/larkspur-aisles/b/"+fb.Path); !bytes.Equal(local, remote) {
			t.Errorf("%s: %d bytes on S3 differ from the %d local", fa.Path, len(remote), len(local))
		}
	}
	// Without faults nothing is retried; the counts are reported.
	if r := s3Retries(t, outB); r != 0 {
		t.Errorf("%d retries in a fault-free run", r)
	}
	if r := s3LogRetries(t, errB); r != 0 {
		t.Errorf("storage log: %d retries in a fault-free run", r)
	}

	// A commit killed part way on S3 leaves a folder without manifest.json
	// (not a version, SPEC §4): here a shard of another run and two
	// multipart uploads it never finished, one of them the manifest. The
	// next commit of that version clears them: the folder then holds
	// exactly B's files and its manifest, and nothing is pending.
	ctx := context.Background()
	const folder = "datasets/larkspur-aisles/c/"
	if _, err := c.PutObject(ctx, &s3.PutObjectInput{Bucket: aws.String(bucket), Key: aws.String(folder + "pairs/split=train/part-99999.parquet"),
		Body: strings.NewReader("PAR1 of another run")}); err != nil {
		t.Fatal(err)
	}
	for _, key := range []string{folder + "manifest.json", folder + mB.Files[0].Path} {
		if _, err := c.CreateMultipartUpload(ctx, &s3.CreateMultipartUploadInput{Bucket: aws.String(bucket), Key: aws.String(key)}); err != nil {
			t.Fatal(err)
		}
	}
	s3MustRun(t, srv.SecretKey, "commit", "--config", cfgB, "--version", "c")
	mC := s3ParseManifest(t, s3Get(t, c, bucket, folder+"manifest.json"))
	want := []string{folder + "manifest.json"}
	for _, f := range mB.Files {
		want = append(want, folder+f.Path)
	}
	slices.Sort(want)
	if got := s3Keys(t, c, bucket, folder); !slices.Equal(got, want) {
		t.Errorf("version c holds %q, want exactly %q", got, want)
	}
	if mC.Digest != mB.Digest {
		t.Errorf("digest of the commit over leftovers %s, want %s", mC.Digest, mB.Digest)
	}
	pending, err := c.ListMultipartUploads(ctx, &s3.ListMultipartUploadsInput{Bucket: aws.String(bucket), Prefix: aws.String(folder)})
	if err != nil {
		t.Fatal(err)
	}
	if len(pending.Uploads) != 0 {
		t.Errorf("%d multipart uploads still pending under %s after the commit", len(pending.Uploads), folder)
	}
}

// ---------------------------------------------------------------------------
// A small corpus under faults

// s3CorpusYAML is the small corpus's config (SPEC §2); %s are the source,
// work and output locations and the storage section.
const s3CorpusYAML = `dataset: s3-faults
source:
  uri: %s
work: %s
output: %s
partitions: 2
seed: 11
embodiments:
  cart:
    obs: 3
    act: 1
    goal_dims: [0, 1]
    goal_tolerance: 0.1
episodes:
  max_gap: 500ms
  min_steps: 5
  max_steps: 30
goals:
  future: 2
  geometric: 1
  final: 1
  negative: 1
  gamma: 0.9
  horizon: 0
splits: {train: 0.6, val: 0.2, test: 0.2}
split_by: episode
float: float32
parquet:
  compression: zstd
  row_group_rows: 100
%s`

// s3WriteCorpus writes four small log objects under dir (one gzip, one a
// copy of another, one with a gap that splits its unit's episode).
func s3WriteCorpus(t *testing.T, dir string) {
	t.Helper()
	const t0 = int64(1764489600000000000)
	lines := func(unit string, n int, gapAt int) []byte {
		var b bytes.Buffer
		ts := t0
		for i := range n {
			ts += 100_000_000 // 100 ms
			if i == gapAt {
				ts += 2_000_000_000 // past max_gap: a new episode
			}
			x := float64(i) * 0.05
			fmt.Fprintf(&b, `{"unit":%q,"embodiment":"cart","t":%d,"obs":[%s,%s,%s],"act":[%s]}`+"\n", unit, ts,
				strconv.FormatFloat(x, 'g', -1, 64), strconv.FormatFloat(math.Sin(x), 'g', -1, 64),
				strconv.FormatFloat(float64(len(unit)), 'g', -1, 64), strconv.FormatFloat(math.Cos(x)/2, 'g', -1, 64))
		}
		return b.Bytes()
	}
	u1 := lines("u1", 70, -1)
	var gz bytes.Buffer
	zw := gzip.NewWriter(&gz)
	zw.Write(lines("u2", 60, -1))
	zw.Close()
	for name, data := range map[string][]byte{
		"u1.jsonl":          u1,
		"u1-copy.jsonl":     u1,
		"sub/u2.jsonl.gz":   gz.Bytes(),
		"sub/deep/u3.jsonl": lines("u3", 80, 35),
	} {
		p := filepath.Join(dir, filepath.FromSlash(name))
		if err := os.MkdirAll(filepath.Dir(p), 0o755); err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(p, data, 0o644); err != nil {
			t.Fatal(err)
		}
	}
}

func TestS3RunsUnderFaults(t *testing.T) {
	const bucket = "hc-runs"
	srv := s3test.Start(t, bucket)
	s3SetEnv(t, srv)
	c := srv.Client()
	fp := faultproxy.Start(t, srv.Endpoint)
	dir := t.TempDir()
	logs := filepath.Join(dir, "logs")
	s3WriteCorpus(t, logs)
	s3Upload(t, c, bucket, logs, "logs/")

	writeCfg := func(name, src, work, out, storage string) string {
		p := filepath.Join(dir, name+".yaml")
		if err := os.WriteFile(p, []byte(fmt.Sprintf(s3CorpusYAML, src, work, out, storage)), 0o644); err != nil {
			t.Fatal(err)
		}
		return p
	}
	s3Cfg := func(name, endpoint, extra string) string {
		return writeCfg(name, "s3://"+bucket+"/logs/", "s3://"+bucket+"/work-"+name+"/", "s3://"+bucket+"/out-"+name+"/",
			"storage:\n  endpoint: "+endpoint+"\n"+extra)
	}
	manifestOf := func(name, version string) *s3ManifestDoc {
		raw := s3Get(t, c, bucket, "out-"+name+"/s3-faults/"+version+"/manifest.json")
		s3NoSecret(t, srv.SecretKey, "the manifest", string(raw))
		return s3ParseManifest(t, raw)
	}

	// The fault-free digest: local, and on S3 (the same, SPEC §6).
	s3MustRun(t, srv.SecretKey, "run", "--config", writeCfg("local", "logs", "work", "out", ""), "--version", "v1", "--parallel", "2")
	rawLocal, err := os.ReadFile(filepath.Join(dir, "out", "s3-faults", "v1", "manifest.json"))
	if err != nil {
		t.Fatal(err)
	}
	want := s3ParseManifest(t, rawLocal)
	// Byte order of keys (SPEC §3.1): "sub/deep/…" < "sub/u2…" < "u1-copy…"
	// < "u1.jsonl" ('-' 0x2D < '.' 0x2E), so u1.jsonl is the duplicate.
	if len(want.Sources) != 4 || want.Sources[3].Key != "u1.jsonl" || want.Sources[3].DuplicateOf == nil ||
		*want.Sources[3].DuplicateOf != "u1-copy.jsonl" {
		t.Fatalf("corpus manifest sources %+v; want 4, u1.jsonl last as a duplicate of u1-copy.jsonl", want.Sources)
	}
	out, _ := s3MustRun(t, srv.SecretKey, "run", "--config", s3Cfg("clean", srv.Endpoint, ""), "--version", "v1", "--parallel", "2")
	if got := manifestOf("clean", "v1"); got.Digest != want.Digest {
		t.Errorf("fault-free S3 run: digest %s, local %s", got.Digest, want.Digest)
	}
	if r := s3Retries(t, out); r != 0 {
		t.Errorf("fault-free S3 run: %d retries", r)
	}

	// Each class: two faults on GETs (objects and lists) and two on PUTs,
	// after a few requests of each went through.
	for _, k := range []faultproxy.Kind{faultproxy.Status500, faultproxy.SlowDown503, faultproxy.Reset, faultproxy.CutBody, faultproxy.Delay} {
		t.Run(k.String(), func(t *testing.T) {
			name := strings.ToLower(k.String())
			extra := "  attempts: 6\n  timeout: 10s\n"
			if k == faultproxy.Delay {
				extra = "  attempts: 6\n  timeout: 1s\n" // the delay (4s) is past it
			}
			cfg := s3Cfg(name, fp.URL, extra)
			before := fp.Injected()[k]
			fp.Set(
				faultproxy.Rule{Kind: k, Method: "GET", Skip: 3, Times: 2, Delay: 4 * time.Second},
				faultproxy.Rule{Kind: k, Method: "PUT", Skip: 3, Times: 2, Delay: 4 * time.Second},
			)
			defer fp.Set()
			out, errOut := s3MustRun(t, srv.SecretKey, "run", "--config", cfg, "--version", "v1", "--parallel", "2")
			injected := fp.Injected()[k] - before
			if injected != 4 {
				t.Fatalf("%d faults injected, want 2 on GETs and 2 on PUTs", injected)
			}
			if got := manifestOf(name, "v1"); got.Digest != want.Digest {
				t.Errorf("digest %s under %v, want the fault-free %s", got.Digest, k, want.Digest)
			}
			// Every injected fault costs one retry, except on some GETs: a
			// GET that loses its reused connection before any response
			// (Reset) may be replayed by Go's transport itself (net/http
			// Transport retries idempotent requests), and the store never
			// sees it; a cut of a 404's error body (the probe of a not yet
			// written completion record) still gave the status, and a 404
			// is not retried. PUTs are neither replayed nor probes: the two
			// PUT faults always cost a retry each.
			minRetries := injected
			if k == faultproxy.Reset || k == faultproxy.CutBody {
				minRetries = 2
			}
			if r := s3Retries(t, out); r < minRetries {
				t.Errorf("summary: %d retries, want at least %d", r, minRetries)
			}
			if r := s3LogRetries(t, errOut); r < 1 {
				t.Errorf("storage log: %d retries, want at least 1", r)
			}
		})
	}

	t.Run("Persistent", func(t *testing.T) {
		// Every GET of one source object fails: the run fails naming it,
		// and publishes nothing.
		cfg := s3Cfg("persist", fp.URL, "  attempts: 3\n")
		before := fp.Injected()[faultproxy.Status500]
		fp.Set(faultproxy.Rule{Kind: faultproxy.Status500, Method: "GET", PathContains: "logs/sub/deep/u3.jsonl"})
		defer fp.Set()
		code, out, errOut := s3Run("run", "--config", cfg, "--version", "v1", "--parallel", "2")
		s3NoSecret(t, srv.SecretKey, "stdout", out)
		s3NoSecret(t, srv.SecretKey, "stderr", errOut)
		if code != exitRuntime {
			t.Fatalf("exit %d, want %d\nstderr:\n%s", code, exitRuntime, errOut)
		}
		if !strings.Contains(errOut, "s3://"+bucket+"/logs/sub/deep/u3.jsonl") {
			t.Errorf("stderr does not name the object:\n%s", errOut)
		}
		if got := fp.Injected()[faultproxy.Status500] - before; got < 3 {
			t.Errorf("%d faults injected, want at least attempts = 3", got)
		}
		for _, k := range s3Keys(t, c, bucket, "out-persist/") {
			if strings.HasSuffix(k, "manifest.json") {
				t.Errorf("a manifest was published: %s", k)
			}
		}
		_, err := c.HeadObject(context.Background(), &s3.HeadObjectInput{Bucket: aws.String(bucket), Key: aws.String("out-persist/s3-faults/v1/manifest.json")})
		var nf interface{ ErrorCode() string }
		if err == nil || !errors.As(err, &nf) || nf.ErrorCode() != "NotFound" {
			t.Errorf("HEAD of the version's manifest: %v, want NotFound", err)
		}
	})
}

// TestS3AbsoluteImageURIs: logs in a local folder whose camera frames are
// absolute s3:// URIs (SPEC §1 img), spread over one folder per episode, as
// camera uploaders often lay them out. Every frame whose object exists and
// is a valid PNG is kept; a missing key and a cut PNG are dropped with their
// reasons (image_missing, image_corrupt); the run reads them through the
// config's storage section, from the prefix source.image_roots names.
func TestS3AbsoluteImageURIs(t *testing.T) {
	const bucket = "hc-images"
	srv := s3test.Start(t, bucket)
	s3SetEnv(t, srv)
	c := srv.Client()
	ctx := context.Background()
	okPNG, err := os.ReadFile(filepath.Join("testdata", "ingest", "frames", "ok.png"))
	if err != nil {
		t.Fatal(err)
	}
	cutPNG, err := os.ReadFile(filepath.Join("testdata", "ingest", "frames", "cut.png"))
	if err != nil {
		t.Fatal(err)
	}
	dir := t.TempDir()
	var lines strings.Builder
	const units, steps = 6, 5
	for u := range units {
		for s := range steps {
			key := fmt.Sprintf("cams/u%d/ep%d/%03d.png", u, u, s)
			body := okPNG
			switch {
			case u == 0 && s == 2:
				body = nil // never uploaded: image_missing
			case u == 1 && s == 3:
				body = cutPNG // image_corrupt
			}
			if body != nil {
				if _, err := c.PutObject(ctx, &s3.PutObjectInput{Bucket: aws.String(bucket), Key: aws.String(key), Body: bytes.NewReader(body)}); err != nil {
					t.Fatal(err)
				}
			}
			fmt.Fprintf(&lines, `{"unit":"u%d","embodiment":"cart","t":%d,"obs":[%d,1],"img":{"front":"s3://%s/%s"}}`+"\n", u, 1000+s*100, s, bucket, key)
		}
	}
	if err := os.MkdirAll(filepath.Join(dir, "logs"), 0o755); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(dir, "logs", "a.jsonl"), []byte(lines.String()), 0o644); err != nil {
		t.Fatal(err)
	}
	cfg := filepath.Join(dir, "c.yaml")
	if err := os.WriteFile(cfg, []byte(`dataset: s3-images
source:
  uri: logs
  image_roots: ["s3://`+bucket+`/cams/"]
partitions: 2
embodiments:
  cart:
    obs: 2
    cameras: [front]
    goal_tolerance: 0.1
episodes: {max_gap: 1s, min_steps: 2, max_steps: 100}
goals: {future: 1, geometric: 0, final: 0, negative: 0}
storage:
  endpoint: `+srv.Endpoint+"\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	s3MustRun(t, srv.SecretKey, "run", "--config", cfg, "--version", "v1", "--parallel", "2")
	raw, err := os.ReadFile(filepath.Join(dir, "datasets", "s3-images", "v1", "manifest.json"))
	if err != nil {
		t.Fatal(err)
	}
	var m struct {
		Funnel struct {
			Lines, Frames, Episodes int64
			Dropped                 map[string]int64
		} `json:"funnel"`
	}
	if err := json.Unmarshal(raw, &m); err != nil {
		t.Fatal(err)
	}
	f := m.Funnel
	if f.Lines != units*steps || f.Frames != units*steps-2 || f.Episodes != units ||
		f.Dropped["image_missing"] != 1 || f.Dropped["image_corrupt"] != 1 {
		t.Errorf("funnel %+v; want %d lines, %d frames, %d episodes, 1 image_missing, 1 image_corrupt", f, units*steps, units*steps-2, units)
	}
}

// TestS3ObjectChangedSinceListing: an ingest item is keyed by the ETag the
// listing gave. An object overwritten between listing and reading with
// content of the same size (so only the ETag tells) fails its item, naming
// the object, instead of sealing other content under that key.
func TestS3ObjectChangedSinceListing(t *testing.T) {
	const bucket = "hc-changed"
	srv := s3test.Start(t, bucket)
	s3SetEnv(t, srv)
	ctx := context.Background()
	c := srv.Client()
	line := func(obs int) string {
		return fmt.Sprintf(`{"unit":"c1","embodiment":"cart","t":%d,"obs":[%d,1]}`+"\n", 1000+obs, obs)
	}
	put := func(body string) {
		if _, err := c.PutObject(ctx, &s3.PutObjectInput{Bucket: aws.String(bucket), Key: aws.String("logs/a.jsonl"), Body: strings.NewReader(body)}); err != nil {
			t.Fatal(err)
		}
	}
	put(line(1) + line(2))
	cfg, err := pipeline.ParseConfig([]byte(`dataset: changed
source: {uri: "s3://`+bucket+`/logs/"}
embodiments:
  cart: {obs: 2, goal_tolerance: 0.1}
storage: {endpoint: "`+srv.Endpoint+`"}
`), t.TempDir(), "c.yaml")
	if err != nil {
		t.Fatal(err)
	}
	src, err := (&pipeline.Opener{Storage: cfg.Storage}).Open(ctx, "s3://"+bucket+"/logs/")
	if err != nil {
		t.Fatal(err)
	}
	env := &pipeline.Env{Config: cfg, Source: src, Work: pipeline.NewLocalStore(t.TempDir())}
	objs, err := stages.ListSource(ctx, env)
	if err != nil || len(objs) != 1 {
		t.Fatalf("listing: %v, %v", objs, err)
	}
	put(line(3) + line(4)) // same size, other bytes
	_, err = stages.Ingest{}.Do(ctx, env, pipeline.Item{ID: "a.jsonl", Key: "k", Meta: objs[0]})
	if err == nil || !strings.Contains(err.Error(), "s3://"+bucket+"/logs/a.jsonl changed since it was listed (ETag ") {
		t.Fatalf("ingest of an object overwritten since listing: %v; want an error naming it and its ETag", err)
	}
	objs, err = stages.ListSource(ctx, env)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := (stages.Ingest{}).Do(ctx, env, pipeline.Item{ID: "a.jsonl", Key: "k2", Meta: objs[0]}); err != nil {
		t.Errorf("ingest after listing again: %v", err)
	}
}
