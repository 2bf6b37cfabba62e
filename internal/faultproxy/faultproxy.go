// Package faultproxy is a reverse proxy on 127.0.0.1 that injects faults
// into chosen requests: error statuses, connection resets, cut bodies and
// delays. Tests put it between an S3 client and an S3 server to check that
// retries and resumption do what they should, with exact counts of what was
// injected.
//
// Requests that no rule picks are forwarded unchanged, with the Host header
// the client sent, so that SigV4 signatures (which cover Host) made for the
// proxy's address are accepted by the server behind it.
package faultproxy

import (
	"bytes"
	"context"
	"encoding/xml"
	"fmt"
	"io"
	"log"
	"net"
	"net/http"
	"net/http/httputil"
	"net/url"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"
)

// Kind is a kind of fault.
type Kind int

const (
	// Status500 answers 500 with an S3 InternalError XML body, without
	// forwarding.
	Status500 Kind = iota
	// SlowDown503 answers 503 with an S3 SlowDown XML body, without
	// forwarding.
	SlowDown503
	// Reset closes the client connection abruptly (TCP RST) before any
	// response, without forwarding.
	Reset
	// CutBody forwards, sends the response's full Content-Length header and
	// the first half of its body (rounded down), then closes the connection.
	// A response of unknown length is read whole first to learn its length.
	// A response without a body (HEAD, 204, 304, length 0) has nothing to
	// cut: the connection is closed before the response instead.
	CutBody
	// Delay waits Rule.Delay, then forwards, unless the client has gone
	// away by then.
	Delay
	// NotImplemented501 answers 501 with an S3 NotImplemented XML body,
	// without forwarding: a store that lacks a call or a header (such as a
	// conditional write), not a transient fault.
	NotImplemented501
	// AccessDenied403 answers 403 with an S3 AccessDenied XML body, without
	// forwarding: credentials that lack one permission.
	AccessDenied403
	numKinds
)

func (k Kind) String() string {
	switch k {
	case Status500:
		return "Status500"
	case SlowDown503:
		return "SlowDown503"
	case Reset:
		return "Reset"
	case CutBody:
		return "CutBody"
	case Delay:
		return "Delay"
	case NotImplemented501:
		return "NotImplemented501"
	case AccessDenied403:
		return "AccessDenied403"
	}
	return "Kind(" + strconv.Itoa(int(k)) + ")"
}

// Rule injects Kind into requests matching Method (empty = any), a path
// substring PathContains (of the decoded path; empty = any) and a raw query
// substring Query (e.g. "uploadId" or "list-type"; empty = any), skipping
// the first Skip matches, for Times matches (0 = forever).
//
// Every rule counts every request it matches, whether or not it or another
// rule fires on it; so Skip and Times always refer to the rule's own n-th
// match. When several rules would fire on a request, the first in the list
// wins.
type Rule struct {
	Kind                 Kind
	Method, PathContains string
	Query                string
	Skip, Times          int
	Delay                time.Duration // for Kind Delay
}

func (r Rule) matches(req *http.Request) bool {
	return (r.Method == "" || r.Method == req.Method) &&
		strings.Contains(req.URL.Path, r.PathContains) &&
		strings.Contains(req.URL.RawQuery, r.Query)
}

func (r Rule) validate() error {
	switch {
	case r.Kind < 0 || r.Kind >= numKinds:
		return fmt.Errorf("unknown kind %v", r.Kind)
	case r.Skip < 0 || r.Times < 0:
		return fmt.Errorf("negative Skip (%d) or Times (%d)", r.Skip, r.Times)
	case r.Kind == Delay && r.Delay <= 0:
		return fmt.Errorf("kind Delay needs a positive Delay, got %v", r.Delay)
	}
	return nil
}

// rule is a Rule and the number of requests it has matched.
type rule struct {
	Rule
	matched int
}

// fires counts a matching request and tells whether it falls in the rule's
// window of injected matches.
func (r *rule) fires() bool {
	r.matched++
	return r.matched > r.Skip && (r.Times == 0 || r.matched <= r.Skip+r.Times)
}

// Proxy is a fault-injecting reverse proxy in front of one target.
type Proxy struct {
	URL string // http://127.0.0.1:PORT

	t         testing.TB
	target    *url.URL
	srv       *http.Server
	transport *http.Transport
	forward   *httputil.ReverseProxy
	cancel    context.CancelFunc // cancels every request's context
	served    chan struct{}      // closed when srv.Serve has returned

	mu       sync.Mutex
	rules    []rule
	injected map[Kind]int
	requests int
	active   int  // handlers running
	closed   bool // no new handler may start
	idle     *sync.Cond
}

// closeTimeout bounds how long closing waits for running handlers, which
// end as soon as their contexts are cancelled.
const closeTimeout = 5 * time.Second

// Start starts a proxy in front of target (scheme and host only, e.g.
// "http://127.0.0.1:7070"); it closes on t.Cleanup.
func Start(t testing.TB, target string) *Proxy {
	t.Helper()
	u, err := url.Parse(target)
	if err != nil || (u.Scheme != "http" && u.Scheme != "https") || u.Host == "" ||
		(u.Path != "" && u.Path != "/") || u.RawQuery != "" {
		t.Fatalf("faultproxy: target %q: want scheme://host:port only (%v)", target, err)
	}
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatalf("faultproxy: listen: %v", err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	p := &Proxy{
		URL:    "http://" + l.Addr().String(),
		t:      t,
		target: u,
		// Not http.DefaultTransport: no proxy from the environment, no
		// transparent gzip (which would change what the client receives).
		transport: &http.Transport{
			DialContext:         (&net.Dialer{Timeout: 5 * time.Second}).DialContext,
			DisableCompression:  true,
			MaxIdleConnsPerHost: 16,
			IdleConnTimeout:     30 * time.Second,
		},
		cancel:   cancel,
		served:   make(chan struct{}),
		injected: map[Kind]int{},
	}
	p.idle = sync.NewCond(&p.mu)
	quiet := log.New(io.Discard, "", 0)
	p.forward = &httputil.ReverseProxy{
		Rewrite:       p.rewrite,
		Transport:     p.transport,
		FlushInterval: -1, // stream: pass every write on at once
		ErrorLog:      quiet,
		ErrorHandler: func(w http.ResponseWriter, _ *http.Request, err error) {
			http.Error(w, "faultproxy: forward: "+err.Error(), http.StatusBadGateway)
		},
	}
	p.srv = &http.Server{
		Handler:           p,
		BaseContext:       func(net.Listener) context.Context { return ctx },
		ReadHeaderTimeout: 10 * time.Second,
		ErrorLog:          quiet,
	}
	go func() {
		defer close(p.served)
		_ = p.srv.Serve(l) // returns http.ErrServerClosed on close
	}()
	t.Cleanup(p.close)
	return p
}

// rewrite points a forwarded request at the target, keeping the client's
// Host header: the client signed the Host it connected to (this proxy), and
// the server checks the signature against the Host it receives.
func (p *Proxy) rewrite(pr *httputil.ProxyRequest) {
	pr.Out.URL.Scheme = p.target.Scheme
	pr.Out.URL.Host = p.target.Host
	pr.Out.Host = pr.In.Host
}

// close stops serving, cancels running handlers (delays, forwards) and
// waits for them, so that nothing of the proxy outlives the test.
func (p *Proxy) close() {
	p.mu.Lock()
	p.closed = true
	p.mu.Unlock()
	_ = p.srv.Close()
	p.cancel()
	<-p.served
	done := make(chan struct{})
	go func() {
		p.mu.Lock()
		for p.active > 0 {
			p.idle.Wait()
		}
		p.mu.Unlock()
		close(done)
	}()
	select {
	case <-done:
	case <-time.After(closeTimeout):
		p.t.Errorf("faultproxy: handlers still running %v after close", closeTimeout)
	}
	p.transport.CloseIdleConnections()
}

// Set replaces the rules; their match counts start from zero. Safe while
// serving: a request already being handled keeps the rule it got. Call it
// from the test's goroutine (an invalid rule fails the test).
func (p *Proxy) Set(rules ...Rule) {
	p.t.Helper()
	rs := make([]rule, len(rules))
	for i, r := range rules {
		if err := r.validate(); err != nil {
			p.t.Fatalf("faultproxy: rule %d: %v", i, err)
		}
		rs[i] = rule{Rule: r}
	}
	p.mu.Lock()
	p.rules = rs
	p.mu.Unlock()
}

// Injected returns the faults injected so far, by kind, over all rules ever
// set (kinds never injected are absent).
func (p *Proxy) Injected() map[Kind]int {
	p.mu.Lock()
	defer p.mu.Unlock()
	out := make(map[Kind]int, len(p.injected))
	for k, n := range p.injected {
		out[k] = n
	}
	return out
}

// Requests returns the number of requests seen so far, injected or not.
func (p *Proxy) Requests() int {
	p.mu.Lock()
	defer p.mu.Unlock()
	return p.requests
}

// begin registers a handler, and picks the fault for its request, if any.
// It returns ok false when the proxy is closing.
func (p *Proxy) begin(req *http.Request) (fault Rule, inject, ok bool) {
	p.mu.Lock()
	defer p.mu.Unlock()
	if p.closed {
		return Rule{}, false, false
	}
	p.active++
	p.requests++
	for i := range p.rules {
		r := &p.rules[i]
		if r.matches(req) && r.fires() && !inject {
			fault, inject = r.Rule, true
		}
	}
	if inject {
		p.injected[fault.Kind]++
	}
	return fault, inject, true
}

func (p *Proxy) end() {
	p.mu.Lock()
	p.active--
	if p.active == 0 {
		p.idle.Broadcast()
	}
	p.mu.Unlock()
}

// ServeHTTP forwards the request or injects the fault that a rule picks.
func (p *Proxy) ServeHTTP(w http.ResponseWriter, req *http.Request) {
	fault, inject, ok := p.begin(req)
	if !ok {
		abort(w, false)
		return
	}
	defer p.end()
	if !inject {
		p.forward.ServeHTTP(w, req)
		return
	}
	switch fault.Kind {
	case Status500:
		s3Error(w, req, http.StatusInternalServerError, "InternalError", "We encountered an internal error. Please try again.")
	case SlowDown503:
		s3Error(w, req, http.StatusServiceUnavailable, "SlowDown", "Please reduce your request rate.")
	case NotImplemented501:
		s3Error(w, req, http.StatusNotImplemented, "NotImplemented", "A header you provided implies functionality that is not implemented.")
	case AccessDenied403:
		s3Error(w, req, http.StatusForbidden, "AccessDenied", "Access Denied")
	case Reset:
		abort(w, true)
	case CutBody:
		p.cutBody(w, req)
	case Delay:
		t := time.NewTimer(fault.Delay)
		defer t.Stop()
		select {
		case <-t.C:
			p.forward.ServeHTTP(w, req)
		case <-req.Context().Done():
			// The client is gone, or the proxy is closing: no answer at
			// all (returning would send an empty 200).
			abort(w, false)
		}
	}
}

// s3Error answers with an S3 error document (AWS S3 API Reference, "Error
// responses": <Error><Code/><Message/><Resource/><RequestId/></Error>).
// The request body is read first, as a server does before answering, so
// that the client sees the status rather than a broken pipe; unless the
// client waits for "100 Continue", in which case the answer comes instead.
func s3Error(w http.ResponseWriter, req *http.Request, status int, code, message string) {
	if !strings.EqualFold(req.Header.Get("Expect"), "100-continue") {
		_, _ = io.Copy(io.Discard, req.Body)
	}
	var b bytes.Buffer
	b.WriteString(xml.Header)
	b.WriteString("<Error><Code>")
	_ = xml.EscapeText(&b, []byte(code))
	b.WriteString("</Code><Message>")
	_ = xml.EscapeText(&b, []byte(message))
	b.WriteString("</Message><Resource>")
	_ = xml.EscapeText(&b, []byte(req.URL.Path))
	b.WriteString("</Resource><RequestId>faultproxy</RequestId></Error>")
	h := w.Header()
	h.Set("Content-Type", "application/xml")
	h.Set("Content-Length", strconv.Itoa(b.Len()))
	h.Set("X-Amz-Request-Id", "faultproxy")
	w.WriteHeader(status)
	_, _ = w.Write(b.Bytes())
}

// abort closes the client connection without a response: with a TCP RST
// (SO_LINGER 0) when rst, else with a plain close.
func abort(w http.ResponseWriter, rst bool) {
	hj, ok := w.(http.Hijacker)
	if !ok {
		panic(http.ErrAbortHandler) // the server closes the connection
	}
	conn, _, err := hj.Hijack()
	if err != nil {
		panic(http.ErrAbortHandler)
	}
	if tcp, ok := conn.(*net.TCPConn); ok && rst {
		_ = tcp.SetLinger(0)
	}
	_ = conn.Close()
}

// hopHeaders are the hop-by-hop headers a proxy must not pass on (RFC 9110
// §7.6.1), as httputil.ReverseProxy drops them.
var hopHeaders = []string{
	"Connection", "Proxy-Connection", "Keep-Alive", "Proxy-Authenticate",
	"Proxy-Authorization", "Te", "Trailer", "Transfer-Encoding", "Upgrade",
}

// cutBody forwards the request, then sends the response's status, headers
// and full Content-Length, but only half of the body, and closes the
// connection.
func (p *Proxy) cutBody(w http.ResponseWriter, req *http.Request) {
	out := req.Clone(req.Context())
	out.RequestURI = ""
	out.URL.Scheme = p.target.Scheme
	out.URL.Host = p.target.Host
	out.Host = req.Host
	if req.ContentLength == 0 {
		out.Body = nil
	}
	for _, h := range hopHeaders {
		out.Header.Del(h)
	}
	resp, err := p.transport.RoundTrip(out)
	if err != nil {
		http.Error(w, "faultproxy: forward: "+err.Error(), http.StatusBadGateway)
		return
	}
	defer resp.Body.Close()
	n := resp.ContentLength
	var body io.Reader = resp.Body
	bodyless := req.Method == http.MethodHead || resp.StatusCode == http.StatusNoContent ||
		resp.StatusCode == http.StatusNotModified || resp.StatusCode < 200
	if n < 0 && !bodyless {
		b, err := io.ReadAll(resp.Body)
		if err != nil {
			http.Error(w, "faultproxy: read response: "+err.Error(), http.StatusBadGateway)
			return
		}
		n, body = int64(len(b)), bytes.NewReader(b)
	}
	if bodyless || n <= 0 {
		abort(w, false)
		return
	}
	h := w.Header()
	for k, vv := range resp.Header {
		h[k] = vv
	}
	for _, k := range hopHeaders {
		h.Del(k)
	}
	h.Set("Content-Length", strconv.FormatInt(n, 10))
	w.WriteHeader(resp.StatusCode)
	if _, err := io.CopyN(w, body, n/2); err == nil {
		// Flush pushes the half body out of the response buffer, which a
		// hijack would otherwise drop.
		w.(http.Flusher).Flush()
	}
	abort(w, false)
}
