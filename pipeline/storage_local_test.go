package pipeline

import (
	"bytes"
	"context"
	"errors"
	"io"
	"os"
	"strings"
	"syscall"
	"testing"
	"time"
)

// openWithin opens key in s, failing the test when Open has not returned
// after limit: a hang is a failure, never a stalled test run.
func openWithin(t *testing.T, s Store, key string, limit time.Duration) (io.ReadCloser, error) {
	t.Helper()
	type result struct {
		rc  io.ReadCloser
		err error
	}
	done := make(chan result, 1)
	go func() {
		rc, err := s.Open(context.Background(), key, 0)
		done <- result{rc, err}
	}()
	select {
	case r := <-done:
		return r.rc, r.err
	case <-time.After(limit):
		t.Fatalf("open %s did not return within %v", key, limit)
		return nil, nil
	}
}

// TestLocalStoreRefusesNonRegular: a named pipe named like an object, and
// a link to a character device, are listed (so that their item exists and
// fails naming them) but refused at open without blocking: a FIFO opened
// for reading without O_NONBLOCK waits for a writer forever (open(2), POSIX
// "O_NONBLOCK ... open() for reading-only shall return without delay"), and
// /dev/zero never ends. A regular file and a link to one open as before.
func TestLocalStoreRefusesNonRegular(t *testing.T) {
	s := NewLocalStore(t.TempDir())
	localWrite(t, s, "a.jsonl", "{}\n")
	if err := syscall.Mkfifo(s.Path("unit7.jsonl"), 0o644); err != nil {
		t.Fatal(err)
	}
	if err := os.Symlink("/dev/zero", s.Path("x.jsonl")); err != nil {
		t.Fatal(err)
	}
	if err := os.Symlink(s.Path("a.jsonl"), s.Path("linked.jsonl")); err != nil {
		t.Fatal(err)
	}
	if got, want := localKeys(t, s, ""), []string{"a.jsonl", "linked.jsonl", "unit7.jsonl", "x.jsonl"}; !slicesEqual(got, want) {
		t.Errorf("listed %q, want %q", got, want)
	}
	for key, kind := range map[string]string{"unit7.jsonl": "a named pipe", "x.jsonl": "a character device"} {
		rc, err := openWithin(t, s, key, 5*time.Second)
		if err == nil {
			rc.Close()
			t.Errorf("open %s: no error, want ErrNotRegular", key)
			continue
		}
		if !errors.Is(err, ErrNotRegular) || !strings.Contains(err.Error(), key) || !strings.Contains(err.Error(), kind) {
			t.Errorf("open %s: %v, want ErrNotRegular naming it and %q", key, err, kind)
		}
	}
	for _, key := range []string{"a.jsonl", "linked.jsonl"} {
		rc, err := openWithin(t, s, key, 5*time.Second)
		if err != nil {
			t.Fatalf("open %s: %v", key, err)
		}
		b, err := io.ReadAll(rc)
		if err != nil || string(b) != "{}\n" {
			t.Errorf("read %s: %q, %v", key, b, err)
		}
		if err := rc.Close(); err != nil {
			t.Errorf("close %s: %v", key, err)
		}
	}
}

func slicesEqual(a, b []string) bool { return strings.Join(a, "\x00") == strings.Join(b, "\x00") }

// tornFixture writes a file of n bytes of 'a' with its times set an hour
// back, so that a rewrite now moves the modification time whatever the file
// system's timestamp granularity.
func tornFixture(t *testing.T, s *LocalStore, key string, n int) {
	t.Helper()
	localWrite(t, s, key, strings.Repeat("a", n))
	past := time.Now().Add(-time.Hour)
	if err := os.Chtimes(s.Path(key), past, past); err != nil {
		t.Fatal(err)
	}
}

// rewriteInPlace overwrites the file's bytes with 'b', same size, through
// another descriptor, as a writer that does not replace the file would.
func rewriteInPlace(t *testing.T, path string, n int) {
	t.Helper()
	f, err := os.OpenFile(path, os.O_WRONLY, 0)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := f.WriteAt(bytes.Repeat([]byte("b"), n), 0); err != nil {
		t.Fatal(err)
	}
	if err := f.Close(); err != nil {
		t.Fatal(err)
	}
}

// TestLocalStoreTornRead: a file rewritten in place (same size) while it is
// read fails the read with ErrChanged naming it, at the end of the stream
// and at Close for a reader that stops early; a file left alone reads to
// io.EOF and closes cleanly.
func TestLocalStoreTornRead(t *testing.T) {
	const n = 1 << 20
	s := NewLocalStore(t.TempDir())

	tornFixture(t, s, "calm.jsonl", n)
	rc, err := s.Open(context.Background(), "calm.jsonl", 0)
	if err != nil {
		t.Fatal(err)
	}
	b, err := io.ReadAll(rc)
	if err != nil || len(b) != n {
		t.Errorf("read of an unchanged file: %d bytes, %v; want %d, no error", len(b), err, n)
	}
	if err := rc.Close(); err != nil {
		t.Errorf("close of an unchanged file: %v", err)
	}

	tornFixture(t, s, "torn.jsonl", n)
	rc, err = s.Open(context.Background(), "torn.jsonl", 0)
	if err != nil {
		t.Fatal(err)
	}
	half := make([]byte, n/2)
	if _, err := io.ReadFull(rc, half); err != nil {
		t.Fatal(err)
	}
	rewriteInPlace(t, s.Path("torn.jsonl"), n)
	rest, err := io.ReadAll(rc)
	if !errors.Is(err, ErrChanged) || !strings.Contains(err.Error(), "torn.jsonl changed while it was read") {
		t.Errorf("read of a file rewritten mid-read: %v, want ErrChanged naming it", err)
	}
	// The splice the check guards against: half of each content.
	if len(rest) != n/2 || half[0] != 'a' || rest[0] != 'b' {
		t.Errorf("fixture did not splice: first half %q…, rest %d bytes %q…", half[:1], len(rest), rest[:min(1, len(rest))])
	}
	if err := rc.Close(); !errors.Is(err, ErrChanged) {
		t.Errorf("close after a torn read: %v, want ErrChanged", err)
	}

	tornFixture(t, s, "early.jsonl", n)
	rc, err = s.Open(context.Background(), "early.jsonl", 0)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := io.ReadFull(rc, half); err != nil {
		t.Fatal(err)
	}
	rewriteInPlace(t, s.Path("early.jsonl"), n)
	if err := rc.Close(); !errors.Is(err, ErrChanged) || !strings.Contains(err.Error(), "early.jsonl") {
		t.Errorf("close of a file rewritten before the reader stopped: %v, want ErrChanged naming it", err)
	}
}

// TestLocalStoreOpenETag: the reader carries the tag of the file as opened,
// the same as its listing's, so that ingest can tell a file changed between
// listing and open.
func TestLocalStoreOpenETag(t *testing.T) {
	s := NewLocalStore(t.TempDir())
	localWrite(t, s, "a.jsonl", "{}\n")
	info, err := s.Stat(context.Background(), "a.jsonl")
	if err != nil {
		t.Fatal(err)
	}
	rc, err := Metered{Store: s, M: &Metrics{}}.Open(context.Background(), "a.jsonl", 0)
	if err != nil {
		t.Fatal(err)
	}
	defer rc.Close()
	e, ok := rc.(interface{ ETag() string })
	if !ok || e.ETag() != info.ETag {
		t.Errorf("reader's ETag %v, want the listing's %q", rc, info.ETag)
	}
}

// TestLocalStoreReadHonoursContext: a read after the context is done fails
// with its error, so a cancelled run stops at its next read.
func TestLocalStoreReadHonoursContext(t *testing.T) {
	s := NewLocalStore(t.TempDir())
	localWrite(t, s, "a.jsonl", strings.Repeat("x", 1000))
	ctx, cancel := context.WithCancel(context.Background())
	rc, err := s.Open(ctx, "a.jsonl", 0)
	if err != nil {
		t.Fatal(err)
	}
	defer rc.Close()
	buf := make([]byte, 100)
	if n, err := rc.Read(buf); n != 100 || err != nil {
		t.Fatalf("read before cancel: %d, %v", n, err)
	}
	cancel()
	if n, err := rc.Read(buf); n != 0 || !errors.Is(err, context.Canceled) || !strings.Contains(err.Error(), "a.jsonl") {
		t.Errorf("read after cancel: %d, %v; want 0 and context.Canceled naming the object", n, err)
	}
}
