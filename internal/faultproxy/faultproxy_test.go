package faultproxy

import (
	"bytes"
	"context"
	"encoding/xml"
	"errors"
	"fmt"
	"io"
	"maps"
	"net"
	"net/http"
	"net/http/httptest"
	"runtime"
	"slices"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/aws/aws-sdk-go-v2/aws"
	"github.com/aws/aws-sdk-go-v2/credentials"
	"github.com/aws/aws-sdk-go-v2/service/s3"
	"github.com/aws/aws-sdk-go-v2/service/s3/types"

	"hindcast/internal/s3test"
)

// seen is what the target received for one request.
type seen struct {
	Method, RequestURI, Host string
	Header                   http.Header
	Body                     []byte
}

// target is a plain HTTP server that records requests and answers
// GET /blob/N with N bytes of pattern(N), of known length, and
// GET /stream/N with the same bytes of unknown length (chunked).
type target struct {
	*httptest.Server
	mu   sync.Mutex
	reqs []seen
}

func pattern(n int) []byte {
	b := make([]byte, n)
	for i := range b {
		b[i] = byte('a' + i%26)
	}
	return b
}

func newTarget(t *testing.T) *target {
	tg := &target{}
	tg.Server = httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		body, _ := io.ReadAll(r.Body)
		tg.mu.Lock()
		tg.reqs = append(tg.reqs, seen{r.Method, r.RequestURI, r.Host, r.Header.Clone(), body})
		tg.mu.Unlock()
		var n int
		switch {
		case sscan(r.URL.Path, "/blob/%d", &n):
			w.Header().Set("Content-Length", fmt.Sprint(n))
			w.Write(pattern(n))
		case sscan(r.URL.Path, "/stream/%d", &n):
			w.Write(pattern(n)[:n/3])
			w.(http.Flusher).Flush() // headers out: the length is unknown, chunked
			w.Write(pattern(n)[n/3:])
		default:
			w.Header().Set("ETag", `"etag-1"`)
			w.Header().Set("X-Amz-Request-Id", "target-7")
			w.WriteHeader(http.StatusCreated)
			io.WriteString(w, "created")
		}
	}))
	t.Cleanup(tg.Close)
	return tg
}

func sscan(s, format string, n *int) bool {
	_, err := fmt.Sscanf(s, format, n)
	return err == nil
}

func (tg *target) count() int {
	tg.mu.Lock()
	defer tg.mu.Unlock()
	return len(tg.reqs)
}

// client is a fresh client without keep-alive: each request gets its own
// connection, so net/http never replays a GET on a broken reused connection
// behind the test's back (it does so for idempotent requests, net/http
// Transport docs), and request counts are exact.
func client(timeout time.Duration) *http.Client {
	return &http.Client{Timeout: timeout, Transport: &http.Transport{DisableKeepAlives: true, DisableCompression: true}}
}

func get(t *testing.T, c *http.Client, url string) (*http.Response, []byte, error) {
	t.Helper()
	resp, err := c.Get(url)
	if err != nil {
		return nil, nil, err
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	return resp, b, err
}

// A request that no rule picks reaches the target unchanged: method, escaped
// path and raw query byte for byte, the client's Host, the signing headers,
// the body; and the target's status, headers and body come back unchanged.
func TestForwardUnchanged(t *testing.T) {
	tg := newTarget(t)
	p := Start(t, tg.URL)
	body := pattern(1 << 20)
	uri := "/hc-bucket/dir/a%20b/k%2Bplus%3D?partNumber=2&uploadId=x%2Fy"
	req, err := http.NewRequest(http.MethodPut, p.URL+uri, bytes.NewReader(body))
	if err != nil {
		t.Fatal(err)
	}
	req.Header.Set("Authorization", "AWS4-HMAC-SHA256 Credential=AK/20260101/us-east-1/s3/aws4_request, SignedHeaders=host;x-amz-date, Signature=abc")
	req.Header.Set("X-Amz-Date", "20260101T000000Z")
	req.Header.Set("X-Amz-Content-Sha256", "UNSIGNED-PAYLOAD")
	req.Header.Set("X-Amz-Meta-Robot", "r-1")
	resp, err := client(5 * time.Second).Do(req)
	if err != nil {
		t.Fatal(err)
	}
	got, _ := io.ReadAll(resp.Body)
	resp.Body.Close()
	if resp.StatusCode != http.StatusCreated || string(got) != "created" ||
		resp.Header.Get("ETag") != `"etag-1"` || resp.Header.Get("X-Amz-Request-Id") != "target-7" {
		t.Fatalf("response %d %q %v", resp.StatusCode, got, resp.Header)
	}
	if tg.count() != 1 {
		t.Fatalf("target saw %d requests, want 1", tg.count())
	}
	s := tg.reqs[0]
	proxyHost := strings.TrimPrefix(p.URL, "http://")
	if s.Method != http.MethodPut || s.RequestURI != uri || s.Host != proxyHost {
		t.Fatalf("target saw %s %s Host %s; want PUT %s Host %s", s.Method, s.RequestURI, s.Host, uri, proxyHost)
	}
	for _, h := range []string{"Authorization", "X-Amz-Date", "X-Amz-Content-Sha256", "X-Amz-Meta-Robot"} {
		if s.Header.Get(h) != req.Header.Get(h) {
			t.Errorf("header %s: target saw %q, client sent %q", h, s.Header.Get(h), req.Header.Get(h))
		}
	}
	if s.Header.Get("Content-Length") != "1048576" {
		t.Errorf("Content-Length at target %q, want 1048576", s.Header.Get("Content-Length"))
	}
	for _, h := range []string{"X-Forwarded-For", "X-Forwarded-Host", "Forwarded"} {
		if v := s.Header.Values(h); len(v) > 0 {
			t.Errorf("proxy added %s: %q", h, v)
		}
	}
	if !bytes.Equal(s.Body, body) {
		t.Errorf("target body differs (%d bytes, want %d)", len(s.Body), len(body))
	}
	if p.Requests() != 1 || len(p.Injected()) != 0 {
		t.Errorf("Requests %d Injected %v, want 1 and none", p.Requests(), p.Injected())
	}
}

// Bodies stream both ways: the target gets the start of a request body
// before the client has written the rest, and the client gets the start of
// a response body before the target has written the rest. A proxy that
// buffered whole bodies would deadlock here (until the timeouts).
func TestStreamsBothWays(t *testing.T) {
	gotFirst := make(chan struct{})  // the target has read the request's first part
	readFirst := make(chan struct{}) // the client has read the response's first part
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		first := make([]byte, 5)
		if _, err := io.ReadFull(r.Body, first); err != nil || string(first) != "first" {
			http.Error(w, "bad first part", 400)
			return
		}
		close(gotFirst)
		rest, _ := io.ReadAll(r.Body)
		w.Write([]byte("head:" + string(rest) + ";"))
		w.(http.Flusher).Flush()
		select {
		case <-readFirst:
			io.WriteString(w, "tail")
		case <-time.After(5 * time.Second):
			io.WriteString(w, "timeout")
		}
	}))
	t.Cleanup(srv.Close)
	p := Start(t, srv.URL)

	pr, pw := io.Pipe()
	go func() {
		pw.Write([]byte("first"))
		select {
		case <-gotFirst:
			pw.Write([]byte("second"))
			pw.Close()
		case <-time.After(5 * time.Second):
			pw.CloseWithError(errors.New("target never got the first part"))
		}
	}()
	req, _ := http.NewRequest(http.MethodPost, p.URL+"/x", pr)
	resp, err := client(10 * time.Second).Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	head := make([]byte, len("head:second;"))
	if _, err := io.ReadFull(resp.Body, head); err != nil || string(head) != "head:second;" {
		t.Fatalf("response start %q (%v)", head, err)
	}
	close(readFirst)
	rest, err := io.ReadAll(resp.Body)
	if err != nil || string(rest) != "tail" {
		t.Fatalf("response rest %q (%v), want \"tail\"", rest, err)
	}
}

// s3ErrorDoc is the S3 error document (AWS S3 API Reference, "Error responses").
type s3ErrorDoc struct {
	XMLName   xml.Name `xml:"Error"`
	Code      string
	Message   string
	Resource  string
	RequestID string `xml:"RequestId"`
}

// Status500, SlowDown503, NotImplemented501 and AccessDenied403 answer
// without forwarding,
// with the status and the S3 error code that S3 uses for them (AWS S3 API
// Reference, "List of error codes": InternalError 500, SlowDown 503,
// NotImplemented 501, AccessDenied 403; the messages are from memory).
func TestErrorStatuses(t *testing.T) {
	for _, c := range []struct {
		kind    Kind
		status  int
		code    string
		message string
	}{
		{Status500, 500, "InternalError", "We encountered an internal error. Please try again."},
		{SlowDown503, 503, "SlowDown", "Please reduce your request rate."},
		{NotImplemented501, 501, "NotImplemented", "A header you provided implies functionality that is not implemented."},
		{AccessDenied403, 403, "AccessDenied", "Access Denied"},
	} {
		t.Run(c.kind.String(), func(t *testing.T) {
			tg := newTarget(t)
			p := Start(t, tg.URL)
			p.Set(Rule{Kind: c.kind, Times: 1})
			// A PUT with a body: the client must see the status, not a broken pipe.
			req, _ := http.NewRequest(http.MethodPut, p.URL+"/hc-bucket/key", bytes.NewReader(pattern(300<<10)))
			resp, err := client(5 * time.Second).Do(req)
			if err != nil {
				t.Fatal(err)
			}
			b, _ := io.ReadAll(resp.Body)
			resp.Body.Close()
			if resp.StatusCode != c.status || resp.Header.Get("Content-Type") != "application/xml" {
				t.Fatalf("status %d type %q, want %d application/xml", resp.StatusCode, resp.Header.Get("Content-Type"), c.status)
			}
			var doc s3ErrorDoc
			if err := xml.Unmarshal(b, &doc); err != nil {
				t.Fatalf("body %q: %v", b, err)
			}
			if doc.Code != c.code || doc.Message != c.message || doc.Resource != "/hc-bucket/key" || doc.RequestID != "faultproxy" {
				t.Fatalf("error document %+v", doc)
			}
			if tg.count() != 0 {
				t.Fatalf("target saw %d requests, want 0", tg.count())
			}
			// Times 1: the next request is forwarded.
			resp, body, err := get(t, client(5*time.Second), p.URL+"/blob/10")
			if err != nil || resp.StatusCode != 200 || string(body) != "abcdefghij" {
				t.Fatalf("second request: %v %q", err, body)
			}
			if want := map[Kind]int{c.kind: 1}; !maps.Equal(p.Injected(), want) || p.Requests() != 2 {
				t.Fatalf("Injected %v Requests %d, want %v and 2", p.Injected(), p.Requests(), want)
			}
		})
	}
}

// Reset closes the connection before any response: the client sees a
// connection error (ECONNRESET, or EOF when it reads the close first).
func TestReset(t *testing.T) {
	tg := newTarget(t)
	p := Start(t, tg.URL)
	p.Set(Rule{Kind: Reset, Method: http.MethodGet, Times: 1})
	resp, _, err := get(t, client(5*time.Second), p.URL+"/blob/10")
	if err == nil {
		t.Fatalf("GET through Reset succeeded: %d", resp.StatusCode)
	}
	if !errors.Is(err, syscall.ECONNRESET) && !errors.Is(err, io.EOF) {
		t.Fatalf("GET through Reset: %v, want ECONNRESET or EOF", err)
	}
	// A raw connection shows the RST itself: the read fails with ECONNRESET
	// (a plain close would read EOF).
	p.Set(Rule{Kind: Reset, Times: 1})
	conn, err := net.Dial("tcp", strings.TrimPrefix(p.URL, "http://"))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	conn.SetDeadline(time.Now().Add(5 * time.Second))
	io.WriteString(conn, "GET /blob/10 HTTP/1.1\r\nHost: x\r\n\r\n")
	n, err := conn.Read(make([]byte, 100))
	if n != 0 || !errors.Is(err, syscall.ECONNRESET) {
		t.Fatalf("raw read after Reset: %d bytes, %v; want 0 and ECONNRESET", n, err)
	}
	if tg.count() != 0 {
		t.Fatalf("target saw %d requests, want 0", tg.count())
	}
	if want := map[Kind]int{Reset: 2}; !maps.Equal(p.Injected(), want) || p.Requests() != 2 {
		t.Fatalf("Injected %v Requests %d, want %v and 2", p.Injected(), p.Requests(), want)
	}
}

// A trap for counting in retry tests: on a reused keep-alive connection,
// net/http itself replays an idempotent bodyless request that met a Reset
// ("Transport only retries a request upon encountering a network error if
// the connection has been already been used successfully and if the request
// is idempotent and either has no body or has its Request.GetBody defined",
// net/http Transport docs). The client then sees success, and the proxy one
// request more than the client's own attempts.
func TestResetOnReusedConnectionIsReplayedByNetHTTP(t *testing.T) {
	tg := newTarget(t)
	p := Start(t, tg.URL)
	c := &http.Client{Timeout: 5 * time.Second} // keep-alive
	if resp, body, err := get(t, c, p.URL+"/blob/3"); err != nil || resp.StatusCode != 200 || string(body) != "abc" {
		t.Fatalf("first GET: %v %q", err, body)
	}
	p.Set(Rule{Kind: Reset, Times: 1})
	resp, body, err := get(t, c, p.URL+"/blob/3")
	if err != nil || resp.StatusCode != 200 || string(body) != "abc" {
		t.Fatalf("GET on a reused connection through one Reset: %v %q, want a transparent replay", err, body)
	}
	if want := map[Kind]int{Reset: 1}; !maps.Equal(p.Injected(), want) || p.Requests() != 3 || tg.count() != 2 {
		t.Fatalf("Injected %v Requests %d target %d, want %v, 3, 2", p.Injected(), p.Requests(), tg.count(), want)
	}
}

// CutBody gives the client the status and the full Content-Length, then
// exactly half the body (rounded down) and an unexpected EOF; for a target
// response of unknown length too.
func TestCutBody(t *testing.T) {
	tg := newTarget(t)
	p := Start(t, tg.URL)
	for _, c := range []struct {
		path string
		size int
	}{{"/blob/1000", 1000}, {"/blob/1001", 1001}, {"/stream/3000", 3000}} {
		p.Set(Rule{Kind: CutBody, Times: 1})
		resp, err := client(5 * time.Second).Get(p.URL + c.path)
		if err != nil {
			t.Fatalf("%s: %v", c.path, err)
		}
		b, err := io.ReadAll(resp.Body)
		resp.Body.Close()
		if resp.StatusCode != 200 || resp.ContentLength != int64(c.size) {
			t.Errorf("%s: status %d length %d, want 200 and %d", c.path, resp.StatusCode, resp.ContentLength, c.size)
		}
		if !errors.Is(err, io.ErrUnexpectedEOF) {
			t.Errorf("%s: read error %v, want unexpected EOF", c.path, err)
		}
		if !bytes.Equal(b, pattern(c.size)[:c.size/2]) {
			t.Errorf("%s: got %d bytes, want the first %d", c.path, len(b), c.size/2)
		}
	}
	// Nothing to cut in a HEAD response: the connection closes before it.
	p.Set(Rule{Kind: CutBody, Times: 1})
	req, _ := http.NewRequest(http.MethodHead, p.URL+"/blob/10", nil)
	if resp, err := client(5 * time.Second).Do(req); err == nil {
		t.Errorf("HEAD through CutBody succeeded: %d", resp.StatusCode)
	}
	if want := map[Kind]int{CutBody: 4}; !maps.Equal(p.Injected(), want) || p.Requests() != 4 || tg.count() != 4 {
		t.Fatalf("Injected %v Requests %d target %d, want %v, 4, 4", p.Injected(), p.Requests(), tg.count(), want)
	}
}

// Delay of 500 ms exceeds a client timeout of 100 ms: the client times out
// well before the delay ends, and the request, whose client is gone, is
// never forwarded. A delay shorter than the timeout only slows the request.
func TestDelay(t *testing.T) {
	tg := newTarget(t)
	p := Start(t, tg.URL)
	p.Set(Rule{Kind: Delay, Delay: 500 * time.Millisecond, Times: 1})
	start := time.Now()
	_, _, err := get(t, client(100*time.Millisecond), p.URL+"/blob/10")
	elapsed := time.Since(start)
	var ne net.Error
	if !errors.As(err, &ne) || !ne.Timeout() {
		t.Fatalf("GET through a 500 ms delay with a 100 ms timeout: %v, want a timeout", err)
	}
	if elapsed >= 500*time.Millisecond {
		t.Fatalf("client waited %v, want about 100 ms", elapsed)
	}
	time.Sleep(600 * time.Millisecond) // past the delay
	if tg.count() != 0 {
		t.Fatalf("target saw %d requests after the client gave up, want 0", tg.count())
	}

	p.Set(Rule{Kind: Delay, Delay: 150 * time.Millisecond, Times: 1})
	start = time.Now()
	resp, body, err := get(t, client(5*time.Second), p.URL+"/blob/10")
	elapsed = time.Since(start)
	if err != nil || resp.StatusCode != 200 || string(body) != "abcdefghij" {
		t.Fatalf("GET through a short delay: %v %q", err, body)
	}
	if elapsed < 150*time.Millisecond {
		t.Fatalf("short delay took %v, want at least 150 ms", elapsed)
	}
	if want := map[Kind]int{Delay: 2}; !maps.Equal(p.Injected(), want) || p.Requests() != 2 || tg.count() != 1 {
		t.Fatalf("Injected %v Requests %d target %d, want %v, 2, 1", p.Injected(), p.Requests(), tg.count(), want)
	}
}

// statuses sends n GETs (or the given method) and returns their statuses.
func statuses(t *testing.T, p *Proxy, method, path string, n int) []int {
	t.Helper()
	c := client(5 * time.Second)
	var out []int
	for range n {
		req, _ := http.NewRequest(method, p.URL+path, nil)
		resp, err := c.Do(req)
		if err != nil {
			out = append(out, -1) // a connection fault
			continue
		}
		io.Copy(io.Discard, resp.Body)
		resp.Body.Close()
		out = append(out, resp.StatusCode)
	}
	return out
}

// Skip and Times count matches exactly; Times 0 injects forever.
func TestSkipTimes(t *testing.T) {
	tg := newTarget(t)
	p := Start(t, tg.URL)
	p.Set(Rule{Kind: Status500, Skip: 2, Times: 3})
	if got, want := statuses(t, p, "GET", "/blob/1", 8), []int{200, 200, 500, 500, 500, 200, 200, 200}; !slices.Equal(got, want) {
		t.Fatalf("Skip 2 Times 3: %v, want %v", got, want)
	}
	p.Set(Rule{Kind: SlowDown503, Skip: 1})
	if got, want := statuses(t, p, "GET", "/blob/1", 6), []int{200, 503, 503, 503, 503, 503}; !slices.Equal(got, want) {
		t.Fatalf("Skip 1 Times 0: %v, want %v", got, want)
	}
	want := map[Kind]int{Status500: 3, SlowDown503: 5}
	if !maps.Equal(p.Injected(), want) || p.Requests() != 14 || tg.count() != 6 {
		t.Fatalf("Injected %v Requests %d target %d, want %v, 14, 6", p.Injected(), p.Requests(), tg.count(), want)
	}
}

// Method, PathContains and Query select requests, and only selected requests
// count toward Skip; each rule counts its own matches, and the first rule
// that fires wins.
func TestMatching(t *testing.T) {
	tg := newTarget(t)
	p := Start(t, tg.URL)
	p.Set(Rule{Kind: Status500, Method: "PUT", PathContains: "/parts/", Query: "uploadId", Skip: 1})
	type call struct{ method, path string }
	calls := []call{
		{"PUT", "/b/parts/1?partNumber=1&uploadId=u"}, // match 1: skipped
		{"GET", "/b/parts/1?uploadId=u"},              // wrong method
		{"PUT", "/b/other/1?uploadId=u"},              // wrong path
		{"PUT", "/b/parts/1?partNumber=1"},            // wrong query
		{"PUT", "/b/parts/2?uploadId=u&partNumber=2"}, // match 2: injected
		{"PUT", "/b/parts%2F3?uploadId=u"},            // decoded path /b/parts/3: match 3
	}
	var got []int
	for _, c := range calls {
		got = append(got, statuses(t, p, c.method, c.path, 1)...)
	}
	if want := []int{201, 201, 201, 201, 500, 500}; !slices.Equal(got, want) {
		t.Fatalf("statuses %v, want %v", got, want)
	}

	// Two rules: each counts every request it matches, so the second rule's
	// Skip 1 means "the second request", though the first rule took the first.
	p.Set(Rule{Kind: SlowDown503, Times: 1}, Rule{Kind: Status500, Skip: 1, Times: 1}, Rule{Kind: Reset, Times: 1})
	if got, want := statuses(t, p, "GET", "/blob/1", 4), []int{503, 500, 200, 200}; !slices.Equal(got, want) {
		t.Fatalf("two rules: %v, want %v", got, want)
	}
	// The third rule matched (and so used up) the first request without
	// firing: the first rule won it.
	if want := map[Kind]int{Status500: 3, SlowDown503: 1}; !maps.Equal(p.Injected(), want) {
		t.Fatalf("Injected %v, want %v", p.Injected(), want)
	}
}

// Rules may be replaced while requests are being served: every request is
// either injected or forwarded, and the counts add up exactly.
func TestSetWhileServing(t *testing.T) {
	tg := newTarget(t)
	p := Start(t, tg.URL)
	const workers, each = 4, 40
	var (
		mu   sync.Mutex
		hist = map[int]int{}
		wg   sync.WaitGroup
	)
	stop := make(chan struct{})
	for range workers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			c := &http.Client{Timeout: 5 * time.Second} // keep-alive: GETs and 500s only, no resets
			for range each {
				resp, err := c.Get(p.URL + "/blob/3")
				if err != nil {
					mu.Lock()
					hist[-1]++
					mu.Unlock()
					continue
				}
				io.Copy(io.Discard, resp.Body)
				resp.Body.Close()
				mu.Lock()
				hist[resp.StatusCode]++
				mu.Unlock()
			}
		}()
	}
	setter := make(chan struct{})
	go func() {
		defer close(setter)
		for i := 0; ; i++ {
			select {
			case <-stop:
				return
			default:
			}
			if i%2 == 0 {
				p.Set(Rule{Kind: Status500, Times: 3})
			} else {
				p.Set()
			}
			time.Sleep(time.Millisecond)
		}
	}()
	wg.Wait()
	close(stop)
	<-setter
	inj := p.Injected()
	if hist[-1] != 0 || hist[200]+hist[500] != workers*each {
		t.Fatalf("outcomes %v, want %d of 200 or 500", hist, workers*each)
	}
	if inj[Status500] != hist[500] || len(inj) > 1 || p.Requests() != workers*each || tg.count() != hist[200] {
		t.Fatalf("Injected %v Requests %d target %d; outcomes %v", inj, p.Requests(), tg.count(), hist)
	}
}

// Closing ends handlers stuck in a long delay at once: nothing of the proxy
// outlives the test that started it.
func TestCloseEndsDelays(t *testing.T) {
	tg := newTarget(t)
	errc := make(chan error, 1)
	start := time.Now()
	t.Run("proxy", func(t *testing.T) {
		p := Start(t, tg.URL)
		p.Set(Rule{Kind: Delay, Delay: time.Hour})
		go func() {
			resp, err := client(time.Hour).Get(p.URL + "/blob/1")
			if err == nil {
				resp.Body.Close()
			}
			errc <- err
		}()
		for p.Requests() == 0 && time.Since(start) < 5*time.Second {
			time.Sleep(5 * time.Millisecond)
		}
	})
	if d := time.Since(start); d > 3*time.Second {
		t.Fatalf("cleanup took %v with a delayed request in flight", d)
	}
	select {
	case err := <-errc:
		if err == nil {
			t.Fatal("delayed request succeeded after close")
		}
	case <-time.After(3 * time.Second):
		t.Fatal("delayed request still pending after close")
	}
	if tg.count() != 0 {
		t.Fatalf("target saw %d requests", tg.count())
	}
}

// fatalRecorder is a testing.TB that records Fatalf instead of failing.
type fatalRecorder struct {
	testing.TB
	msgs []string
}

func (r *fatalRecorder) Helper() {}
func (r *fatalRecorder) Fatalf(format string, args ...any) {
	r.msgs = append(r.msgs, fmt.Sprintf(format, args...))
	runtime.Goexit()
}

// Invalid rules fail the test at Set and leave the old rules in place.
func TestSetRejectsInvalidRules(t *testing.T) {
	tg := newTarget(t)
	p := Start(t, tg.URL)
	p.Set(Rule{Kind: Status500})
	for _, c := range []struct {
		rule Rule
		want string
	}{
		{Rule{Kind: Kind(99)}, "unknown kind Kind(99)"},
		{Rule{Kind: Status500, Skip: -1}, "negative Skip (-1)"},
		{Rule{Kind: Status500, Times: -2}, "negative Skip (0) or Times (-2)"},
		{Rule{Kind: Delay}, "kind Delay needs a positive Delay"},
	} {
		r := &fatalRecorder{TB: t}
		p.t = r
		done := make(chan struct{})
		go func() {
			defer close(done)
			p.Set(Rule{Kind: Reset}, c.rule)
		}()
		<-done
		p.t = t
		if len(r.msgs) != 1 || !strings.Contains(r.msgs[0], "rule 1: "+c.want) {
			t.Errorf("Set(%+v): %q, want one failure with %q", c.rule, r.msgs, c.want)
		}
	}
	if got := statuses(t, p, "GET", "/blob/1", 1); !slices.Equal(got, []int{500}) {
		t.Fatalf("after rejected Sets: %v, want the old rule's 500", got)
	}
}

func TestKindString(t *testing.T) {
	got := []string{Status500.String(), SlowDown503.String(), Reset.String(), CutBody.String(), Delay.String(), NotImplemented501.String(), AccessDenied403.String(), Kind(9).String()}
	want := []string{"Status500", "SlowDown503", "Reset", "CutBody", "Delay", "NotImplemented501", "AccessDenied403", "Kind(9)"}
	if !slices.Equal(got, want) {
		t.Fatalf("%q, want %q", got, want)
	}
}

// Through the proxy, a real S3 server (versitygw) accepts the SDK's SigV4
// signatures, made for the proxy's Host, on keys that need escaping; and
// the SDK's own retries get past injected 500 and 503 answers.
func TestSignedRequestsThroughProxy(t *testing.T) {
	s := s3test.Start(t, "hc-proxy")
	p := Start(t, s.Endpoint)
	c := s3.New(s3.Options{
		Region:       s.Region,
		BaseEndpoint: aws.String(p.URL),
		UsePathStyle: true,
		Credentials:  credentials.NewStaticCredentialsProvider(s.AccessKey, s.SecretKey, ""),
	})
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	bucket := aws.String("hc-proxy")
	key := "logs/robot 1/a+b=c&d é.jsonl"
	body := pattern(100 << 10)
	if _, err := c.PutObject(ctx, &s3.PutObjectInput{Bucket: bucket, Key: aws.String(key), Body: bytes.NewReader(body)}); err != nil {
		t.Fatalf("PutObject through proxy: %v", err)
	}
	got, err := c.GetObject(ctx, &s3.GetObjectInput{Bucket: bucket, Key: aws.String(key)})
	if err != nil {
		t.Fatalf("GetObject through proxy: %v", err)
	}
	b, err := io.ReadAll(got.Body)
	got.Body.Close()
	if err != nil || !bytes.Equal(b, body) {
		t.Fatalf("GetObject body: %d bytes (%v), want %d", len(b), err, len(body))
	}
	if p.Requests() != 2 {
		t.Fatalf("proxy saw %d requests, want 2", p.Requests())
	}

	// One 503 SlowDown on the listing, one 500 on a PUT: the SDK retries
	// each once (both are retryable: AWS SDK retry behavior docs) and succeeds.
	p.Set(Rule{Kind: SlowDown503, Method: "GET", Query: "list-type=2", Times: 1},
		Rule{Kind: Status500, Method: "PUT", Times: 1})
	list, err := c.ListObjectsV2(ctx, &s3.ListObjectsV2Input{Bucket: bucket})
	if err != nil {
		t.Fatalf("ListObjectsV2 after one SlowDown: %v", err)
	}
	var keys []string
	for _, o := range list.Contents {
		keys = append(keys, aws.ToString(o.Key))
	}
	if !slices.Equal(keys, []string{key}) {
		t.Fatalf("listed %q, want [%q]", keys, key)
	}
	if _, err := c.PutObject(ctx, &s3.PutObjectInput{Bucket: bucket, Key: aws.String("second"),
		Body: strings.NewReader("two"), ChecksumAlgorithm: types.ChecksumAlgorithmCrc32}); err != nil {
		t.Fatalf("PutObject after one 500: %v", err)
	}
	if want := map[Kind]int{SlowDown503: 1, Status500: 1}; !maps.Equal(p.Injected(), want) || p.Requests() != 6 {
		t.Fatalf("Injected %v Requests %d, want %v and 6", p.Injected(), p.Requests(), want)
	}

	// A cut body is not retried by the SDK: the reader gets half the object
	// and an unexpected EOF, and resuming is the caller's business.
	p.Set(Rule{Kind: CutBody, Method: "GET", Times: 1})
	got, err = c.GetObject(ctx, &s3.GetObjectInput{Bucket: bucket, Key: aws.String(key)})
	if err != nil {
		t.Fatalf("GetObject through CutBody: %v", err)
	}
	b, err = io.ReadAll(got.Body)
	got.Body.Close()
	if !errors.Is(err, io.ErrUnexpectedEOF) || !bytes.Equal(b, body[:len(body)/2]) {
		t.Fatalf("cut GetObject: %d bytes, %v; want %d and unexpected EOF", len(b), err, len(body)/2)
	}
}
