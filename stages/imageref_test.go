package stages

import (
	"bytes"
	"context"
	"encoding/base64"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strings"
	"sync/atomic"
	"syscall"
	"testing"
	"time"

	"github.com/aws/aws-sdk-go-v2/aws"
	"github.com/aws/aws-sdk-go-v2/service/s3"
	"github.com/parquet-go/parquet-go"
	"gopkg.in/yaml.v3"

	"hindcast/internal/s3test"
	"hindcast/pipeline"
)

// Image references are written by machines in the field (SPEC §1 `img`):
// each test here gives a run references that try to leave the source root
// and source.image_roots, and asserts that each is image_missing, with
// exact counts, and that the places the config names still read.

// withImageRoots adds source.image_roots to a test config (through the
// YAML node tree, like withLocations).
func withImageRoots(t *testing.T, cfgYAML string, roots ...string) string {
	t.Helper()
	var doc yaml.Node
	if err := yaml.Unmarshal([]byte(cfgYAML), &doc); err != nil || len(doc.Content) != 1 {
		t.Fatalf("test config is not a YAML map: %v\n%s", err, cfgYAML)
	}
	root := doc.Content[0]
	scalar := func(v string) *yaml.Node { return &yaml.Node{Kind: yaml.ScalarNode, Tag: "!!str", Value: v} }
	var source *yaml.Node
	for i := 0; i+1 < len(root.Content); i += 2 {
		if root.Content[i].Value == "source" {
			source = root.Content[i+1]
		}
	}
	if source == nil {
		source = &yaml.Node{Kind: yaml.MappingNode, Tag: "!!map"}
		root.Content = append(root.Content, scalar("source"), source)
	}
	list := &yaml.Node{Kind: yaml.SequenceNode, Tag: "!!seq"}
	for _, r := range roots {
		list.Content = append(list.Content, scalar(r))
	}
	source.Content = append(source.Content, scalar("image_roots"), list)
	b, err := yaml.Marshal(&doc)
	if err != nil {
		t.Fatalf("re-encode test config: %v", err)
	}
	return string(b)
}

// refConfig is the config of these tests: one embodiment with one camera,
// images bounded by maxBytes, Parquet uncompressed so that image bytes can
// be looked for in the shards. goals: one future goal per step, so pairs =
// frames − 1 for the single episode of unit r1.
func refConfig(maxBytes int) string {
	return fmt.Sprintf(`
dataset: image-refs
partitions: 1
source:
  max_image_bytes: %d
parquet: {compression: none}
embodiments:
  cam1:
    obs: 1
    cameras: [front]
    goal_tolerance: 0.1
episodes: {max_gap: 1h, min_steps: 2, max_steps: 100000}
goals: {future: 1, geometric: 0, final: 0, negative: 0}
splits: {train: 1}
`, maxBytes)
}

// refLines writes one line of unit r1 per reference, in time order.
func refLines(refs ...string) []byte {
	lines := make([]string, len(refs))
	for i, ref := range refs {
		img, _ := json.Marshal(map[string]string{"front": ref})
		lines[i] = fmt.Sprintf(`{"unit":"r1","embodiment":"cam1","t":%d,"obs":[%d],"img":%s}`, 1000*(i+1), i, img)
	}
	return jsonLines(lines...)
}

// refDirs is the layout of a test: dir/src is the source root, holding
// frames/ok.png; dir/outside holds secret.jpg, a valid JPEG that no
// reference may reach (were it read, its line would be kept).
type refDirs struct {
	dir, src, outside string
	ok, secret        []byte
}

func newRefDirs(t *testing.T) refDirs {
	t.Helper()
	imgs := fixtureImages(t)
	d := refDirs{dir: t.TempDir(), ok: imgs["frames/ok.png"], secret: imgs["frames/ok.jpg"]}
	d.src, d.outside = filepath.Join(d.dir, "src"), filepath.Join(d.dir, "outside")
	writeTree(t, d.src, map[string][]byte{"frames/ok.png": d.ok})
	writeTree(t, d.outside, map[string][]byte{"secret.jpg": d.secret})
	return d
}

// fileURI is the file:// URI of a local path.
func fileURI(p string) string { return "file://" + filepath.ToSlash(p) }

// runRefs runs cfgYAML (locations: dir/src, dir/work, dir/out, or as
// text already says) with the log objects files written under dir/src.
// The run is given a deadline and the test waits a little longer, so a
// reference that hangs the run fails the test instead of stalling it.
func runRefs(t *testing.T, dir string, cfgText []byte, files map[string][]byte) *pipelineRun {
	t.Helper()
	writeTree(t, filepath.Join(dir, "src"), files)
	cfg, err := pipeline.ParseConfig(cfgText, dir, "c.yaml")
	if err != nil {
		t.Fatalf("config:\n%s\nerror: %v", cfgText, err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
	defer cancel()
	type result struct {
		m   *pipeline.Manifest
		err error
	}
	done := make(chan result, 1)
	go func() {
		m, err := pipeline.Execute(ctx, cfg, All(), pipeline.Options{Version: "v1", Parallel: 2})
		done <- result{m, err}
	}()
	select {
	case r := <-done:
		if r.err != nil {
			t.Fatalf("run: %v", r.err)
		}
		return &pipelineRun{Manifest: r.m, Config: cfg, Source: filepath.Join(dir, "src"),
			Version: filepath.Join(dir, "out", cfg.Dataset, "v1")}
	case <-time.After(90 * time.Second):
		t.Fatalf("the run did not end within 90 s (it was cancelled at 60 s): a reference hung it")
	}
	return nil
}

// runLocalRefs is runRefs over the source folder of d.
func runLocalRefs(t *testing.T, d refDirs, cfgYAML string, refs ...string) *pipelineRun {
	t.Helper()
	return runRefs(t, d.dir, withLocations(t, cfgYAML, "src", "work", "out"), map[string][]byte{"a.jsonl": refLines(refs...)})
}

// wantRefCounts asserts the counts of a.jsonl: kept lines, and every
// other line image_missing; the kept frames make one episode.
func wantRefCounts(t *testing.T, r *pipelineRun, lines, kept int64) {
	t.Helper()
	dropped := map[string]int64{pipeline.ImageMissing: lines - kept}
	wantSource(t, r.Manifest, "a.jsonl", lines, kept, dropped)
	wantFunnel(t, r.Manifest, funnelOf(1, 0, []srcWant{{"a.jsonl", lines, kept, dropped}}, kept, 1, kept-1))
}

// frameImages reads the front camera's bytes of every committed frame.
func frameImages(t *testing.T, r *pipelineRun) [][]byte {
	t.Helper()
	type row struct {
		Img []byte `parquet:"img_front,optional"`
	}
	var out [][]byte
	for _, f := range r.Manifest.Files {
		if f.Table != "frames" {
			continue
		}
		rows, err := parquet.ReadFile[row](filepath.Join(r.Version, filepath.FromSlash(f.Path)))
		if err != nil {
			t.Fatalf("read %s: %v", f.Path, err)
		}
		for _, x := range rows {
			out = append(out, x.Img)
		}
	}
	return out
}

// wantOnlyImages asserts that every committed frame holds want's bytes,
// n frames in all, and that no file of the version holds secret's bytes
// anywhere (the shards are uncompressed, so the bytes would show as
// written).
func wantOnlyImages(t *testing.T, r *pipelineRun, want []byte, n int, secret []byte) {
	t.Helper()
	imgs := frameImages(t, r)
	if len(imgs) != n {
		t.Errorf("%d frames in the shards, want %d", len(imgs), n)
	}
	for i, b := range imgs {
		if !bytes.Equal(b, want) {
			t.Errorf("frame %d: image of %d bytes, want the %d bytes of the allowed image", i, len(b), len(want))
		}
	}
	seen := false
	err := filepath.WalkDir(r.Version, func(p string, e os.DirEntry, err error) error {
		if err != nil || e.IsDir() {
			return err
		}
		b, err := os.ReadFile(p)
		if err != nil {
			return err
		}
		if bytes.Contains(b, secret) {
			t.Errorf("%s holds the outside file's bytes", p)
		}
		seen = seen || bytes.Contains(b, want)
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	if !seen && n > 0 {
		t.Errorf("no file of the version holds the allowed image's bytes as written: the search for the outside bytes proves nothing")
	}
}

// TestImageRefSymlinkOutOfRoot: links inside the source root that lead
// out of it (to a file, and through a linked folder) are image_missing,
// by a relative key and by a file:// URI; a relative link that stays
// inside is followed (SPEC §1: symbolic links are resolved before the
// comparison), an absolute one is refused.
func TestImageRefSymlinkOutOfRoot(t *testing.T) {
	d := newRefDirs(t)
	for link, target := range map[string]string{
		"frames/leak.jpg":     filepath.Join(d.outside, "secret.jpg"),
		"frames/out":          d.outside,
		"frames/alias.png":    "ok.png",
		"frames/absalias.png": filepath.Join(d.src, "frames", "ok.png"),
		"frames/rel.jpg":      "../../outside/secret.jpg",
	} {
		if err := os.Symlink(target, filepath.Join(d.src, filepath.FromSlash(link))); err != nil {
			t.Fatal(err)
		}
	}
	r := runLocalRefs(t, d, refConfig(1<<20),
		"frames/ok.png", // 1 kept
		"frames/leak.jpg",
		"frames/out/secret.jpg",
		"frames/rel.jpg",
		fileURI(d.src)+"/frames/leak.jpg",
		fileURI(d.src)+"/frames/out/secret.jpg",
		"frames/alias.png",                 // 7 kept: the link stays inside
		fileURI(d.src)+"/frames/alias.png", // 8 kept
		// 9 image_missing: an absolute link is refused even when it
		// points inside (os.Root cannot tell where it leads without
		// leaving the root).
		"frames/absalias.png",
	)
	wantRefCounts(t, r, 9, 3)
	wantOnlyImages(t, r, d.ok, 3, d.secret)
}

// TestImageRefFileURISpellings: every spelling of a file URI that names a
// file outside the allowed roots is image_missing — a plain absolute URI,
// the scheme in capitals (RFC 3986 §3.1), the host "localhost" (RFC 8089
// §2), dot segments and their percent-escaped forms (RFC 3986 §2.1,
// §5.2.4), an escaped "/" — and the same spellings of a file inside the
// source root are read.
func TestImageRefFileURISpellings(t *testing.T) {
	d := newRefDirs(t)
	out := filepath.ToSlash(d.outside) + "/secret.jpg"
	src := filepath.ToSlash(d.src)
	r := runLocalRefs(t, d, refConfig(1<<20),
		"file://"+out,
		"FILE://"+out,
		"File://"+out,
		"file://localhost"+out,
		"file://LOCALHOST"+out,
		"file://"+src+"/../outside/secret.jpg",
		"file://"+src+"/%2e%2e/outside/secret.jpg",
		"file://"+src+"/%2E%2E/outside/secret.jpg",
		"file://"+src+"/frames%2F..%2F..%2Foutside%2Fsecret.jpg",
		"file://"+src+"%2F..%2Foutside/secret.jpg",
		"file://"+strings.ReplaceAll(out, "/", "%2F"),
		"file://otherhost"+out,
		"../outside/secret.jpg",
		"%2e%2e/outside/secret.jpg",
		"frames/%2e%2e/%2e%2e/outside/secret.jpg",
		"/"+strings.TrimPrefix(out, "/"),
		"file://"+src+"/frames/ok.png",           // 17 kept
		"FILE://"+src+"/frames/ok.png",           // 18 kept
		"file://localhost"+src+"/frames/ok.png",  // 19 kept
		"file://"+src+"/frames/%6Fk.png",         // 20 kept: %6F is "o"
		"file://"+src+"/frames/../frames/ok.png", // 21 kept: stays inside
		"frames/ok.png",                          // 22 kept
		"./frames/ok.png",                        // 23 kept
	)
	wantRefCounts(t, r, 23, 7)
	wantOnlyImages(t, r, d.ok, 7, d.secret)
}

// TestImageRefImageRoots: a folder named in source.image_roots is read,
// byte for byte; a path that leaves it by dot segments, or a folder whose
// name only starts like it, is image_missing.
func TestImageRefImageRoots(t *testing.T) {
	d := newRefDirs(t)
	cams := filepath.Join(d.dir, "cams")
	writeTree(t, cams, map[string][]byte{"front/001.jpg": d.secret})
	writeTree(t, cams+"2", map[string][]byte{"front/001.jpg": d.secret})
	cfg := withImageRoots(t, refConfig(1<<20), fileURI(cams))
	r := runLocalRefs(t, d, cfg,
		fileURI(cams)+"/front/001.jpg",                                   // 1 kept
		"FILE://localhost"+filepath.ToSlash(cams)+"/front/%30%30%31.jpg", // 2 kept
		fileURI(cams)+"/../outside/secret.jpg",
		fileURI(cams)+"2/front/001.jpg",
		fileURI(cams)+"/front/001.jpg", // 5 kept
	)
	wantRefCounts(t, r, 5, 3)
	wantOnlyImages(t, r, d.secret, 3, d.ok)
}

// stubProgress counts the image bytes the fetcher reports.
type stubProgress struct{ image atomic.Int64 }

func (*stubProgress) StageStart(string, int, int64) {}
func (*stubProgress) Advance(string, int64, int64)  {}
func (*stubProgress) ItemDone(string, bool)         {}
func (*stubProgress) StageEnd(string)               {}
func (p *stubProgress) ImageRead(n int64)           { p.image.Add(n) }

// fetcherEnv is the environment of a fetcher over the local source
// folder src: a metered source store and a progress that counts image
// bytes; a store opened for an absolute URI must come from resolve.
func fetcherEnv(src string, maxBytes int64, resolve func(context.Context, string) (pipeline.Store, error), roots ...string) (*pipeline.Env, *pipeline.Metrics, *stubProgress) {
	m, p := &pipeline.Metrics{}, &stubProgress{}
	env := &pipeline.Env{
		Config:   &pipeline.Config{Source: pipeline.SourceConfig{MaxImageBytes: maxBytes, ImageRoots: roots}},
		Source:   pipeline.Metered{Store: pipeline.NewLocalStore(src), M: m},
		Progress: p,
		Resolve:  resolve,
	}
	return env, m, p
}

// TestImageRefS3FromLocalSource: on a local source, s3:// references name
// no allowed root unless an s3:// image root holds them, and are refused
// without opening any store (no request, no credentials used); a
// reference under an s3:// image root is read through that root's store.
func TestImageRefS3FromLocalSource(t *testing.T) {
	d := newRefDirs(t)
	camStore := t.TempDir()
	writeTree(t, camStore, map[string][]byte{"front/001.jpg": d.secret})
	var opened []string
	resolve := func(_ context.Context, uri string) (pipeline.Store, error) {
		opened = append(opened, uri)
		if uri != "s3://fleet-cams/front-cams/" {
			return nil, fmt.Errorf("store %s must not be opened", uri)
		}
		return pipeline.NewLocalStore(camStore), nil
	}
	env, _, _ := fetcherEnv(d.src, 1<<20, resolve, "s3://fleet-cams/front-cams/")
	fe := newImageFetcher(env)
	defer fe.close()
	ctx := context.Background()
	for _, ref := range []string{
		"s3://other-bucket/front/001.jpg",
		"S3://other-bucket/front/001.jpg",
		"s3://fleet-cams/front/001.jpg",
		"s3://fleet-cams/front-cams",
		"s3://fleet-cams/front-cams/",
		"s3://fleet-cams/front-camsX/front/001.jpg",
		"s3://fleet-cams/front-cams/../secret.jpg",
		"s3://fleet-cams/front-cams/%2e%2e/secret.jpg",
		"s3://Fleet-Cams/front-cams/front/001.jpg",
	} {
		if b, err := fe.fetch(ctx, ref); !errors.Is(err, errOutside) {
			t.Errorf("fetch %s: %d bytes, error %v; want refused as outside", ref, len(b), err)
		}
	}
	if len(opened) != 0 {
		t.Errorf("stores opened for refused references: %v", opened)
	}
	for _, ref := range []string{"s3://fleet-cams/front-cams/front/001.jpg", "S3://fleet-cams/front-cams/front/001.jpg"} {
		b, err := fe.fetch(ctx, ref)
		if err != nil || !bytes.Equal(b, d.secret) {
			t.Errorf("fetch %s: %d bytes, error %v; want the %d bytes under the image root", ref, len(b), err, len(d.secret))
		}
	}
	if len(opened) != 1 {
		t.Errorf("stores opened %v, want the image root's once", opened)
	}

	// Through the whole run: with no storage section, a request would
	// fail the run rather than drop the line.
	r := runLocalRefs(t, d, refConfig(1<<20),
		"frames/ok.png",
		"s3://other-bucket/secret.jpg",
		"S3://other-bucket/secret.jpg",
		"s3://ab/secret.jpg",
		"frames/ok.png",
	)
	wantRefCounts(t, r, 5, 2)
}

// setS3Env points the AWS SDK at srv's credentials and at nothing else
// (no profile, no metadata service), as the other S3 tests do.
func setS3Env(t *testing.T, srv *s3test.Server) {
	none := filepath.Join(t.TempDir(), "none")
	for k, v := range map[string]string{
		"AWS_ACCESS_KEY_ID": srv.AccessKey, "AWS_SECRET_ACCESS_KEY": srv.SecretKey, "AWS_REGION": srv.Region,
		"AWS_SESSION_TOKEN": "", "AWS_PROFILE": "", "AWS_ENDPOINT_URL": "", "AWS_ENDPOINT_URL_S3": "",
		"AWS_EC2_METADATA_DISABLED": "true", "AWS_CONFIG_FILE": none, "AWS_SHARED_CREDENTIALS_FILE": none,
	} {
		t.Setenv(k, v)
	}
}

// TestImageRefOtherBucketOnS3: on an S3 source (a local S3 server,
// versitygw), a reference to another bucket, or to the source bucket
// outside the source prefix, is image_missing though the run's
// credentials could read both; the source prefix is read.
func TestImageRefOtherBucketOnS3(t *testing.T) {
	const bucket, other = "hc-refs", "hc-other"
	srv := s3test.Start(t, bucket, other)
	setS3Env(t, srv)
	d := newRefDirs(t)
	client := srv.Client()
	ctx := context.Background()
	put := func(b, key string, body []byte) {
		if _, err := client.PutObject(ctx, &s3.PutObjectInput{Bucket: aws.String(b), Key: aws.String(key), Body: bytes.NewReader(body)}); err != nil {
			t.Fatalf("upload s3://%s/%s: %v", b, key, err)
		}
	}
	put(bucket, "src/a.jsonl", refLines(
		"frames/ok.png", // 1 kept
		"s3://"+other+"/secret.jpg",
		"s3://"+bucket+"/private/secret.jpg",
		"../private/secret.jpg",
		"s3://"+bucket+"/src/../private/secret.jpg",
		"s3://"+bucket+"/src/%2e%2e/private/secret.jpg",
		"file://"+filepath.ToSlash(d.outside)+"/secret.jpg",
		"s3://"+bucket+"/src/frames/ok.png", // 8 kept
		"S3://"+bucket+"/src/frames/ok.png", // 9 kept
	))
	put(bucket, "src/frames/ok.png", d.ok)
	put(bucket, "private/secret.jpg", d.secret)
	put(other, "secret.jpg", d.secret)
	text := withLocations(t, refConfig(1<<20), "s3://"+bucket+"/src/", "work", "out")
	text = append(text, []byte("storage:\n  endpoint: "+srv.Endpoint+"\n")...)
	r := runRefs(t, d.dir, text, nil)
	wantRefCounts(t, r, 9, 3)
	wantOnlyImages(t, r, d.ok, 3, d.secret)
}

// TestImageRefDevice: /dev/zero is outside every root and refused before
// anything is opened; named through an image root of /dev/, it is a
// character device, refused by its kind before a byte is read. 200 such
// references read 0 bytes (before: 12.8 GB).
func TestImageRefDevice(t *testing.T) {
	d := newRefDirs(t)
	env, m, p := fetcherEnv(d.src, 16<<20, nil, "file:///dev/")
	fe := newImageFetcher(env)
	defer fe.close()
	ctx := context.Background()
	if _, err := fe.fetch(ctx, "file:///dev/zero"); !errors.Is(err, errNotRegular) {
		t.Errorf("fetch file:///dev/zero under the image root file:///dev/: %v, want refused as not a regular file", err)
	}
	bare, _, _ := fetcherEnv(d.src, 16<<20, nil)
	fb := newImageFetcher(bare)
	defer fb.close()
	if _, err := fb.fetch(ctx, "file:///dev/zero"); !errors.Is(err, errOutside) {
		t.Errorf("fetch file:///dev/zero: %v, want refused as outside", err)
	}
	if n, k := m.BytesRead.Load(), p.image.Load(); n != 0 || k != 0 {
		t.Errorf("read %d bytes (progress %d), want 0", n, k)
	}

	refs := []string{"frames/ok.png", "frames/ok.png"}
	for range 100 {
		refs = append(refs, "file:///dev/zero", "file://localhost/dev/zero")
	}
	r := runLocalRefs(t, d, withImageRoots(t, refConfig(16<<20), "file:///dev/"), refs...)
	wantRefCounts(t, r, 202, 2)
	r = runLocalRefs(t, newRefDirs(t), refConfig(16<<20), refs...)
	wantRefCounts(t, r, 202, 2)
}

// TestImageRefFIFO: a FIFO in the source root (no writer ever opens it) is
// image_missing, by key and by URI, and does not hang the run: the run has
// a deadline and the test fails if it is not over soon after.
func TestImageRefFIFO(t *testing.T) {
	d := newRefDirs(t)
	fifo := filepath.Join(d.src, "frames", "cam.fifo")
	if err := syscall.Mkfifo(fifo, 0o644); err != nil {
		t.Fatalf("mkfifo: %v", err)
	}
	if err := os.Symlink("cam.fifo", filepath.Join(d.src, "frames", "link.png")); err != nil {
		t.Fatal(err)
	}
	env, m, _ := fetcherEnv(d.src, 16<<20, nil)
	fe := newImageFetcher(env)
	defer fe.close()
	done := make(chan error, 1)
	go func() {
		_, err := fe.fetch(context.Background(), "frames/cam.fifo")
		done <- err
	}()
	select {
	case err := <-done:
		if !errors.Is(err, errNotRegular) {
			t.Errorf("fetch of a FIFO: %v, want refused as not a regular file", err)
		}
	case <-time.After(20 * time.Second):
		t.Fatalf("fetch of a FIFO still blocked after 20 s")
	}
	if n := m.BytesRead.Load(); n != 0 {
		t.Errorf("read %d bytes from a FIFO", n)
	}
	r := runLocalRefs(t, d, refConfig(16<<20),
		"frames/ok.png",
		"frames/cam.fifo",
		fileURI(fifo),
		"frames/link.png",
		"frames/ok.png",
	)
	wantRefCounts(t, r, 5, 2)
}

// TestImageRefFolder: a folder is no image.
func TestImageRefFolder(t *testing.T) {
	d := newRefDirs(t)
	env, _, _ := fetcherEnv(d.src, 16<<20, nil)
	fe := newImageFetcher(env)
	defer fe.close()
	if _, err := fe.fetch(context.Background(), "frames"); !errors.Is(err, errNotRegular) {
		t.Errorf("fetch of a folder: %v, want refused as not a regular file", err)
	}
}

// TestImageRefMaxBytes: an image of exactly source.max_image_bytes is
// read, one byte more is image_missing — as a file and as a data URI
// (RFC 2397), whose decoded bytes count.
func TestImageRefMaxBytes(t *testing.T) {
	d := newRefDirs(t)
	big := append(bytes.Clone(d.ok), 0)
	writeTree(t, d.src, map[string][]byte{"frames/big.png": big})
	data := func(b []byte) string { return "data:image/png;base64," + base64.StdEncoding.EncodeToString(b) }
	r := runLocalRefs(t, d, refConfig(len(d.ok)),
		"frames/ok.png", // 1 kept
		"frames/big.png",
		data(d.ok), // 3 kept
		data(big),
		fileURI(d.src)+"/frames/big.png",
		"frames/ok.png", // 6 kept
	)
	wantRefCounts(t, r, 6, 3)
	wantOnlyImages(t, r, d.ok, 3, d.secret)

	// The fetcher stops at max+1 bytes of a stream without a size.
	env, _, _ := fetcherEnv(d.src, 10, nil)
	fe := newImageFetcher(env)
	defer fe.close()
	var n countingReader
	n.r = io.LimitReader(zeros{}, 1<<30)
	if _, err := fe.readBounded(&n, 0); !errors.Is(err, errTooLarge) {
		t.Errorf("read of an endless stream: %v, want too large", err)
	}
	if n.n != 11 {
		t.Errorf("read %d bytes of an endless stream with max_image_bytes 10, want 11", n.n)
	}
}

type zeros struct{}

func (zeros) Read(p []byte) (int, error) { clear(p); return len(p), nil }

type countingReader struct {
	r io.Reader
	n int64
}

func (c *countingReader) Read(p []byte) (int, error) {
	n, err := c.r.Read(p)
	c.n += int64(n)
	return n, err
}

// TestImageRefResolve pins where each reference form resolves: the root
// and key, or the refusal.
func TestImageRefResolve(t *testing.T) {
	env, _, _ := fetcherEnv("/data/fleet", 16, nil, "file:///mnt/cams/", "s3://fleet-cams/front/")
	fe := newImageFetcher(env)
	defer fe.close()
	for _, c := range []struct{ ref, root, key string }{
		{"a/b.png", "file:///data/fleet/", "a/b.png"},
		{"a%20b.png", "file:///data/fleet/", "a%20b.png"},     // keys are taken as written
		{"./a/./b.png", "file:///data/fleet/", "./a/./b.png"}, // "." stays where it is
		{"file:///data/fleet/a/b.png", "file:///data/fleet/", "a/b.png"},
		{"FILE://LocalHost/data/fleet/a%20b.png", "file:///data/fleet/", "a b.png"},
		{"file:///data/fleet/x/../a.png", "file:///data/fleet/", "a.png"},
		{"file:///mnt/cams/1.jpg", "file:///mnt/cams/", "1.jpg"},
		{"file:///mnt//cams/./1.jpg", "file:///mnt/cams/", "1.jpg"},
		{"s3://fleet-cams/front/1.jpg", "s3://fleet-cams/front/", "1.jpg"},
		{"s3://fleet-cams/front/a%20b.jpg", "s3://fleet-cams/front/", "a%20b.jpg"},
	} {
		root, key, err := fe.resolve(c.ref)
		if err != nil || root.uri != c.root || key != c.key {
			var uri string
			if root != nil {
				uri = root.uri
			}
			t.Errorf("resolve %q: root %q key %q error %v; want root %q key %q", c.ref, uri, key, err, c.root, c.key)
		}
	}
	for _, ref := range []string{
		"", "/etc/passwd", "../x", "a/../../x", "a/../b", "%2e%2e/x", "a/%2E%2E/x", "%2Fetc/passwd",
		"file:///etc/passwd", "file:///data/fleet", "file:///data/fleet/", "file:///data/fleetX/a.png",
		"file:///data/fleet/../x.png", "file:///data/fleet/%2e%2e/x.png", "file:///data%2Ffleet%2F..%2Fx.png",
		"file://host/data/fleet/a.png", "file:///data/fleet/a%00.png", "file:///data/fleet/a.png?x", "file:///data/fleet/a.png#x",
		"file:///mnt/cams/../x", "file:///mnt/camsX/1.jpg",
		"s3://fleet-cams/back/1.jpg", "s3://other/front/1.jpg", "s3://fleet-cams/front/", "s3://fleet-cams/front/../x",
		"http://cams.example/1.jpg", "cam://front/1.jpg",
	} {
		if root, key, err := fe.resolve(ref); !errors.Is(err, errBadRef) {
			t.Errorf("resolve %q: root %v key %q error %v; want refused", ref, root, key, err)
		}
	}
}

// TestImageRefCountsBytes: an image read from a local folder, which no
// metered store passes, still counts in the run's bytes read and in the
// progress display's image bytes.
func TestImageRefCountsBytes(t *testing.T) {
	d := newRefDirs(t)
	env, m, p := fetcherEnv(d.src, 16<<20, nil, fileURI(d.outside)+"/")
	fe := newImageFetcher(env)
	defer fe.close()
	for _, ref := range []string{"frames/ok.png", fileURI(d.outside) + "/secret.jpg"} {
		if _, err := fe.fetch(context.Background(), ref); err != nil {
			t.Fatalf("fetch %s: %v", ref, err)
		}
	}
	want := int64(len(d.ok) + len(d.secret))
	if n, k := m.BytesRead.Load(), p.image.Load(); n != want || k != want {
		t.Errorf("bytes read %d, progress %d; want %d for both", n, k, want)
	}
}
