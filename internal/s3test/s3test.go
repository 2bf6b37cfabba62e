// Package s3test runs a real S3 server for tests: versitygw, an Apache-2.0
// S3 gateway written in Go, serving a posix folder on 127.0.0.1. The S3 store
// is tested against it rather than against a mock, so that signing, error
// codes, listing order and multipart rules are those of a real server.
//
// The server binary is pinned (Module@Version). It is found or, once per
// machine, built with `go install` into a cache folder; see Binary.
package s3test

import (
	"bytes"
	"context"
	"debug/buildinfo"
	"encoding/json"
	"errors"
	"fmt"
	"net"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/aws/aws-sdk-go-v2/aws"
	"github.com/aws/aws-sdk-go-v2/credentials"
	"github.com/aws/aws-sdk-go-v2/service/s3"
)

// The pinned server. A change of Version builds a new binary beside the old
// one in the cache folder (the folder name carries the version).
const (
	Module  = "github.com/versity/versitygw"
	Package = Module + "/cmd/versitygw"
	Version = "v1.8.0"
)

// EnvBinary names the environment variable that, when set, gives the path of
// the versitygw binary to use as is (no version check), e.g. on a machine
// where it was installed by other means.
const EnvBinary = "HINDCAST_VERSITYGW"

// Timeouts: the server answers within about a second once built; building
// takes minutes on a cold machine.
const (
	readyTimeout = 20 * time.Second
	stopTimeout  = 5 * time.Second
	buildTimeout = 30 * time.Minute
	startTries   = 3 // a free port can be taken by another process before the server binds it
)

// Server is a versitygw process serving a posix folder on 127.0.0.1.
type Server struct {
	Endpoint  string // "http://127.0.0.1:PORT"
	AccessKey string
	SecretKey string
	Region    string // "us-east-1"
	Root      string // the posix folder; a bucket is a sub-folder

	cmd    *exec.Cmd
	exited chan struct{} // closed when the process has exited
	output *tail         // the process's stdout and stderr, last part
	stop   sync.Once
}

// Start finds or builds the pinned versitygw binary, starts it on a free
// loopback port with its posix backend in t.TempDir(), waits until it
// answers, creates the given buckets, and stops it in t.Cleanup. When the
// server cannot be had: with the CI environment variable set, t.Fatal (an S3
// test never skips in CI); otherwise t.Skip with the reason.
//
// Bucket names must be valid S3 names (3 to 63 characters, lower case);
// an invalid one fails the test whether in CI or not.
func Start(t testing.TB, buckets ...string) *Server {
	t.Helper()
	bin, err := Binary()
	if err != nil {
		unavailable(t, err)
	}
	root := t.TempDir()
	var s *Server
	for try := 1; ; try++ {
		s, err = launch(bin, root)
		if err == nil {
			break
		}
		if s != nil {
			s.Stop()
			t.Logf("versitygw output (try %d):\n%s", try, s.output.String())
		}
		if try == startTries || !errors.Is(err, errPortTaken) {
			unavailable(t, err)
		}
	}
	// Cleanups run last-registered first: stop the server, then show what it
	// printed if the test failed, then remove root (t.TempDir's cleanup).
	t.Cleanup(func() {
		if t.Failed() {
			t.Logf("versitygw output:\n%s", s.output.String())
		}
	})
	t.Cleanup(s.Stop)

	ctx, cancel := context.WithTimeout(context.Background(), readyTimeout)
	defer cancel()
	c := s.Client()
	for _, b := range buckets {
		if _, err := c.CreateBucket(ctx, &s3.CreateBucketInput{Bucket: aws.String(b)}); err != nil {
			t.Fatalf("s3test: create bucket %q: %v", b, err)
		}
	}
	return s
}

// unavailable ends a test that cannot have its server: a failure in CI,
// where the server must always be there, a skip elsewhere.
func unavailable(t testing.TB, err error) {
	t.Helper()
	if inCI() {
		t.Fatalf("s3test: S3 server unavailable (CI is set, so this fails rather than skips): %v", err)
	}
	t.Skipf("s3test: S3 server unavailable: %v", err)
}

// inCI tells whether the CI environment variable is set to a true-ish value
// (CI services set CI=true; CI=false or CI=0 is taken as not set).
func inCI() bool {
	v := strings.TrimSpace(os.Getenv("CI"))
	if v == "" {
		return false
	}
	if b, err := strconv.ParseBool(v); err == nil {
		return b
	}
	return true
}

var errPortTaken = errors.New("port already in use")

// launch starts the server on a fresh port and waits until it answers. On an
// error after the process was started, the returned Server is non-nil so
// that the caller can stop it and show its output.
func launch(bin, root string) (*Server, error) {
	port, err := freePort()
	if err != nil {
		return nil, err
	}
	s := &Server{
		Endpoint:  "http://127.0.0.1:" + strconv.Itoa(port),
		AccessKey: "hindcasttest",
		SecretKey: "hindcasttestsecret",
		Region:    "us-east-1",
		Root:      root,
		exited:    make(chan struct{}),
		output:    &tail{max: 256 << 10},
	}
	// --keep-alive: a real S3 keeps connections open, and the store's
	// connection reuse should be tested as it will run.
	s.cmd = exec.Command(bin,
		"--port", "127.0.0.1:"+strconv.Itoa(port),
		"--access", s.AccessKey,
		"--secret", s.SecretKey,
		"--region", s.Region,
		"--keep-alive",
		"posix", root)
	s.cmd.Env = serverEnv(os.Environ())
	s.cmd.Stdout = s.output
	s.cmd.Stderr = s.output
	if err := s.cmd.Start(); err != nil {
		return nil, fmt.Errorf("start %s: %w", bin, err)
	}
	go func() {
		// Ends when the process exits; Stop makes sure it does.
		_ = s.cmd.Wait()
		close(s.exited)
	}()
	if err := s.waitReady(); err != nil {
		return s, err
	}
	return s, nil
}

// serverEnv is the parent's environment without the variables versitygw
// reads as defaults for its flags (VGW_*, ROOT_*, LOGFILE, WEBHOOK), so that
// a developer's own gateway settings do not change the test server.
func serverEnv(env []string) []string {
	out := make([]string, 0, len(env))
	for _, kv := range env {
		k, _, _ := strings.Cut(kv, "=")
		if strings.HasPrefix(k, "VGW_") || strings.HasPrefix(k, "ROOT_") || k == "LOGFILE" || k == "WEBHOOK" {
			continue
		}
		out = append(out, kv)
	}
	return out
}

// freePort asks the kernel for a free loopback port. Another process may take
// it before the server binds it; launch is retried then.
func freePort() (int, error) {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return 0, fmt.Errorf("find a free port: %w", err)
	}
	defer l.Close()
	return l.Addr().(*net.TCPAddr).Port, nil
}

// waitReady polls until the server answers any HTTP status on GET /, the
// process exits, or readyTimeout passes.
func (s *Server) waitReady() error {
	deadline := time.Now().Add(readyTimeout)
	addr := strings.TrimPrefix(s.Endpoint, "http://")
	client := &http.Client{Timeout: 2 * time.Second}
	defer client.CloseIdleConnections()
	for {
		select {
		case <-s.exited:
			if strings.Contains(s.output.String(), "address already in use") {
				return fmt.Errorf("versitygw exited at start: %w", errPortTaken)
			}
			return fmt.Errorf("versitygw exited at start (%v)", s.cmd.ProcessState)
		default:
		}
		if c, err := net.DialTimeout("tcp", addr, time.Second); err == nil {
			c.Close()
			if resp, err := client.Get(s.Endpoint + "/"); err == nil {
				resp.Body.Close()
				return nil
			}
		}
		if time.Now().After(deadline) {
			return fmt.Errorf("versitygw did not answer on %s within %v", s.Endpoint, readyTimeout)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// Stop ends the server (SIGTERM, then SIGKILL after a grace period) and
// waits for it to exit. It is called by Start's cleanup; a test may call it
// earlier to see how a client behaves when the server goes away. Safe to
// call more than once.
func (s *Server) Stop() {
	s.stop.Do(func() {
		select {
		case <-s.exited:
			return
		default:
		}
		_ = s.cmd.Process.Signal(syscall.SIGTERM)
		select {
		case <-s.exited:
		case <-time.After(stopTimeout):
			_ = s.cmd.Process.Kill()
			<-s.exited
		}
	})
}

// Env returns environment variables (AWS_ACCESS_KEY_ID,
// AWS_SECRET_ACCESS_KEY, AWS_REGION, AWS_ENDPOINT_URL_S3) for a child
// process to reach this server. Append them after os.Environ(): the last
// value of a variable wins. AWS_SESSION_TOKEN and AWS_PROFILE are emptied
// so that a developer's own credentials or profile do not leak into the
// child's requests, and the EC2 metadata lookup is disabled.
func (s *Server) Env() []string {
	return []string{
		"AWS_ACCESS_KEY_ID=" + s.AccessKey,
		"AWS_SECRET_ACCESS_KEY=" + s.SecretKey,
		"AWS_SESSION_TOKEN=",
		"AWS_PROFILE=",
		"AWS_REGION=" + s.Region,
		"AWS_ENDPOINT_URL_S3=" + s.Endpoint,
		"AWS_EC2_METADATA_DISABLED=true",
	}
}

// Client returns an S3 client for this server (path-style addressing, the
// SDK's default retries). Tests use it to look at or prepare bucket contents
// independently of the store under test.
func (s *Server) Client() *s3.Client {
	return s3.New(s3.Options{
		Region:       s.Region,
		BaseEndpoint: aws.String(s.Endpoint),
		UsePathStyle: true,
		Credentials:  credentials.NewStaticCredentialsProvider(s.AccessKey, s.SecretKey, ""),
	})
}

// Binary returns the path of the pinned versitygw binary, building it once if
// needed. Lookup order: $HINDCAST_VERSITYGW as is; then versitygw in
// $(go env GOBIN), $(go env GOPATH)/bin and $PATH, if it is the pinned
// version; then the cache folder $(go env GOCACHE)/../hindcast-tools
// (or os.UserCacheDir()/hindcast/tools when GOCACHE is off); else it is built
// there with `go install Package@Version`, under a file lock so that test
// packages running in parallel build it once.
func Binary() (string, error) {
	if p := os.Getenv(EnvBinary); p != "" {
		if err := executable(p); err != nil {
			return "", fmt.Errorf("%s=%s: %w", EnvBinary, p, err)
		}
		return p, nil
	}
	env, goErr := goEnv()
	var candidates []string
	if goErr == nil {
		if env.GOBIN != "" {
			candidates = append(candidates, filepath.Join(env.GOBIN, "versitygw"))
		}
		for _, dir := range filepath.SplitList(env.GOPATH) {
			candidates = append(candidates, filepath.Join(dir, "bin", "versitygw"))
		}
	}
	if p, err := exec.LookPath("versitygw"); err == nil {
		candidates = append(candidates, p)
	}
	for _, c := range candidates {
		if pinned(c) {
			return c, nil
		}
	}
	if goErr != nil {
		return "", fmt.Errorf("no versitygw %s found, and cannot build one: %w", Version, goErr)
	}
	dir, err := toolsDir(env)
	if err != nil {
		return "", err
	}
	return build(dir, env)
}

// goEnvironment holds the few `go env` values Binary needs.
type goEnvironment struct {
	GOBIN, GOPATH, GOCACHE, GOFLAGS string
}

func goEnv() (goEnvironment, error) {
	var env goEnvironment
	out, err := exec.Command("go", "env", "-json", "GOBIN", "GOPATH", "GOCACHE", "GOFLAGS").Output()
	if err != nil {
		return env, fmt.Errorf("go env: %w", err)
	}
	if err := json.Unmarshal(out, &env); err != nil {
		return env, fmt.Errorf("go env: %w", err)
	}
	return env, nil
}

// toolsDir is where built tools are kept: beside the Go build cache, so that
// a CI cache of that folder's parent keeps them too.
func toolsDir(env goEnvironment) (string, error) {
	if env.GOCACHE != "" && env.GOCACHE != "off" {
		return filepath.Join(filepath.Dir(env.GOCACHE), "hindcast-tools"), nil
	}
	dir, err := os.UserCacheDir()
	if err != nil {
		return "", fmt.Errorf("no folder to build versitygw into: %w", err)
	}
	return filepath.Join(dir, "hindcast", "tools"), nil
}

// build installs the pinned versitygw into dir/versitygw-VERSION/, unless a
// concurrent build (another test package) did it while this one waited for
// the lock. The binary is built in a temporary folder and renamed into place,
// so an interrupted build leaves no half-written binary to be found later.
func build(dir string, env goEnvironment) (string, error) {
	final := filepath.Join(dir, "versitygw-"+Version, "versitygw")
	if pinned(final) {
		return final, nil
	}
	if err := os.MkdirAll(filepath.Dir(final), 0o755); err != nil {
		return "", fmt.Errorf("build versitygw: %w", err)
	}
	lock, err := os.OpenFile(filepath.Join(dir, "versitygw-"+Version+".lock"), os.O_CREATE|os.O_RDWR, 0o644)
	if err != nil {
		return "", fmt.Errorf("build versitygw: %w", err)
	}
	defer lock.Close() // closing the file releases the lock
	for {
		err = syscall.Flock(int(lock.Fd()), syscall.LOCK_EX)
		if !errors.Is(err, syscall.EINTR) {
			break
		}
	}
	if err != nil {
		return "", fmt.Errorf("build versitygw: lock %s: %w", lock.Name(), err)
	}
	if pinned(final) {
		return final, nil
	}
	tmp, err := os.MkdirTemp(dir, "build-")
	if err != nil {
		return "", fmt.Errorf("build versitygw: %w", err)
	}
	defer os.RemoveAll(tmp)

	ctx, cancel := context.WithTimeout(context.Background(), buildTimeout)
	defer cancel()
	cmd := exec.CommandContext(ctx, "go", "install", Package+"@"+Version)
	// Outside any module and workspace: `go install pkg@version` builds the
	// pinned module's own dependency versions. A -mod=vendor in GOFLAGS makes
	// that mode fail ("cannot query module"), so -mod flags are dropped.
	cmd.Dir = tmp
	cmd.Env = append(os.Environ(), "GOBIN="+tmp, "GOWORK=off", "GOFLAGS="+withoutMod(env.GOFLAGS))
	out, err := cmd.CombinedOutput()
	if err != nil {
		return "", fmt.Errorf("go install %s@%s: %w\n%s", Package, Version, err, lastBytes(out, 4<<10))
	}
	if err := os.Rename(filepath.Join(tmp, "versitygw"), final); err != nil {
		return "", fmt.Errorf("build versitygw: %w", err)
	}
	if !pinned(final) {
		return "", fmt.Errorf("build versitygw: %s is not %s@%s after go install", final, Module, Version)
	}
	return final, nil
}

// withoutMod drops -mod=... from a GOFLAGS value.
func withoutMod(goflags string) string {
	var keep []string
	for _, f := range strings.Fields(goflags) {
		if !strings.HasPrefix(f, "-mod=") && !strings.HasPrefix(f, "--mod=") {
			keep = append(keep, f)
		}
	}
	return strings.Join(keep, " ")
}

func lastBytes(b []byte, n int) []byte {
	if len(b) > n {
		return b[len(b)-n:]
	}
	return b
}

// executable tells whether path is a regular file with an execute bit.
func executable(path string) error {
	fi, err := os.Stat(path)
	if err != nil {
		return err
	}
	if !fi.Mode().IsRegular() || fi.Mode().Perm()&0o111 == 0 {
		return fmt.Errorf("%s is not an executable file", path)
	}
	return nil
}

// versionLine matches the pinned version in `versitygw --version` output of
// a release build ("Version  : v1.8.0"); a `go install` build prints
// "Version  : git" there, and is recognised by its Go build info instead.
var versionLine = regexp.MustCompile(`(?m)^Version\s*:\s*v?` + regexp.QuoteMeta(strings.TrimPrefix(Version, "v")) + `\s*$`)

// pinned tells whether path is the pinned versitygw: by the module version
// recorded in the binary's Go build info, or, when the build info carries no
// version (a build from a checkout), by its --version output.
func pinned(path string) bool {
	if executable(path) != nil {
		return false
	}
	info, err := buildinfo.ReadFile(path)
	if err == nil {
		if info.Path != Package || info.Main.Path != Module {
			return false
		}
		if info.Main.Version == Version {
			return true
		}
		if info.Main.Version != "" && info.Main.Version != "(devel)" {
			return false
		}
	}
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	out, err := exec.CommandContext(ctx, path, "--version").Output()
	return err == nil && versionLine.Match(out)
}

// tail is an io.Writer keeping the last max bytes written, safe for
// concurrent use: the server's request log can be long, and only its end
// matters when a test fails.
type tail struct {
	mu      sync.Mutex
	max     int
	buf     []byte
	dropped int64
}

func (w *tail) Write(p []byte) (int, error) {
	w.mu.Lock()
	defer w.mu.Unlock()
	w.buf = append(w.buf, p...)
	if over := len(w.buf) - w.max; over > 0 {
		w.dropped += int64(over)
		w.buf = append(w.buf[:0], w.buf[over:]...)
	}
	return len(p), nil
}

func (w *tail) String() string {
	w.mu.Lock()
	defer w.mu.Unlock()
	var b bytes.Buffer
	if w.dropped > 0 {
		fmt.Fprintf(&b, "[... %d bytes dropped ...]\n", w.dropped)
	}
	b.Write(w.buf)
	return b.String()
}
