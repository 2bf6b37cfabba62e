package pipeline

import (
	"context"
	"errors"
	"io"
	"io/fs"
	"os"
	"path/filepath"
	"slices"
	"syscall"
	"testing"
)

// localKeys lists a local store's keys under prefix.
func localKeys(t *testing.T, s Store, prefix string) []string {
	t.Helper()
	var keys []string
	if err := s.List(context.Background(), prefix, func(o ObjectInfo) error { keys = append(keys, o.Key); return nil }); err != nil {
		t.Fatalf("list %q: %v", prefix, err)
	}
	return keys
}

// localWrite writes a file under the store's folder directly, as another
// process (or a killed writer) would have.
func localWrite(t *testing.T, s *LocalStore, key, text string) {
	t.Helper()
	p := s.Path(key)
	if err := os.MkdirAll(filepath.Dir(p), 0o755); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(p, []byte(text), 0o644); err != nil {
		t.Fatal(err)
	}
}

// TestLocalStoreList: keys in byte order of the whole key (SPEC §3.1), "a-b"
// before "a/b" since '-' (0x2D) < '/' (0x2F), which a walk of folder by
// folder would not give; unfinished writes are not objects.
func TestLocalStoreList(t *testing.T) {
	s := NewLocalStore(t.TempDir())
	for _, k := range []string{"a/b", "a-b", "a/a", "b", "a/c.jsonl" + tempMarker + "123"} {
		localWrite(t, s, k, k)
	}
	if got, want := localKeys(t, s, ""), []string{"a-b", "a/a", "a/b", "b"}; !slices.Equal(got, want) {
		t.Errorf("keys %q, want %q", got, want)
	}
	if got, want := localKeys(t, s, "a/"), []string{"a/a", "a/b"}; !slices.Equal(got, want) {
		t.Errorf("keys under a/ %q, want %q", got, want)
	}
	if got := localKeys(t, s, "none/"); len(got) != 0 {
		t.Errorf("keys under a missing folder: %q", got)
	}
	err := NewLocalStore(filepath.Join(t.TempDir(), "missing")).List(context.Background(), "", func(ObjectInfo) error { return nil })
	if !errors.Is(err, ErrNotFound) {
		t.Errorf("list of a missing root: %v, want ErrNotFound", err)
	}
}

// TestLocalStoreUpload: a write is invisible until committed, an aborted
// one leaves nothing, and an exclusive commit never replaces an object.
func TestLocalStoreUpload(t *testing.T) {
	ctx := context.Background()
	s := NewLocalStore(t.TempDir())
	u, err := s.Create(ctx, "d/x.bin")
	if err != nil {
		t.Fatal(err)
	}
	if _, err := u.Write([]byte("first")); err != nil {
		t.Fatal(err)
	}
	if _, err := s.Stat(ctx, "d/x.bin"); !errors.Is(err, ErrNotFound) {
		t.Errorf("stat before commit: %v, want ErrNotFound", err)
	}
	if got := localKeys(t, s, ""); len(got) != 0 {
		t.Errorf("keys before commit: %q", got)
	}
	if err := u.Commit(true); err != nil {
		t.Fatal(err)
	}
	if err := Put(ctx, s, "d/x.bin", []byte("second"), true); !errors.Is(err, ErrExists) {
		t.Errorf("exclusive put over an object: %v, want ErrExists", err)
	}
	r, err := s.Open(ctx, "d/x.bin", 2)
	if err != nil {
		t.Fatal(err)
	}
	b, _ := io.ReadAll(r)
	r.Close()
	if string(b) != "rst" {
		t.Errorf("read from offset 2: %q, want %q", b, "rst")
	}
	u, _ = s.Create(ctx, "d/y.bin")
	u.Write([]byte("dropped"))
	if err := u.Abort(); err != nil {
		t.Fatal(err)
	}
	entries, err := os.ReadDir(s.Path("d"))
	if err != nil {
		t.Fatal(err)
	}
	if len(entries) != 1 || entries[0].Name() != "x.bin" {
		t.Errorf("folder after an abort holds %v, want only x.bin", entries)
	}
}

// TestLocalStoreDeleteUnfinished: the temporary files of killed writers
// under the prefix go, finished files and what lies outside stay; a
// missing folder is nothing to do.
func TestLocalStoreDeleteUnfinished(t *testing.T) {
	ctx := context.Background()
	s := NewLocalStore(t.TempDir())
	unfinished := []string{"v/manifest.json" + tempMarker + "77", "v/pairs/part-0.parquet" + tempMarker + "link"}
	kept := []string{"v/pairs/part-0.parquet", "w/z" + tempMarker + "1"}
	for _, k := range append(slices.Clone(unfinished), kept...) {
		localWrite(t, s, k, "x")
	}
	if err := s.DeleteUnfinished(ctx, "v/"); err != nil {
		t.Fatal(err)
	}
	for _, k := range unfinished {
		if _, err := os.Stat(s.Path(k)); !errors.Is(err, fs.ErrNotExist) {
			t.Errorf("%s after DeleteUnfinished: %v, want gone", k, err)
		}
	}
	for _, k := range kept {
		if _, err := os.Stat(s.Path(k)); err != nil {
			t.Errorf("%s after DeleteUnfinished of v/: %v, want kept", k, err)
		}
	}
	if err := s.DeleteUnfinished(ctx, "none/"); err != nil {
		t.Errorf("DeleteUnfinished of a missing folder: %v", err)
	}
}

// TestClearUnfinished is what a commit does to a version folder without a
// manifest: files the new manifest will not list and unfinished writes go;
// those it will list stay (the same bytes, published again or kept).
func TestClearUnfinished(t *testing.T) {
	ctx := context.Background()
	s := NewLocalStore(t.TempDir())
	for _, k := range []string{"ds/v1/pairs/part-00000.parquet", "ds/v1/pairs/part-99999.parquet",
		"ds/v1/manifest.json" + tempMarker + "5", "ds/v2/pairs/part-99999.parquet"} {
		localWrite(t, s, k, "x")
	}
	keep := map[string]bool{"ds/v1/pairs/part-00000.parquet": true, "ds/v1/frames/part-00000.parquet": true}
	if err := clearUnfinished(ctx, s, "ds/v1/", keep); err != nil {
		t.Fatal(err)
	}
	if got, want := localKeys(t, s, ""), []string{"ds/v1/pairs/part-00000.parquet", "ds/v2/pairs/part-99999.parquet"}; !slices.Equal(got, want) {
		t.Errorf("keys after clearing ds/v1/: %q, want %q", got, want)
	}
	if _, err := os.Stat(s.Path("ds/v1/manifest.json" + tempMarker + "5")); !errors.Is(err, fs.ErrNotExist) {
		t.Errorf("the half-written manifest after clearing: %v, want gone", err)
	}
	if err := clearUnfinished(ctx, s, "ds/v3/", keep); err != nil {
		t.Errorf("clearing a folder that does not exist: %v", err)
	}
}

// TestLocalStoreFileMode: a committed file gets the mode any tool's new file
// gets under the process's umask (os.Create asks for 0666), not the 0600 of
// a temporary file, so that a published dataset is readable by whom the
// operator means it for.
func TestLocalStoreFileMode(t *testing.T) {
	// A known umask (common practice: 022), set for this test alone (no
	// test of this package runs in parallel), so that 0600 and the umask's
	// mode differ.
	old := syscall.Umask(0o022)
	defer syscall.Umask(old)
	ctx := context.Background()
	dir := t.TempDir()
	s := NewLocalStore(dir)
	if err := Put(ctx, s, "v/manifest.json", []byte("{}"), true); err != nil {
		t.Fatal(err)
	}
	if err := Put(ctx, s, "v/pairs.parquet", []byte("PAR1"), false); err != nil {
		t.Fatal(err)
	}
	ref, err := os.Create(filepath.Join(dir, "reference"))
	if err != nil {
		t.Fatal(err)
	}
	ref.Close()
	want, err := os.Stat(filepath.Join(dir, "reference"))
	if err != nil {
		t.Fatal(err)
	}
	for _, k := range []string{"v/manifest.json", "v/pairs.parquet"} {
		got, err := os.Stat(s.Path(k))
		if err != nil {
			t.Fatal(err)
		}
		if got.Mode().Perm() != want.Mode().Perm() || got.Mode().Perm() != 0o644 {
			t.Errorf("%s: mode %v, want %v (what os.Create gives under umask 022)", k, got.Mode().Perm(), want.Mode().Perm())
		}
	}
}
