package s3test

import (
	"bytes"
	"context"
	"debug/buildinfo"
	"errors"
	"fmt"
	"io"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"slices"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/aws/aws-sdk-go-v2/aws"
	"github.com/aws/aws-sdk-go-v2/config"
	"github.com/aws/aws-sdk-go-v2/service/s3"
	"github.com/aws/smithy-go"
)

func ctxT(t *testing.T) context.Context {
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	t.Cleanup(cancel)
	return ctx
}

// The server answers signed requests, has exactly the buckets asked for, and
// keeps objects as files under Root/<bucket>/<key> (the posix layout that
// `versitygw posix --help` describes).
func TestStartServesBuckets(t *testing.T) {
	s := Start(t, "hc-beta", "hc-alpha")
	if !strings.HasPrefix(s.Endpoint, "http://127.0.0.1:") || s.Region != "us-east-1" {
		t.Fatalf("Endpoint %q Region %q, want http://127.0.0.1:PORT and us-east-1", s.Endpoint, s.Region)
	}
	ctx := ctxT(t)
	c := s.Client()

	out, err := c.ListBuckets(ctx, &s3.ListBucketsInput{})
	if err != nil {
		t.Fatalf("ListBuckets: %v", err)
	}
	var names []string
	for _, b := range out.Buckets {
		names = append(names, aws.ToString(b.Name))
	}
	slices.Sort(names)
	if want := []string{"hc-alpha", "hc-beta"}; !slices.Equal(names, want) {
		t.Fatalf("buckets %q, want %q", names, want)
	}
	for _, b := range []string{"hc-alpha", "hc-beta"} {
		if _, err := c.HeadBucket(ctx, &s3.HeadBucketInput{Bucket: aws.String(b)}); err != nil {
			t.Errorf("HeadBucket %s: %v", b, err)
		}
	}
	// A bucket that was not asked for does not exist: HeadBucket answers 404
	// NotFound (AWS S3 API reference, HeadBucket).
	_, err = c.HeadBucket(ctx, &s3.HeadBucketInput{Bucket: aws.String("hc-missing")})
	var apiErr smithy.APIError
	if !errors.As(err, &apiErr) || apiErr.ErrorCode() != "NotFound" {
		t.Errorf("HeadBucket hc-missing: %v, want NotFound", err)
	}

	body := "frame 1\nframe 2\n"
	if _, err := c.PutObject(ctx, &s3.PutObjectInput{
		Bucket: aws.String("hc-alpha"), Key: aws.String("logs/robot-1.jsonl"), Body: strings.NewReader(body),
	}); err != nil {
		t.Fatalf("PutObject: %v", err)
	}
	got, err := c.GetObject(ctx, &s3.GetObjectInput{Bucket: aws.String("hc-alpha"), Key: aws.String("logs/robot-1.jsonl")})
	if err != nil {
		t.Fatalf("GetObject: %v", err)
	}
	b, err := io.ReadAll(got.Body)
	got.Body.Close()
	if err != nil || string(b) != body {
		t.Fatalf("GetObject body %q (%v), want %q", b, err, body)
	}
	onDisk, err := os.ReadFile(filepath.Join(s.Root, "hc-alpha", "logs", "robot-1.jsonl"))
	if err != nil || string(onDisk) != body {
		t.Fatalf("file under Root: %q (%v), want %q", onDisk, err, body)
	}
}

// Start's cleanup stops the server: once the subtest that started it is
// over, nothing listens on its port any more.
func TestStopClosesPort(t *testing.T) {
	var addr string
	t.Run("server", func(t *testing.T) {
		s := Start(t)
		addr = strings.TrimPrefix(s.Endpoint, "http://")
		c, err := net.DialTimeout("tcp", addr, time.Second)
		if err != nil {
			t.Fatalf("dial a running server: %v", err)
		}
		c.Close()
	})
	if addr == "" {
		t.Fatal("subtest did not start a server")
	}
	c, err := net.DialTimeout("tcp", addr, time.Second)
	if err == nil {
		c.Close()
		t.Fatalf("%s still accepts connections after cleanup", addr)
	}
	if !errors.Is(err, syscall.ECONNREFUSED) {
		t.Fatalf("dial after cleanup: %v, want connection refused", err)
	}
}

// Stop may be called by a test before cleanup, and again by cleanup.
func TestStopTwice(t *testing.T) {
	s := Start(t)
	s.Stop()
	s.Stop()
	select {
	case <-s.exited:
	default:
		t.Fatal("process still running after Stop")
	}
	if _, err := net.DialTimeout("tcp", strings.TrimPrefix(s.Endpoint, "http://"), time.Second); err == nil {
		t.Fatal("port still open after Stop")
	}
}

// envChild is set in the environment of the child process of TestEnv.
const envChild = "HINDCAST_S3TEST_CHILD"

// A child process given os.Environ() + Env() reaches the server through the
// SDK's default configuration chain alone (no code-side endpoint, keys or
// region): it lists the buckets and writes an object.
func TestEnv(t *testing.T) {
	s := Start(t, "hc-env")
	want := []string{
		"AWS_ACCESS_KEY_ID=" + s.AccessKey,
		"AWS_SECRET_ACCESS_KEY=" + s.SecretKey,
		"AWS_SESSION_TOKEN=",
		"AWS_PROFILE=",
		"AWS_REGION=us-east-1",
		"AWS_ENDPOINT_URL_S3=" + s.Endpoint,
		"AWS_EC2_METADATA_DISABLED=true",
	}
	if got := s.Env(); !slices.Equal(got, want) {
		t.Fatalf("Env() = %q, want %q", got, want)
	}
	cmd := exec.Command(os.Args[0])
	// A stray session token or profile in the parent must not matter.
	cmd.Env = append(os.Environ(), "AWS_SESSION_TOKEN=stray", "AWS_PROFILE=no-such-profile", envChild+"=1")
	cmd.Env = append(cmd.Env, s.Env()...)
	out, err := cmd.CombinedOutput()
	if err != nil {
		t.Fatalf("child: %v\n%s", err, out)
	}
	if !strings.Contains(string(out), "child buckets: [hc-env]") {
		t.Fatalf("child output lacks its bucket list:\n%s", out)
	}
	onDisk, err := os.ReadFile(filepath.Join(s.Root, "hc-env", "from-child"))
	if err != nil || string(onDisk) != "written by the child" {
		t.Fatalf("object written by the child: %q (%v)", onDisk, err)
	}
}

// TestMain runs envChild instead of the tests when started as the child
// process of TestEnv.
func TestMain(m *testing.M) {
	if os.Getenv(envChild) != "" {
		if err := envChildMain(); err != nil {
			fmt.Fprintln(os.Stderr, "child:", err)
			os.Exit(1)
		}
		os.Exit(0)
	}
	os.Exit(m.Run())
}

// envChildMain is the child process of TestEnv: it knows the server only
// from its environment.
func envChildMain() error {
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	cfg, err := config.LoadDefaultConfig(ctx)
	if err != nil {
		return fmt.Errorf("LoadDefaultConfig: %w", err)
	}
	// Path-style addressing has no environment variable in the Go SDK (from
	// memory); a store sets it in code.
	c := s3.NewFromConfig(cfg, func(o *s3.Options) { o.UsePathStyle = true })
	out, err := c.ListBuckets(ctx, &s3.ListBucketsInput{})
	if err != nil {
		return fmt.Errorf("ListBuckets: %w", err)
	}
	var names []string
	for _, b := range out.Buckets {
		names = append(names, aws.ToString(b.Name))
	}
	fmt.Printf("child buckets: %v\n", names)
	if _, err := c.PutObject(ctx, &s3.PutObjectInput{
		Bucket: aws.String("hc-env"), Key: aws.String("from-child"), Body: strings.NewReader("written by the child"),
	}); err != nil {
		return fmt.Errorf("PutObject: %w", err)
	}
	return nil
}

// Binary finds (or builds) a binary that is the pinned module version.
func TestBinaryIsPinned(t *testing.T) {
	t.Setenv(EnvBinary, "")
	p, err := Binary()
	if err != nil {
		t.Fatalf("Binary: %v", err)
	}
	info, err := buildinfo.ReadFile(p)
	if err != nil {
		t.Fatalf("build info of %s: %v", p, err)
	}
	if info.Path != "github.com/versity/versitygw/cmd/versitygw" || info.Main.Version != "v1.8.0" {
		t.Fatalf("%s is %s %s, want github.com/versity/versitygw/cmd/versitygw v1.8.0", p, info.Path, info.Main.Version)
	}
}

// $HINDCAST_VERSITYGW is used as is when it is an executable file, and is an
// error (not a silent fallback) when it is not.
func TestBinaryEnvOverride(t *testing.T) {
	dir := t.TempDir()
	script := writeScript(t, dir, "fake-gw", "echo hello")
	t.Setenv(EnvBinary, script)
	if p, err := Binary(); err != nil || p != script {
		t.Fatalf("Binary() = %q, %v; want %q", p, err, script)
	}
	missing := filepath.Join(dir, "missing")
	t.Setenv(EnvBinary, missing)
	if p, err := Binary(); err == nil || !errors.Is(err, os.ErrNotExist) || !strings.Contains(err.Error(), missing) {
		t.Fatalf("Binary() with a missing override = %q, %v; want a not-exist error naming it", p, err)
	}
	notExec := filepath.Join(dir, "plain")
	if err := os.WriteFile(notExec, []byte("x"), 0o644); err != nil {
		t.Fatal(err)
	}
	t.Setenv(EnvBinary, notExec)
	if _, err := Binary(); err == nil {
		t.Fatal("Binary() accepted a file without an execute bit")
	}
}

func writeScript(t *testing.T, dir, name, body string) string {
	t.Helper()
	p := filepath.Join(dir, name)
	if err := os.WriteFile(p, []byte("#!/bin/sh\n"+body+"\n"), 0o755); err != nil {
		t.Fatal(err)
	}
	return p
}

// pinned accepts a binary by its Go build info, or by its --version output
// when it has no Go build info; anything else is refused.
func TestPinned(t *testing.T) {
	dir := t.TempDir()
	cases := []struct {
		name, version string
		want          bool
	}{
		// The --version layout is the one versitygw prints (observed:
		// "Version  : git" for a `go install` build).
		{"release", "Version  : v1.8.0", true},
		{"release-no-v", "Version  : 1.8.0", true},
		{"go-install", "Version  : git", false},
		{"other-release", "Version  : v1.8.1", false},
		{"older-release", "Version  : v1.7.0", false},
	}
	for _, c := range cases {
		p := writeScript(t, dir, c.name, "printf '%s\\n' '"+c.version+"' 'Build    : abc'")
		if got := pinned(p); got != c.want {
			t.Errorf("%s (%q): pinned = %v, want %v", c.name, c.version, got, c.want)
		}
	}
	// A Go binary of another program: this test binary.
	if pinned(os.Args[0]) {
		t.Errorf("pinned(%s) = true for the test binary", os.Args[0])
	}
	if pinned(filepath.Join(dir, "missing")) {
		t.Error("pinned = true for a missing file")
	}
	failing := writeScript(t, dir, "failing", "echo 'Version  : v1.8.0'; exit 3")
	if pinned(failing) {
		t.Error("pinned = true for a binary whose --version fails")
	}
}

// Two concurrent builds into the same empty cache folder build once: the
// second waits on the lock and finds the first one's binary (same inode),
// and no temporary build folder is left behind. Binary is called first, so
// that on a cold machine the one long build is the shared one, and this
// test only links again from the warm Go build cache (seconds). A machine
// that cannot build (no network, no go) skips, as Start does, except in CI.
func TestBuildOnceUnderLock(t *testing.T) {
	if _, err := Binary(); err != nil {
		unavailable(t, err)
	}
	env, err := goEnv()
	if err != nil {
		unavailable(t, err)
	}
	env.GOFLAGS += " -mod=vendor" // makes `go install pkg@version` fail ("cannot query module due to -mod=vendor", observed); build must drop it
	dir := t.TempDir()
	type result struct {
		path string
		fi   os.FileInfo
		err  error
	}
	results := make([]result, 2)
	var wg sync.WaitGroup
	for i := range results {
		wg.Add(1)
		go func() {
			defer wg.Done()
			p, err := build(dir, env)
			r := result{path: p, err: err}
			if err == nil {
				r.fi, r.err = os.Stat(p)
			}
			results[i] = r
		}()
	}
	wg.Wait()
	want := filepath.Join(dir, "versitygw-v1.8.0", "versitygw")
	for _, r := range results {
		if r.err != nil && strings.HasPrefix(r.err.Error(), "go install ") {
			unavailable(t, r.err)
		}
	}
	for i, r := range results {
		if r.err != nil || r.path != want {
			t.Fatalf("build %d: %q, %v; want %q", i, r.path, r.err, want)
		}
	}
	if !os.SameFile(results[0].fi, results[1].fi) {
		t.Fatal("the binary was built twice (two different files)")
	}
	if !pinned(want) {
		t.Fatalf("%s is not the pinned version", want)
	}
	entries, err := os.ReadDir(dir)
	if err != nil {
		t.Fatal(err)
	}
	var names []string
	for _, e := range entries {
		names = append(names, e.Name())
	}
	if w := []string{"versitygw-v1.8.0", "versitygw-v1.8.0.lock"}; !slices.Equal(names, w) {
		t.Fatalf("cache folder holds %q, want %q", names, w)
	}
}

func TestWithoutMod(t *testing.T) {
	if got := withoutMod("-buildvcs=false -mod=vendor  -trimpath --mod=mod"); got != "-buildvcs=false -trimpath" {
		t.Fatalf("withoutMod = %q", got)
	}
	if got := withoutMod(""); got != "" {
		t.Fatalf("withoutMod(\"\") = %q", got)
	}
}

func TestToolsDir(t *testing.T) {
	got, err := toolsDir(goEnvironment{GOCACHE: "/home/dev/.cache/go-build"})
	if err != nil || got != "/home/dev/.cache/hindcast-tools" {
		t.Fatalf("toolsDir = %q, %v", got, err)
	}
	t.Setenv("XDG_CACHE_HOME", "/var/cache/dev")
	got, err = toolsDir(goEnvironment{GOCACHE: "off"})
	// os.UserCacheDir is $XDG_CACHE_HOME on Linux (Go os package docs).
	if runtime.GOOS == "linux" && (err != nil || got != "/var/cache/dev/hindcast/tools") {
		t.Fatalf("toolsDir with GOCACHE=off = %q, %v", got, err)
	}
}

func TestServerEnvDropsGatewaySettings(t *testing.T) {
	in := []string{"PATH=/bin", "VGW_IAM_DIR=/x", "ROOT_ACCESS_KEY=a", "ROOT_SECRET_KEY=b", "LOGFILE=/y", "WEBHOOK=z", "HOME=/root", "MY_VGW_X=1"}
	want := []string{"PATH=/bin", "HOME=/root", "MY_VGW_X=1"}
	if got := serverEnv(in); !slices.Equal(got, want) {
		t.Fatalf("serverEnv = %q, want %q", got, want)
	}
}

func TestTail(t *testing.T) {
	w := &tail{max: 8}
	io.WriteString(w, "abc")
	if got := w.String(); got != "abc" {
		t.Fatalf("tail = %q", got)
	}
	io.WriteString(w, "defghij")    // 10 bytes in all: the first 2 dropped
	io.WriteString(w, "0123456789") // 20 in all: 12 dropped
	if got, want := w.String(), "[... 12 bytes dropped ...]\n23456789"; got != want {
		t.Fatalf("tail = %q, want %q", got, want)
	}
}

// recorder is a testing.TB that records how a test was ended.
type recorder struct {
	testing.TB
	mu     sync.Mutex
	fatal  []string
	skip   []string
	events bytes.Buffer
}

func (r *recorder) Fatalf(format string, args ...any) {
	r.mu.Lock()
	r.fatal = append(r.fatal, fmt.Sprintf(format, args...))
	r.mu.Unlock()
	runtime.Goexit()
}

func (r *recorder) Skipf(format string, args ...any) {
	r.mu.Lock()
	r.skip = append(r.skip, fmt.Sprintf(format, args...))
	r.mu.Unlock()
	runtime.Goexit()
}

func (r *recorder) Logf(format string, args ...any) { fmt.Fprintf(&r.events, format+"\n", args...) }
func (r *recorder) Helper()                         {}

// runTB runs f with a recorder in its own goroutine, as testing does, so
// that Fatalf/Skipf can end it.
func runTB(t *testing.T, f func(tb testing.TB)) *recorder {
	r := &recorder{TB: t}
	done := make(chan struct{})
	go func() {
		defer close(done)
		f(r)
	}()
	<-done
	return r
}

// When the server cannot be had, Start fails the test in CI and skips it
// elsewhere, with the reason.
func TestStartUnavailable(t *testing.T) {
	missing := filepath.Join(t.TempDir(), "no-versitygw")
	t.Setenv(EnvBinary, missing)
	for _, c := range []struct {
		ci        string
		wantFatal bool
	}{{"true", true}, {"1", true}, {"yes", true}, {"", false}, {"false", false}, {"0", false}} {
		t.Setenv("CI", c.ci)
		r := runTB(t, func(tb testing.TB) { Start(tb, "hc-x") })
		got := r.skip
		if c.wantFatal {
			got = r.fatal
		}
		if len(r.fatal)+len(r.skip) != 1 || len(got) != 1 || !strings.Contains(got[0], missing) {
			t.Errorf("CI=%q: fatal %q skip %q; want one %s naming %s", c.ci, r.fatal, r.skip,
				map[bool]string{true: "Fatal", false: "Skip"}[c.wantFatal], missing)
		}
	}
}

// A server whose process dies at start is reported with its output, and the
// reason is not mistaken for a taken port.
func TestLaunchProcessExits(t *testing.T) {
	script := writeScript(t, t.TempDir(), "dying-gw", "echo 'cannot open root' >&2; exit 2")
	s, err := launch(script, t.TempDir())
	if err == nil {
		s.Stop()
		t.Fatal("launch of a dying process succeeded")
	}
	if s == nil || errors.Is(err, errPortTaken) || !strings.Contains(err.Error(), "exited at start") {
		t.Fatalf("launch: %v (server %v); want an exit error", err, s != nil)
	}
	if got := s.output.String(); got != "cannot open root\n" {
		t.Fatalf("captured output %q", got)
	}
}

// A port taken by another listener is recognised from versitygw's own
// message, so that Start retries with another port.
func TestLaunchPortTaken(t *testing.T) {
	bin, err := Binary()
	if err != nil {
		unavailable(t, err)
	}
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer l.Close()
	port := l.Addr().(*net.TCPAddr).Port
	// A wrapper that forces the taken port, whatever launch chose.
	script := writeScript(t, t.TempDir(), "taken-gw",
		fmt.Sprintf(`exec %q --port 127.0.0.1:%d --access a --secret b posix "$(eval echo \${$#})"`, bin, port))
	s, err := launch(script, t.TempDir())
	if s != nil {
		s.Stop()
	}
	if !errors.Is(err, errPortTaken) {
		out := ""
		if s != nil {
			out = s.output.String()
		}
		t.Fatalf("launch on a taken port: %v; want errPortTaken\n%s", err, out)
	}
}
