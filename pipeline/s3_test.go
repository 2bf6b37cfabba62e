package pipeline

// Tests of the S3 store against a real S3 server (versitygw, through
// internal/s3test), some of them through a fault-injecting proxy
// (internal/faultproxy). Between the proxy and the server sits a recorder
// written here: it sees every request that reaches the server (headers
// included, which the proxy does not expose) and can hold UploadPart
// requests to make their concurrency observable.
//
//	store ──► faultproxy ──► recorder ──► versitygw
//
// The expected values are computed here by hand or with independent code
// (crypto/sha256 over the bytes written, the aws-sdk-go-v2 client used
// directly), never taken from the store's own output.

import (
	"bytes"
	"context"
	"crypto/sha256"
	"errors"
	"fmt"
	"io"
	"log"
	"math/rand/v2"
	"net/http"
	"net/http/httptest"
	"net/http/httputil"
	"net/url"
	"path/filepath"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/aws/aws-sdk-go-v2/aws"
	"github.com/aws/aws-sdk-go-v2/service/s3"
	"golang.org/x/sync/errgroup"

	"hindcast/internal/faultproxy"
	"hindcast/internal/s3test"
)

// ---------------------------------------------------------------------------
// Rig: server, recorder, fault proxy

// s3Seen is one request as it reached the server.
type s3Seen struct {
	Method, Path, Query string
	Range, IfMatch      string
	IfNoneMatch         string
	ContentLength       int64
}

// s3Recorder is a reverse proxy that records the requests it forwards. It
// keeps the Host header the client signed (SigV4 covers Host), as the fault
// proxy does.
type s3Recorder struct {
	URL string

	mu       sync.Mutex
	seen     []s3Seen
	parts    int           // UploadPart requests in flight
	maxParts int           // most UploadPart requests in flight at once
	hold     time.Duration // how long each UploadPart is held before it is forwarded
}

func startS3Recorder(t *testing.T, target string) *s3Recorder {
	t.Helper()
	u, err := url.Parse(target)
	if err != nil {
		t.Fatal(err)
	}
	rec := &s3Recorder{}
	quiet := log.New(io.Discard, "", 0)
	rp := &httputil.ReverseProxy{
		Rewrite: func(pr *httputil.ProxyRequest) {
			pr.Out.URL.Scheme = u.Scheme
			pr.Out.URL.Host = u.Host
			pr.Out.Host = pr.In.Host
		},
		FlushInterval: -1,
		ErrorLog:      quiet,
	}
	srv := httptest.NewUnstartedServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		part := r.Method == http.MethodPut && strings.Contains(r.URL.RawQuery, "partNumber=")
		rec.mu.Lock()
		rec.seen = append(rec.seen, s3Seen{
			Method: r.Method, Path: r.URL.Path, Query: r.URL.RawQuery,
			Range: r.Header.Get("Range"), IfMatch: r.Header.Get("If-Match"), IfNoneMatch: r.Header.Get("If-None-Match"),
			ContentLength: r.ContentLength,
		})
		hold := rec.hold
		if part {
			rec.parts++
			rec.maxParts = max(rec.maxParts, rec.parts)
		}
		rec.mu.Unlock()
		if part {
			defer func() {
				rec.mu.Lock()
				rec.parts--
				rec.mu.Unlock()
			}()
			if hold > 0 {
				select {
				case <-time.After(hold):
				case <-r.Context().Done():
					return
				}
			}
		}
		rp.ServeHTTP(w, r)
	}))
	srv.Config.ErrorLog = quiet
	srv.Start()
	t.Cleanup(srv.Close)
	rec.URL = srv.URL
	return rec
}

// reset forgets what was recorded and sets the UploadPart hold.
func (r *s3Recorder) reset(hold time.Duration) {
	r.mu.Lock()
	defer r.mu.Unlock()
	r.seen, r.parts, r.maxParts, r.hold = nil, 0, 0, hold
}

// requests returns the recorded requests that match.
func (r *s3Recorder) requests(match func(s3Seen) bool) []s3Seen {
	r.mu.Lock()
	defer r.mu.Unlock()
	var out []s3Seen
	for _, s := range r.seen {
		if match(s) {
			out = append(out, s)
		}
	}
	return out
}

func (r *s3Recorder) maxConcurrentParts() int {
	r.mu.Lock()
	defer r.mu.Unlock()
	return r.maxParts
}

// s3Rig is one server with a recorder and a fault proxy in front of it.
type s3Rig struct {
	srv    *s3test.Server
	rec    *s3Recorder
	fp     *faultproxy.Proxy
	bucket string
	direct *s3.Client // straight to the server, for set-up and inspection
}

// newS3Rig starts the server with one bucket and sets the SDK's standard
// credential chain to its keys through the environment (t.Setenv: the
// tests of this file are not parallel).
func newS3Rig(t *testing.T, bucket string) *s3Rig {
	t.Helper()
	srv := s3test.Start(t, bucket)
	setS3Env(t, srv.AccessKey, srv.SecretKey, srv.Region)
	rec := startS3Recorder(t, srv.Endpoint)
	fp := faultproxy.Start(t, rec.URL)
	return &s3Rig{srv: srv, rec: rec, fp: fp, bucket: bucket, direct: srv.Client()}
}

// setS3Env points the SDK's default chain at the given keys only: no
// session token, profile, shared files, instance metadata or endpoint
// override from the developer's environment.
func setS3Env(t *testing.T, access, secret, region string) {
	t.Helper()
	none := filepath.Join(t.TempDir(), "none")
	for k, v := range map[string]string{
		"AWS_ACCESS_KEY_ID":           access,
		"AWS_SECRET_ACCESS_KEY":       secret,
		"AWS_REGION":                  region,
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

// store opens s3://bucket/prefix through the fault proxy with fresh metrics.
func (r *s3Rig) store(t *testing.T, prefix string, opt StorageConfig) (*S3Store, *Metrics) {
	t.Helper()
	r.fp.Set()
	opt.Endpoint = r.fp.URL
	m := &Metrics{}
	s, err := NewS3Store(context.Background(), "s3://"+r.bucket+"/"+prefix, opt, m)
	if err != nil {
		t.Fatal(err)
	}
	return s, m
}

// put writes an object with the direct client.
func (r *s3Rig) put(t *testing.T, key string, data []byte) {
	t.Helper()
	_, err := r.direct.PutObject(context.Background(), &s3.PutObjectInput{
		Bucket: aws.String(r.bucket), Key: aws.String(key), Body: bytes.NewReader(data)})
	if err != nil {
		t.Fatalf("put %s: %v", key, err)
	}
}

// get reads an object with the direct client.
func (r *s3Rig) get(t *testing.T, key string) []byte {
	t.Helper()
	out, err := r.direct.GetObject(context.Background(), &s3.GetObjectInput{Bucket: aws.String(r.bucket), Key: aws.String(key)})
	if err != nil {
		t.Fatalf("get %s: %v", key, err)
	}
	defer out.Body.Close()
	b, err := io.ReadAll(out.Body)
	if err != nil {
		t.Fatalf("get %s: %v", key, err)
	}
	return b
}

// pendingUploads lists the bucket's unfinished multipart uploads.
func (r *s3Rig) pendingUploads(t *testing.T) []string {
	t.Helper()
	out, err := r.direct.ListMultipartUploads(context.Background(), &s3.ListMultipartUploadsInput{Bucket: aws.String(r.bucket)})
	if err != nil {
		t.Fatalf("list multipart uploads: %v", err)
	}
	var keys []string
	for _, u := range out.Uploads {
		keys = append(keys, aws.ToString(u.Key)+" "+aws.ToString(u.UploadId))
	}
	return keys
}

// noSecret fails the test if an error's text carries a secret key.
func (r *s3Rig) noSecret(t *testing.T, err error, secrets ...string) {
	t.Helper()
	if err == nil {
		return
	}
	for _, s := range append(secrets, r.srv.SecretKey) {
		if strings.Contains(err.Error(), s) {
			t.Errorf("error text carries a secret key: %v", err)
		}
	}
}

// s3Bytes returns n reproducible pseudo-random bytes.
func s3Bytes(seed uint64, n int) []byte {
	rng := rand.New(rand.NewPCG(seed, 0x5eed))
	b := make([]byte, n)
	for i := range b {
		b[i] = byte(rng.Uint32())
	}
	return b
}

func s3ReadAll(t *testing.T, s Store, key string, offset int64) ([]byte, error) {
	t.Helper()
	rc, err := s.Open(context.Background(), key, offset)
	if err != nil {
		return nil, err
	}
	defer rc.Close()
	return io.ReadAll(rc)
}

func s3ListKeys(s Store, prefix string) ([]string, []ObjectInfo, error) {
	var keys []string
	var infos []ObjectInfo
	err := s.List(context.Background(), prefix, func(o ObjectInfo) error {
		keys = append(keys, o.Key)
		infos = append(infos, o)
		return nil
	})
	return keys, infos, err
}

// anyRequest matches every recorded request.
func anyRequest(s3Seen) bool { return true }

// ---------------------------------------------------------------------------
// Basic operations

func TestS3StoreBasics(t *testing.T) {
	r := newS3Rig(t, "hc-basics")
	ctx := context.Background()
	s, m := r.store(t, "root/", StorageConfig{})
	if got, want := s.URI(), "s3://hc-basics/root/"; got != want {
		t.Errorf("URI %q, want %q", got, want)
	}

	t.Run("List", func(t *testing.T) {
		body := map[string][]byte{}
		for i, k := range []string{"root/a/b", "root/a-b", "root/a.b", "root/a/c/d", "root/b", "root/dir/x", "rootx", "other/a"} {
			body[k] = s3Bytes(uint64(i), 10+i)
			r.put(t, k, body[k])
		}
		r.put(t, "root/dir/", nil) // a folder marker, as consoles create them
		keys, infos, err := s3ListKeys(s, "")
		r.noSecret(t, err)
		if err != nil {
			t.Fatal(err)
		}
		// Byte order (SPEC §3.1): '-' 0x2D < '.' 0x2E < '/' 0x2F.
		want := []string{"a-b", "a.b", "a/b", "a/c/d", "b", "dir/x"}
		if !slices.Equal(keys, want) {
			t.Errorf("List: %q, want %q", keys, want)
		}
		for _, o := range infos {
			if o.Size != int64(len(body["root/"+o.Key])) || o.ETag == "" {
				t.Errorf("List %s: size %d etag %q, want size %d and an etag", o.Key, o.Size, o.ETag, len(body["root/"+o.Key]))
			}
			st, err := s.Stat(ctx, o.Key)
			if err != nil || st.ETag != o.ETag || st.Size != o.Size || st.Key != o.Key {
				t.Errorf("Stat %s = %+v, %v; List gave %+v", o.Key, st, err, o)
			}
		}
		for prefix, want := range map[string][]string{
			"a":   {"a-b", "a.b", "a/b", "a/c/d"},
			"a/":  {"a/b", "a/c/d"},
			"dir": {"dir/x"},
			"zz":  nil,
		} {
			keys, _, err := s3ListKeys(s, prefix)
			if err != nil || !slices.Equal(keys, want) {
				t.Errorf("List(%q): %q, %v; want %q", prefix, keys, err, want)
			}
		}
	})

	t.Run("ListPages", func(t *testing.T) {
		// ListObjectsV2 returns at most 1000 keys per page (S3 API
		// Reference, ListObjectsV2, MaxKeys): 1003 keys take two pages.
		const n = 1003
		var g errgroup.Group
		g.SetLimit(8)
		for i := range n {
			g.Go(func() error {
				_, err := r.direct.PutObject(ctx, &s3.PutObjectInput{Bucket: aws.String(r.bucket),
					Key: aws.String(fmt.Sprintf("root/many/%04d", i)), Body: bytes.NewReader([]byte{byte(i)})})
				return err
			})
		}
		if err := g.Wait(); err != nil {
			t.Fatal(err)
		}
		r.rec.reset(0)
		keys, _, err := s3ListKeys(s, "many/")
		if err != nil {
			t.Fatal(err)
		}
		if len(keys) != n {
			t.Fatalf("List: %d keys, want %d", len(keys), n)
		}
		for i, k := range keys {
			if want := fmt.Sprintf("many/%04d", i); k != want {
				t.Fatalf("key %d: %q, want %q", i, k, want)
			}
		}
		if got := len(r.rec.requests(func(s s3Seen) bool { return strings.Contains(s.Query, "list-type=2") })); got != 2 {
			t.Errorf("%d list requests, want 2 pages", got)
		}
	})

	t.Run("StatMissing", func(t *testing.T) {
		before := m.Requests.Load()
		_, err := s.Stat(ctx, "no/such/key")
		r.noSecret(t, err)
		if !errors.Is(err, ErrNotFound) {
			t.Fatalf("Stat of a missing key: %v, want ErrNotFound", err)
		}
		if !strings.Contains(err.Error(), "s3://hc-basics/root/no/such/key") {
			t.Errorf("error does not name the object: %v", err)
		}
		if d := m.Requests.Load() - before; d != 1 {
			t.Errorf("%d requests for a missing key, want 1 (a 404 is not retried)", d)
		}
	})

	t.Run("PutOpen", func(t *testing.T) {
		data := s3Bytes(7, 300_000)
		if err := Put(ctx, s, "put/obj.bin", data, false); err != nil {
			t.Fatal(err)
		}
		if got := r.get(t, "root/put/obj.bin"); !bytes.Equal(got, data) {
			t.Fatalf("object on the server: %d bytes, differ from the %d written", len(got), len(data))
		}
		got, err := s3ReadAll(t, s, "put/obj.bin", 0)
		if err != nil || !bytes.Equal(got, data) {
			t.Fatalf("Open: %d bytes, %v; want the %d written", len(got), err, len(data))
		}
		for _, off := range []int64{1, 1000, 299_999} {
			got, err := s3ReadAll(t, s, "put/obj.bin", off)
			if err != nil || !bytes.Equal(got, data[off:]) {
				t.Errorf("Open at %d: %d bytes, %v; want %d", off, len(got), err, len(data)-int(off))
			}
		}
		// Overwrite (not exclusive) replaces the bytes.
		data2 := s3Bytes(8, 1000)
		if err := Put(ctx, s, "put/obj.bin", data2, false); err != nil {
			t.Fatal(err)
		}
		if got := r.get(t, "root/put/obj.bin"); !bytes.Equal(got, data2) {
			t.Fatalf("overwritten object differs")
		}
		// An empty object is an object.
		if err := Put(ctx, s, "put/empty", nil, false); err != nil {
			t.Fatal(err)
		}
		if got, err := s3ReadAll(t, s, "put/empty", 0); err != nil || len(got) != 0 {
			t.Errorf("empty object: %d bytes, %v", len(got), err)
		}
	})

	t.Run("OpenAtEnd", func(t *testing.T) {
		// Open "streams the object from offset to its end" (Store): at the
		// end, that is nothing, as LocalStore gives. S3 answers a Range
		// starting at the size with 416 (RFC 9110 §15.5.17).
		data := s3Bytes(9, 1000)
		r.put(t, "root/end.bin", data)
		got, err := s3ReadAll(t, s, "end.bin", 1000)
		r.noSecret(t, err)
		if err != nil || len(got) != 0 {
			t.Errorf("Open at the size: %d bytes, %v; want an empty stream", len(got), err)
		}
	})

	t.Run("OpenMissing", func(t *testing.T) {
		before, retries := m.Requests.Load(), m.Retries.Load()
		_, err := s.Open(ctx, "missing.bin", 0)
		r.noSecret(t, err)
		if !errors.Is(err, ErrNotFound) || !strings.Contains(err.Error(), "s3://hc-basics/root/missing.bin") {
			t.Fatalf("Open of a missing key: %v, want ErrNotFound naming the object", err)
		}
		if d, rd := m.Requests.Load()-before, m.Retries.Load()-retries; d != 1 || rd != 0 {
			t.Errorf("%d requests, %d retries for a 404; want 1, 0", d, rd)
		}
	})

	t.Run("Delete", func(t *testing.T) {
		r.put(t, "root/del/x", []byte("x"))
		if err := s.Delete(ctx, "del/x"); err != nil {
			t.Fatal(err)
		}
		if _, err := s.Stat(ctx, "del/x"); !errors.Is(err, ErrNotFound) {
			t.Errorf("Stat after Delete: %v, want ErrNotFound", err)
		}
		if err := s.Delete(ctx, "del/never-was"); err != nil {
			t.Errorf("Delete of a missing key: %v, want nil", err)
		}
	})

	t.Run("ExclusivePut", func(t *testing.T) {
		old := []byte("the first writer's bytes\n")
		if err := Put(ctx, s, "excl/manifest.json", old, true); err != nil {
			t.Fatalf("exclusive Put of a new key: %v", err)
		}
		err := Put(ctx, s, "excl/manifest.json", []byte("a second writer\n"), true)
		r.noSecret(t, err)
		if !errors.Is(err, ErrExists) {
			t.Fatalf("exclusive Put of an existing key: %v, want ErrExists", err)
		}
		if got := r.get(t, "root/excl/manifest.json"); !bytes.Equal(got, old) {
			t.Errorf("object after a refused exclusive Put: %q, want %q", got, old)
		}
		// The conditional write is the server's (If-None-Match: *, S3 API
		// Reference, PutObject), not a HEAD before the PUT.
		puts := r.rec.requests(func(s s3Seen) bool { return s.Method == http.MethodPut && strings.Contains(s.Path, "excl/") })
		if len(puts) == 0 || puts[len(puts)-1].IfNoneMatch != "*" {
			t.Errorf("exclusive PUTs %+v, want If-None-Match: *", puts)
		}
	})

	t.Run("Link", func(t *testing.T) {
		// A key that needs escaping in x-amz-copy-source (S3 API Reference,
		// CopyObject: "The value must be URL-encoded").
		data := s3Bytes(10, 5000)
		r.put(t, "root/from/a b/é%.bin", data)
		dst, _ := r.store(t, "elsewhere/", StorageConfig{})
		before := len(r.rec.requests(anyRequest))
		if err := dst.Link(ctx, s, "from/a b/é%.bin", "to/copy.bin"); err != nil {
			t.Fatalf("Link: %v", err)
		}
		if got := r.get(t, "elsewhere/to/copy.bin"); !bytes.Equal(got, data) {
			t.Fatalf("linked object differs from its source")
		}
		seen := r.rec.requests(anyRequest)[before:]
		if len(seen) != 1 || seen[0].Method != http.MethodPut {
			t.Errorf("Link made requests %+v, want one server-side copy (PUT)", seen)
		}
		if err := dst.Link(ctx, NewLocalStore(t.TempDir()), "x", "y"); err == nil {
			t.Errorf("Link from a local folder succeeded; want an error (the caller copies)")
		}
	})

	t.Run("LinkPlus", func(t *testing.T) {
		// "+" in a key: x-amz-copy-source is URL-encoded, and a server that
		// decodes it as a query component (versitygw does) reads "+" as a
		// space, so a literal "+" must be sent as %2B (RFC 3986 §2.1; the
		// "+" for space is HTML form encoding). With the twin "a b" present,
		// a wrong decoding copies the wrong object instead of failing.
		plus, space := s3Bytes(12, 100), s3Bytes(13, 100)
		r.put(t, "root/plus/a+b", plus)
		r.put(t, "root/plus/a b", space)
		dst, _ := r.store(t, "elsewhere/", StorageConfig{})
		err := dst.Link(ctx, s, "plus/a+b", "to/plus")
		if err != nil {
			t.Fatalf("Link of a key with '+': %v", err)
		}
		if got := r.get(t, "elsewhere/to/plus"); !bytes.Equal(got, plus) {
			t.Errorf("Link of plus/a+b copied other bytes (those of plus/a b: %v)", bytes.Equal(got, space))
		}
	})
}

// The Opener opens s3:// URIs with the config's storage section, behind the
// Metered decorator that counts the bytes.
func TestS3Opener(t *testing.T) {
	r := newS3Rig(t, "hc-opener")
	ctx := context.Background()
	m := &Metrics{}
	o := &Opener{Storage: StorageConfig{Endpoint: r.fp.URL, Attempts: 2}, Metrics: m}
	s, err := o.Open(ctx, "s3://hc-opener/p/q")
	if err != nil {
		t.Fatal(err)
	}
	if _, ok := s.(Metered); !ok {
		t.Errorf("Opener gave %T, want Metered", s)
	}
	if _, ok := Unwrap(s).(*S3Store); !ok {
		t.Errorf("Unwrap gave %T, want *S3Store", Unwrap(s))
	}
	if got, want := s.URI(), "s3://hc-opener/p/q/"; got != want {
		t.Errorf("URI %q, want %q", got, want)
	}
	data := s3Bytes(11, 12345)
	if err := Put(ctx, s, "k", data, false); err != nil {
		t.Fatal(err)
	}
	got, err := ReadAll(ctx, s, "k")
	if err != nil || !bytes.Equal(got, data) {
		t.Fatalf("ReadAll: %d bytes, %v", len(got), err)
	}
	if w, rd := m.BytesWritten.Load(), m.BytesRead.Load(); w != 12345 || rd != 12345 {
		t.Errorf("bytes written %d, read %d; want 12345 each", w, rd)
	}
	// One PUT and one GET, no retries.
	if q, rt := m.Requests.Load(), m.Retries.Load(); q != 2 || rt != 0 {
		t.Errorf("%d requests, %d retries; want 2, 0", q, rt)
	}
	if got := r.get(t, "p/q/k"); !bytes.Equal(got, data) {
		t.Errorf("object under the prefix differs")
	}
}

// ---------------------------------------------------------------------------
// Multipart uploads

const mib = 1 << 20

// pendingUploads of a bucket must be none after a failed or aborted upload.
func TestS3Multipart(t *testing.T) {
	r := newS3Rig(t, "hc-multipart")
	ctx := context.Background()

	t.Run("BoundedConcurrency", func(t *testing.T) {
		s, m := r.store(t, "mp/", StorageConfig{PartSize: 5 * mib, MaxConcurrency: 2})
		data := s3Bytes(20, 12*mib+123)
		// Every part is held 300 ms at the recorder, so that parts sent
		// together are seen together.
		r.rec.reset(300 * time.Millisecond)
		defer r.rec.reset(0)
		u, err := s.Create(ctx, "big.bin")
		if err != nil {
			t.Fatal(err)
		}
		// Writes of an odd size, so that part boundaries fall inside writes.
		for rest := data; len(rest) > 0; {
			n := min(len(rest), 777_777)
			if _, err := u.Write(rest[:n]); err != nil {
				t.Fatal(err)
			}
			rest = rest[n:]
		}
		if err := u.Commit(false); err != nil {
			t.Fatal(err)
		}
		got := r.get(t, "mp/big.bin")
		if sha256.Sum256(got) != sha256.Sum256(data) {
			t.Fatalf("object: %d bytes, sha256 differs from the %d written", len(got), len(data))
		}
		// 12 MiB + 123 in 5 MiB parts: 5 MiB, 5 MiB, 2 MiB + 123.
		parts := r.rec.requests(func(s s3Seen) bool { return s.Method == http.MethodPut && strings.Contains(s.Query, "partNumber=") })
		var sizes []int64
		for _, p := range parts {
			sizes = append(sizes, p.ContentLength)
		}
		slices.Sort(sizes)
		if want := []int64{2*mib + 123, 5 * mib, 5 * mib}; !slices.Equal(sizes, want) {
			t.Errorf("part sizes %v, want %v", sizes, want)
		}
		if got := r.rec.maxConcurrentParts(); got != 2 {
			t.Errorf("at most %d parts in flight, want exactly max_concurrency 2", got)
		}
		if m.Retries.Load() != 0 {
			t.Errorf("%d retries without faults", m.Retries.Load())
		}
		if p := r.pendingUploads(t); len(p) != 0 {
			t.Errorf("pending uploads after a commit: %q", p)
		}
	})

	t.Run("PartRetried", func(t *testing.T) {
		s, m := r.store(t, "mp/", StorageConfig{PartSize: 5 * mib, MaxConcurrency: 3})
		data := s3Bytes(21, 11*mib)
		r.fp.Set(faultproxy.Rule{Kind: faultproxy.Status500, Method: http.MethodPut, Query: "partNumber=", Skip: 1, Times: 1})
		u, _ := s.Create(ctx, "retried.bin")
		if _, err := u.Write(data); err != nil {
			t.Fatal(err)
		}
		if err := u.Commit(false); err != nil {
			t.Fatal(err)
		}
		if got := r.get(t, "mp/retried.bin"); sha256.Sum256(got) != sha256.Sum256(data) {
			t.Fatalf("object differs from the bytes written")
		}
		if got := m.Retries.Load(); got != 1 {
			t.Errorf("%d retries, want 1 (one part failed once)", got)
		}
	})

	t.Run("ExclusiveCommit", func(t *testing.T) {
		s, _ := r.store(t, "mp/", StorageConfig{PartSize: 5 * mib, MaxConcurrency: 2})
		first := s3Bytes(22, 6*mib)
		u, _ := s.Create(ctx, "excl.bin")
		u.Write(first)
		if err := u.Commit(true); err != nil {
			t.Fatalf("exclusive multipart commit of a new key: %v", err)
		}
		u, _ = s.Create(ctx, "excl.bin")
		u.Write(s3Bytes(23, 6*mib))
		err := u.Commit(true)
		r.noSecret(t, err)
		if !errors.Is(err, ErrExists) {
			t.Errorf("exclusive multipart commit of an existing key: %v, want ErrExists", err)
		}
		if got := r.get(t, "mp/excl.bin"); sha256.Sum256(got) != sha256.Sum256(first) {
			t.Errorf("object replaced by a refused exclusive commit")
		}
		if p := r.pendingUploads(t); len(p) != 0 {
			t.Errorf("pending uploads after a refused commit: %q", p)
		}
	})

	// Put of an object above the part size (a manifest of a fleet with many
	// thousand sources) is one conditional PUT, not a multipart upload, so
	// that it keeps the conditional write's handling of a lost answer and of
	// a taken key (TestS3ExclusivePutLostResponse), which a retried
	// CompleteMultipartUpload would not have.
	t.Run("ExclusivePutIsOnePUT", func(t *testing.T) {
		s, m := r.store(t, "mp/", StorageConfig{PartSize: 5 * mib, MaxConcurrency: 2, Attempts: 4})
		data := s3Bytes(27, 6*mib)
		r.rec.reset(0)
		if err := Put(ctx, s, "v9/manifest.json", data, true); err != nil {
			t.Fatalf("exclusive put of 6 MiB: %v", err)
		}
		if got := r.get(t, "mp/v9/manifest.json"); sha256.Sum256(got) != sha256.Sum256(data) {
			t.Fatal("object differs from the bytes put")
		}
		puts := r.rec.requests(func(s s3Seen) bool { return s.Method == http.MethodPut })
		multipart := r.rec.requests(func(s s3Seen) bool {
			return strings.Contains(s.Query, "uploads") || strings.Contains(s.Query, "uploadId")
		})
		if len(puts) != 1 || len(multipart) != 0 || m.Requests.Load() != 1 {
			t.Errorf("%d PUTs, %d multipart requests, %d requests; want 1 PUT and nothing else", len(puts), len(multipart), m.Requests.Load())
		}
		// The key is taken now. A small body: the server answers 412
		// before reading a large one and resets the connection while the
		// client still writes it, so a large refused PUT may end as a
		// reset instead of the 412 (seen with versitygw, with or without
		// the proxy).
		if err := Put(ctx, s, "v9/manifest.json", s3Bytes(28, 1024), true); !errors.Is(err, ErrExists) {
			t.Errorf("second exclusive put: %v, want ErrExists", err)
		}
		if got := r.get(t, "mp/v9/manifest.json"); sha256.Sum256(got) != sha256.Sum256(data) {
			t.Error("object replaced by a refused exclusive put")
		}
		if p := r.pendingUploads(t); len(p) != 0 {
			t.Errorf("pending uploads: %q", p)
		}
	})

	t.Run("Abort", func(t *testing.T) {
		s, _ := r.store(t, "mp/", StorageConfig{PartSize: 5 * mib, MaxConcurrency: 2})
		u, _ := s.Create(ctx, "aborted.bin")
		if _, err := u.Write(s3Bytes(24, 11*mib)); err != nil {
			t.Fatal(err)
		}
		if err := u.Abort(); err != nil {
			t.Fatalf("Abort: %v", err)
		}
		if _, err := s.Stat(ctx, "aborted.bin"); !errors.Is(err, ErrNotFound) {
			t.Errorf("Stat after Abort: %v, want ErrNotFound", err)
		}
		if p := r.pendingUploads(t); len(p) != 0 {
			t.Errorf("pending uploads after Abort: %q", p)
		}
		if err := u.Commit(false); err == nil {
			t.Errorf("Commit after Abort succeeded")
		}
	})

	// A writer killed mid-upload cannot abort its own upload: its parts stay
	// pending on the server. Clearing the folder (what a stage item's redo
	// and a commit over an unfinished version do) aborts them, and only
	// those under its prefix.
	t.Run("ClearedFolderAbortsKilledUploads", func(t *testing.T) {
		s, _ := r.store(t, "mp/", StorageConfig{})
		for _, key := range []string{"mp/killed/a.bin", "mp/killed/sub/b.bin", "mp/kept/c.bin"} {
			out, err := r.direct.CreateMultipartUpload(ctx, &s3.CreateMultipartUploadInput{Bucket: aws.String(r.bucket), Key: aws.String(key)})
			if err != nil {
				t.Fatal(err)
			}
			if _, err := r.direct.UploadPart(ctx, &s3.UploadPartInput{
				Bucket: aws.String(r.bucket), Key: aws.String(key), UploadId: out.UploadId,
				PartNumber: aws.Int32(1), Body: bytes.NewReader(s3Bytes(26, 5*mib)),
			}); err != nil {
				t.Fatal(err)
			}
		}
		if err := Put(ctx, s, "killed/done.bin", []byte("finished"), false); err != nil {
			t.Fatal(err)
		}
		if p := r.pendingUploads(t); len(p) != 3 {
			t.Fatalf("%d pending uploads before clearing, want the 3 started: %q", len(p), p)
		}
		if err := DeletePrefix(ctx, s, "killed/"); err != nil {
			t.Fatal(err)
		}
		p := r.pendingUploads(t)
		if len(p) != 1 || !strings.HasPrefix(p[0], "mp/kept/c.bin ") {
			t.Errorf("pending uploads after clearing mp/killed/: %q, want only mp/kept/c.bin's", p)
		}
		if _, err := s.Stat(ctx, "killed/done.bin"); !errors.Is(err, ErrNotFound) {
			t.Errorf("Stat of an object in the cleared folder: %v, want ErrNotFound", err)
		}
		if err := DeletePrefix(ctx, s, "kept/"); err != nil {
			t.Fatal(err)
		}
		if p := r.pendingUploads(t); len(p) != 0 {
			t.Errorf("pending uploads after clearing mp/kept/ too: %q", p)
		}
	})

	t.Run("PartFailsForGood", func(t *testing.T) {
		s, m := r.store(t, "mp/", StorageConfig{PartSize: 5 * mib, MaxConcurrency: 2, Attempts: 3})
		u, _ := s.Create(ctx, "failed.bin")
		r.fp.Set(faultproxy.Rule{Kind: faultproxy.Status500, Method: http.MethodPut, Query: "partNumber="})
		if _, err := u.Write(s3Bytes(25, 11*mib)); err != nil {
			t.Fatal(err)
		}
		err := u.Commit(false)
		r.fp.Set()
		requests, retries := m.Requests.Load(), m.Retries.Load()
		r.noSecret(t, err)
		if err == nil {
			t.Fatal("Commit succeeded although every UploadPart failed")
		}
		if !strings.Contains(err.Error(), "s3://hc-multipart/mp/failed.bin") {
			t.Errorf("error does not name the object: %v", err)
		}
		if _, err := s.Stat(ctx, "failed.bin"); !errors.Is(err, ErrNotFound) {
			t.Errorf("Stat after a failed Commit: %v, want ErrNotFound", err)
		}
		if p := r.pendingUploads(t); len(p) != 0 {
			t.Errorf("pending uploads after a failed Commit: %q", p)
		}
		// Three parts (5, 5, 1 MiB), each tried 3 times: 9 UploadParts, 6
		// retries, plus CreateMultipartUpload and AbortMultipartUpload. The
		// proxy may see more UploadParts than the store sends: Go's
		// transport replays by itself a request that found its reused
		// connection closed before anything was written (net/http,
		// Transport), as after a 500 that did not read a 100-continue body.
		if got := r.fp.Injected()[faultproxy.Status500]; got < 9 {
			t.Errorf("%d injected part failures, want at least 3 parts × 3 attempts", got)
		}
		if requests != 11 || retries != 6 {
			t.Errorf("%d requests, %d retries; want 1 + 9 + 1, 3 parts × 2", requests, retries)
		}
	})
}

// ---------------------------------------------------------------------------
// Faults

// Every fault kind on every operation: the operation succeeds with the same
// result, after exactly one retry (the rule fires once).
func TestS3Faults(t *testing.T) {
	r := newS3Rig(t, "hc-faults")
	ctx := context.Background()
	big := s3Bytes(30, 1*mib)
	r.put(t, "f/obj/big.bin", big)
	for i := range 3 {
		r.put(t, fmt.Sprintf("f/list/%d", i), []byte{byte(i)})
	}
	bigSum := sha256.Sum256(big)
	stat, err := r.direct.HeadObject(ctx, &s3.HeadObjectInput{Bucket: aws.String(r.bucket), Key: aws.String("f/obj/big.bin")})
	if err != nil {
		t.Fatal(err)
	}
	bigETag := aws.ToString(stat.ETag)

	kinds := []faultproxy.Kind{faultproxy.Status500, faultproxy.SlowDown503, faultproxy.Reset, faultproxy.CutBody, faultproxy.Delay}
	ops := []struct {
		name   string
		method string
		query  string
		path   string
		run    func(t *testing.T, s *S3Store) error
	}{
		{"GET", http.MethodGet, "", "/obj/", func(t *testing.T, s *S3Store) error {
			got, err := s3ReadAll(t, s, "obj/big.bin", 0)
			if err == nil && sha256.Sum256(got) != bigSum {
				t.Errorf("read %d bytes, differ from the object", len(got))
			}
			return err
		}},
		{"LIST", http.MethodGet, "list-type=2", "", func(t *testing.T, s *S3Store) error {
			keys, _, err := s3ListKeys(s, "list/")
			if want := []string{"list/0", "list/1", "list/2"}; err == nil && !slices.Equal(keys, want) {
				t.Errorf("List %q, want %q", keys, want)
			}
			return err
		}},
		{"HEAD", http.MethodHead, "", "/obj/", func(t *testing.T, s *S3Store) error {
			o, err := s.Stat(ctx, "obj/big.bin")
			if err == nil && (o.Size != mib || o.ETag != bigETag) {
				t.Errorf("Stat %+v, want size %d etag %s", o, mib, bigETag)
			}
			return err
		}},
		{"PUT", http.MethodPut, "", "/put/", func(t *testing.T, s *S3Store) error {
			data := s3Bytes(31, 64<<10)
			if err := Put(ctx, s, "put/obj.bin", data, false); err != nil {
				return err
			}
			if got := r.get(t, "f/put/obj.bin"); !bytes.Equal(got, data) {
				t.Errorf("object differs from the bytes put")
			}
			return nil
		}},
	}
	for _, op := range ops {
		for _, k := range kinds {
			t.Run(op.name+"/"+k.String(), func(t *testing.T) {
				opt := StorageConfig{Attempts: 4, Timeout: Duration(10 * time.Second)}
				if k == faultproxy.Delay {
					// The delay is well past the timeout, and the timeout
					// well past what a request takes on a loaded 2-core
					// machine under the race detector, so that exactly
					// the delayed request times out.
					opt.Timeout = Duration(time.Second)
				}
				s, m := r.store(t, "f/", opt)
				before := r.fp.Injected()[k]
				r.fp.Set(faultproxy.Rule{Kind: k, Method: op.method, Query: op.query, PathContains: op.path, Times: 1, Delay: 4 * time.Second})
				r.rec.reset(0)
				err := op.run(t, s)
				r.fp.Set()
				r.noSecret(t, err)
				if err != nil {
					t.Fatalf("%s under %v: %v", op.name, k, err)
				}
				if got := r.fp.Injected()[k] - before; got != 1 {
					t.Fatalf("%d faults injected, want 1", got)
				}
				if got := m.Retries.Load(); got != 1 {
					t.Errorf("%d retries, want 1", got)
				}
				if op.name == "GET" && k == faultproxy.CutBody {
					// The cut came after half the body (512 KiB): the read
					// resumes there, pinned to the ETag (RFC 9110 §13.1.1,
					// §14.2).
					gets := r.rec.requests(func(s s3Seen) bool { return s.Method == http.MethodGet })
					if len(gets) != 2 || gets[0].Range != "" || gets[1].Range != "bytes=524288-" || gets[1].IfMatch != bigETag {
						t.Errorf("GETs %+v; want a whole GET, then Range bytes=524288- with If-Match %s", gets, bigETag)
					}
				}
			})
		}
	}
}

// A store without conditional writes answers a PUT with If-None-Match 501
// Not Implemented (RFC 9110 §15.6.2): that is not retried; the commit checks
// with a HEAD instead and fails clearly when the key is taken. A store
// without ListMultipartUploads has nothing pending to abort.
func TestS3WithoutConditionalWrites(t *testing.T) {
	r := newS3Rig(t, "hc-nocond")
	ctx := context.Background()
	requests := func(method string) int {
		return len(r.rec.requests(func(s s3Seen) bool { return s.Method == method }))
	}

	t.Run("NewKey", func(t *testing.T) {
		s, m := r.store(t, "", StorageConfig{Attempts: 4})
		r.rec.reset(0)
		r.fp.Set(faultproxy.Rule{Kind: faultproxy.NotImplemented501, Method: http.MethodPut, Times: 1})
		err := Put(ctx, s, "v/manifest.json", []byte("first"), true)
		r.fp.Set()
		if err != nil {
			t.Fatalf("exclusive put of a new key without conditional writes: %v", err)
		}
		if got := r.get(t, "v/manifest.json"); string(got) != "first" {
			t.Errorf("object %q, want %q", got, "first")
		}
		// The refused conditional PUT, the HEAD, the plain PUT; the PUT
		// that got 501 is not seen by the server.
		if q, rt := m.Requests.Load(), m.Retries.Load(); q != 3 || rt != 0 {
			t.Errorf("%d requests, %d retries; want 3 (PUT, HEAD, PUT), 0", q, rt)
		}
		if h, p := requests(http.MethodHead), requests(http.MethodPut); h != 1 || p != 1 {
			t.Errorf("server saw %d HEAD and %d PUT, want 1 and 1", h, p)
		}
	})

	t.Run("TakenKey", func(t *testing.T) {
		s, m := r.store(t, "", StorageConfig{Attempts: 4})
		r.fp.Set(faultproxy.Rule{Kind: faultproxy.NotImplemented501, Method: http.MethodPut, Times: 1})
		err := Put(ctx, s, "v/manifest.json", []byte("second"), true)
		r.fp.Set()
		r.noSecret(t, err)
		if !errors.Is(err, ErrExists) || !strings.Contains(err.Error(), "no conditional writes") || !strings.Contains(err.Error(), "s3://hc-nocond/v/manifest.json") {
			t.Errorf("exclusive put over a key without conditional writes: %v; want ErrExists naming the key and the check", err)
		}
		if got := r.get(t, "v/manifest.json"); string(got) != "first" {
			t.Errorf("object %q after a refused put, want %q", got, "first")
		}
		if q, rt := m.Requests.Load(), m.Retries.Load(); q != 2 || rt != 0 {
			t.Errorf("%d requests, %d retries; want 2 (PUT, HEAD), 0", q, rt)
		}
	})

	t.Run("NoPendingUploadsPermission", func(t *testing.T) {
		s, m := r.store(t, "", StorageConfig{Attempts: 4})
		if err := Put(ctx, s, "w/item2/a.bin", []byte("a"), false); err != nil {
			t.Fatal(err)
		}
		before := r.fp.Injected()[faultproxy.AccessDenied403]
		r.fp.Set(faultproxy.Rule{Kind: faultproxy.AccessDenied403, Method: http.MethodGet, Query: "uploads"})
		err := DeletePrefix(ctx, s, "w/item2/")
		r.fp.Set()
		if err != nil {
			t.Fatalf("clearing a folder without the permission to list pending uploads: %v", err)
		}
		if _, err := s.Stat(ctx, "w/item2/a.bin"); !errors.Is(err, ErrNotFound) {
			t.Errorf("object after clearing its folder: %v, want ErrNotFound", err)
		}
		if got := r.fp.Injected()[faultproxy.AccessDenied403] - before; got != 1 || m.Retries.Load() != 0 {
			t.Errorf("%d answers of 403, %d retries; want 1, 0", got, m.Retries.Load())
		}
	})

	t.Run("NoPendingUploadsCall", func(t *testing.T) {
		s, m := r.store(t, "", StorageConfig{Attempts: 4})
		if err := Put(ctx, s, "w/item/a.bin", []byte("a"), false); err != nil {
			t.Fatal(err)
		}
		r.fp.Set(faultproxy.Rule{Kind: faultproxy.NotImplemented501, Method: http.MethodGet, Query: "uploads"})
		err := DeletePrefix(ctx, s, "w/item/")
		r.fp.Set()
		if err != nil {
			t.Fatalf("clearing a folder on a store without ListMultipartUploads: %v", err)
		}
		if _, err := s.Stat(ctx, "w/item/a.bin"); !errors.Is(err, ErrNotFound) {
			t.Errorf("object after clearing its folder: %v, want ErrNotFound", err)
		}
		if got := r.fp.Injected()[faultproxy.NotImplemented501]; got != 3 {
			t.Errorf("%d answers of 501 in this test, want 3 (one per subtest, not retried)", got)
		}
		if rt := m.Retries.Load(); rt != 0 {
			t.Errorf("%d retries, want 0", rt)
		}
	})
}

// An exclusive PUT whose response is lost after the server stored the
// object is retried, and the retry finds the key taken: by its own write.
func TestS3ExclusivePutLostResponse(t *testing.T) {
	r := newS3Rig(t, "hc-lost")
	ctx := context.Background()
	s, _ := r.store(t, "", StorageConfig{Attempts: 4})
	data := []byte(`{"manifest": true}` + "\n")
	// CutBody forwards the PUT, then closes the connection before the
	// (bodiless) response.
	r.fp.Set(faultproxy.Rule{Kind: faultproxy.CutBody, Method: http.MethodPut, Times: 1})
	err := Put(ctx, s, "v1/manifest.json", data, true)
	r.fp.Set()
	if got := r.get(t, "v1/manifest.json"); !bytes.Equal(got, data) {
		t.Fatalf("object %q, want %q", got, data)
	}
	// The object holds exactly the bytes this writer put: the commit
	// succeeded, and reporting "already exists" would fail a run whose
	// version was in fact published.
	if err != nil {
		t.Errorf("exclusive Put after a lost response: %v; want success (the object is this writer's)", err)
	}
}

// Errors that repeating cannot fix are not retried.
func TestS3PermanentErrors(t *testing.T) {
	r := newS3Rig(t, "hc-perm")
	ctx := context.Background()
	r.put(t, "p/obj.bin", s3Bytes(40, 2000))

	t.Run("WrongCredentials", func(t *testing.T) {
		const wrong = "not-the-secret-at-all-0123456789"
		t.Setenv("AWS_SECRET_ACCESS_KEY", wrong)
		s, m := r.store(t, "p/", StorageConfig{Attempts: 4})
		for _, op := range []struct {
			name, uri string
			run       func() error
		}{
			{"Stat", "s3://hc-perm/p/obj.bin", func() error { _, err := s.Stat(ctx, "obj.bin"); return err }},
			{"Open", "s3://hc-perm/p/obj.bin", func() error { _, err := s.Open(ctx, "obj.bin", 0); return err }},
			{"List", "s3://hc-perm/p/", func() error { _, _, err := s3ListKeys(s, ""); return err }},
			{"Put", "s3://hc-perm/p/new.bin", func() error { return Put(ctx, s, "new.bin", []byte("x"), false) }},
			{"Delete", "s3://hc-perm/p/obj.bin", func() error { return s.Delete(ctx, "obj.bin") }},
		} {
			q, rt := m.Requests.Load(), m.Retries.Load()
			r.rec.reset(0)
			err := op.run()
			r.noSecret(t, err, wrong)
			if err == nil {
				t.Errorf("%s with a wrong secret key succeeded", op.name)
				continue
			}
			if !strings.Contains(err.Error(), op.uri) {
				t.Errorf("%s: error does not name %s: %v", op.name, op.uri, err)
			}
			if !strings.Contains(err.Error(), "403") {
				t.Errorf("%s: error does not give the status 403: %v", op.name, err)
			}
			// A HEAD's answer has no body to tell refused credentials by:
			// Stat checks with one GET of the first byte (headRefused).
			want := int64(1)
			if op.name == "Stat" {
				want = 2
			}
			if dq, drt := m.Requests.Load()-q, m.Retries.Load()-rt; dq != want || drt != 0 {
				t.Errorf("%s: %d requests, %d retries; want %d, 0", op.name, dq, drt, want)
			}
			if n := len(r.rec.requests(anyRequest)); n != int(want) {
				t.Errorf("%s: %d requests reached the server, want %d", op.name, n, want)
			}
		}
		if got := r.get(t, "p/obj.bin"); len(got) != 2000 {
			t.Errorf("Delete with a wrong key removed the object")
		}
	})

	t.Run("NoCredentials", func(t *testing.T) {
		// Nothing in the chain: no keys, no profile, no metadata service.
		t.Setenv("AWS_ACCESS_KEY_ID", "")
		t.Setenv("AWS_SECRET_ACCESS_KEY", "")
		s, m := r.store(t, "p/", StorageConfig{Attempts: 4})
		r.rec.reset(0)
		_, err := s.Stat(ctx, "obj.bin")
		if err == nil || !strings.Contains(err.Error(), "s3://hc-perm/p/obj.bin") || !strings.Contains(err.Error(), "no S3 credentials found: set AWS_ACCESS_KEY_ID") {
			t.Fatalf("Stat without credentials: %v; want an error naming the object and where credentials come from", err)
		}
		if q, rt, n := m.Requests.Load(), m.Retries.Load(), len(r.rec.requests(anyRequest)); q != 1 || rt != 0 || n != 0 {
			t.Errorf("%d requests, %d retries, %d reached the server; want 1 try, 0 retries, 0 at the server", q, rt, n)
		}
	})

	t.Run("Persistent500", func(t *testing.T) {
		s, m := r.store(t, "p/", StorageConfig{Attempts: 3})
		r.fp.Set(faultproxy.Rule{Kind: faultproxy.Status500, Method: http.MethodGet, PathContains: "obj.bin"})
		before := r.fp.Injected()[faultproxy.Status500]
		_, err := s.Open(ctx, "obj.bin", 0)
		r.fp.Set()
		r.noSecret(t, err)
		if err == nil {
			t.Fatal("Open under a persistent 500 succeeded")
		}
		if !strings.Contains(err.Error(), "s3://hc-perm/p/obj.bin") {
			t.Errorf("error does not name the object: %v", err)
		}
		if got := r.fp.Injected()[faultproxy.Status500] - before; got != 3 {
			t.Errorf("%d tries, want attempts = 3", got)
		}
		if q, rt := m.Requests.Load(), m.Retries.Load(); q != 3 || rt != 2 {
			t.Errorf("%d requests, %d retries; want 3, 2", q, rt)
		}
	})

	t.Run("Persistent503List", func(t *testing.T) {
		s, m := r.store(t, "p/", StorageConfig{Attempts: 2})
		r.fp.Set(faultproxy.Rule{Kind: faultproxy.SlowDown503, Query: "list-type=2"})
		_, _, err := s3ListKeys(s, "")
		r.fp.Set()
		r.noSecret(t, err)
		if err == nil || !strings.Contains(err.Error(), "s3://hc-perm/p/") {
			t.Fatalf("List under a persistent 503: %v; want an error naming the prefix", err)
		}
		if q, rt := m.Requests.Load(), m.Retries.Load(); q != 2 || rt != 1 {
			t.Errorf("%d requests, %d retries; want 2, 1", q, rt)
		}
	})
}

// ---------------------------------------------------------------------------
// Reads pinned to the ETag

func TestS3ETagPinning(t *testing.T) {
	r := newS3Rig(t, "hc-etag")
	ctx := context.Background()
	old := s3Bytes(50, 1*mib)
	r.put(t, "e/obj.bin", old)
	s, m := r.store(t, "e/", StorageConfig{Attempts: 4})
	oldInfo, err := s.Stat(ctx, "obj.bin")
	if err != nil {
		t.Fatal(err)
	}

	// The first GET is cut after half the body (512 KiB).
	r.fp.Set(faultproxy.Rule{Kind: faultproxy.CutBody, Method: http.MethodGet, Times: 1})
	r.rec.reset(0)
	rc, err := s.Open(ctx, "obj.bin", 0)
	if err != nil {
		t.Fatal(err)
	}
	defer rc.Close()
	head := make([]byte, 100<<10)
	if _, err := io.ReadFull(rc, head); err != nil {
		t.Fatal(err)
	}
	// Another writer replaces the object meanwhile.
	r.put(t, "e/obj.bin", s3Bytes(51, 1*mib))
	rest, err := io.ReadAll(rc)
	r.noSecret(t, err)
	got := append(head, rest...)
	if err == nil {
		t.Fatalf("read went on across a change of the object (%d bytes)", len(got))
	}
	// No byte of the new object: exactly the old object's first half.
	if len(got) != 512<<10 || !bytes.Equal(got, old[:len(got)]) {
		t.Errorf("read %d bytes before the error; want the old object's first 524288", len(got))
	}
	if !strings.Contains(err.Error(), "412") || !strings.Contains(err.Error(), "s3://hc-etag/e/obj.bin") {
		t.Errorf("error %v; want 412 Precondition Failed naming the object", err)
	}
	gets := r.rec.requests(func(s s3Seen) bool { return s.Method == http.MethodGet })
	if len(gets) != 2 || gets[1].Range != "bytes=524288-" || gets[1].IfMatch != oldInfo.ETag {
		t.Errorf("GETs %+v; want the resumption with Range bytes=524288- and If-Match %s", gets, oldInfo.ETag)
	}
	if n, err := rc.Read(make([]byte, 10)); n != 0 || err == nil {
		t.Errorf("Read after the error: %d, %v; want the error again", n, err)
	}
	// The one cut was retried once; the 412 was not.
	if got := m.Retries.Load(); got != 1 {
		t.Errorf("%d retries, want 1", got)
	}
}

// A reader whose body is closed under it (as when its connection drops)
// resumes at the next byte, pinned to the ETag; this drives s3Reader
// directly, without a proxy.
func TestS3ReaderResumesAfterClosedBody(t *testing.T) {
	r := newS3Rig(t, "hc-resume")
	ctx := context.Background()
	data := s3Bytes(60, 300_000)
	r.put(t, "obj.bin", data)
	s, m := r.store(t, "", StorageConfig{Attempts: 3})
	rc, err := s.Open(ctx, "obj.bin", 1000)
	if err != nil {
		t.Fatal(err)
	}
	defer rc.Close()
	sr := rc.(*s3Reader)
	first := make([]byte, 50_000)
	if _, err := io.ReadFull(sr, first); err != nil {
		t.Fatal(err)
	}
	r.rec.reset(0)
	sr.body.Close() // the connection drops
	rest, err := io.ReadAll(sr)
	if err != nil {
		t.Fatal(err)
	}
	if got := append(first, rest...); !bytes.Equal(got, data[1000:]) {
		t.Fatalf("read %d bytes, differ from the object from 1000 (%d)", len(got), len(data)-1000)
	}
	gets := r.rec.requests(func(s s3Seen) bool { return s.Method == http.MethodGet })
	if len(gets) != 1 || gets[0].Range != "bytes=51000-" || gets[0].IfMatch != sr.ETag() || sr.ETag() == "" {
		t.Errorf("resumption GETs %+v; want Range bytes=51000- with If-Match %q", gets, sr.ETag())
	}
	if got := m.Retries.Load(); got != 1 {
		t.Errorf("%d retries, want 1", got)
	}
}

// A reader that pauses between reads longer than the store's timeout still
// delivers the object's bytes.
func TestS3ReaderSlowConsumer(t *testing.T) {
	r := newS3Rig(t, "hc-slow")
	ctx := context.Background()
	data := s3Bytes(61, 2*mib)
	r.put(t, "obj.bin", data)
	s, m := r.store(t, "", StorageConfig{Attempts: 3, Timeout: Duration(200 * time.Millisecond)})
	rc, err := s.Open(ctx, "obj.bin", 0)
	if err != nil {
		t.Fatal(err)
	}
	defer rc.Close()
	first := make([]byte, 1000)
	if _, err := io.ReadFull(rc, first); err != nil {
		t.Fatal(err)
	}
	time.Sleep(500 * time.Millisecond)
	rest, err := io.ReadAll(rc)
	if err != nil {
		t.Fatal(err)
	}
	if got := append(first, rest...); !bytes.Equal(got, data) {
		t.Fatalf("read %d bytes, differ from the object", len(got))
	}
	t.Logf("retries after a consumer pause: %d", m.Retries.Load())
}

// ---------------------------------------------------------------------------
// Retrier

func TestS3Retrier(t *testing.T) {
	ctx := context.Background()
	errPass := errors.New("transient")
	errPerm := errors.New("permanent")
	retryable := func(err error) bool { return errors.Is(err, errPass) }

	t.Run("SucceedsAfterFailures", func(t *testing.T) {
		m := &Metrics{}
		rt := &Retrier{Attempts: 5, Base: time.Millisecond, Cap: 2 * time.Millisecond, Retryable: retryable, Metrics: m}
		calls := 0
		err := rt.Do(ctx, func(context.Context) error {
			calls++
			if calls < 3 {
				return errPass
			}
			return nil
		})
		if err != nil || calls != 3 || m.Requests.Load() != 3 || m.Retries.Load() != 2 {
			t.Errorf("err %v, %d calls, %d requests, %d retries; want nil, 3, 3, 2", err, calls, m.Requests.Load(), m.Retries.Load())
		}
	})
	t.Run("GivesUpAfterAttempts", func(t *testing.T) {
		m := &Metrics{}
		rt := &Retrier{Attempts: 4, Base: time.Millisecond, Cap: time.Millisecond, Retryable: retryable, Metrics: m}
		calls := 0
		err := rt.Do(ctx, func(context.Context) error { calls++; return errPass })
		if !errors.Is(err, errPass) || calls != 4 || m.Retries.Load() != 3 {
			t.Errorf("err %v, %d calls, %d retries; want errPass, 4, 3", err, calls, m.Retries.Load())
		}
	})
	t.Run("PermanentNotRetried", func(t *testing.T) {
		m := &Metrics{}
		rt := &Retrier{Attempts: 4, Base: time.Millisecond, Cap: time.Millisecond, Retryable: retryable, Metrics: m}
		calls := 0
		err := rt.Do(ctx, func(context.Context) error { calls++; return errPerm })
		if !errors.Is(err, errPerm) || calls != 1 || m.Requests.Load() != 1 || m.Retries.Load() != 0 {
			t.Errorf("err %v, %d calls, %d retries; want errPerm, 1, 0", err, calls, m.Retries.Load())
		}
	})
	t.Run("CancelledDuringBackoff", func(t *testing.T) {
		// A backoff of up to an hour ends when the context does.
		rt := &Retrier{Attempts: 3, Base: time.Hour, Cap: time.Hour, Retryable: retryable}
		cctx, cancel := context.WithCancel(ctx)
		time.AfterFunc(50*time.Millisecond, cancel)
		start := time.Now()
		calls := 0
		err := rt.Do(cctx, func(context.Context) error { calls++; return errPass })
		if took := time.Since(start); took > 10*time.Second {
			t.Errorf("Do took %v after its context was cancelled", took)
		}
		// The first sleep is uniform on [0, 1h]: it may have ended before
		// the cancel only with probability 50ms/1h.
		if !errors.Is(err, context.Canceled) || calls != 1 {
			t.Errorf("err %v after %d calls; want context.Canceled after 1", err, calls)
		}
	})
	t.Run("BackoffBound", func(t *testing.T) {
		// Full jitter: the sleep before attempt n+1 is at most
		// min(Cap, Base·2^(n−1)) (Brooker, "Exponential Backoff And
		// Jitter", AWS Architecture Blog, 2015). With Base 20ms and Cap
		// 40ms, three sleeps take at most 20+40+40 = 100ms.
		rt := &Retrier{Attempts: 4, Base: 20 * time.Millisecond, Cap: 40 * time.Millisecond, Retryable: retryable}
		for range 5 {
			start := time.Now()
			rt.Do(ctx, func(context.Context) error { return errPass })
			if took := time.Since(start); took > 100*time.Millisecond+500*time.Millisecond {
				t.Errorf("4 attempts took %v; the sleeps are bounded by 100ms", took)
			}
		}
	})
}
