package pipeline

import (
	"context"
	"errors"
	"io"
	"io/fs"
	"os"
	"path/filepath"
	"slices"
	"strings"
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

// TestLocalStoreListSymlinks: a source folder made of links (as a mirror
// of another folder often is) lists each linked file with the size of what
// it links to, which is what Open reads; a link to a folder is no object; a
// broken link is listed (reading it then fails, naming it).
func TestLocalStoreListSymlinks(t *testing.T) {
	ctx := context.Background()
	target := t.TempDir()
	if err := os.WriteFile(filepath.Join(target, "a.jsonl"), []byte("0123456789"), 0o644); err != nil {
		t.Fatal(err)
	}
	s := NewLocalStore(t.TempDir())
	for name, to := range map[string]string{
		"a.jsonl": filepath.Join(target, "a.jsonl"), "dir": target, "broken.jsonl": filepath.Join(target, "none"),
	} {
		if err := os.Symlink(to, s.Path(name)); err != nil {
			t.Fatal(err)
		}
	}
	var got []ObjectInfo
	if err := s.List(ctx, "", func(o ObjectInfo) error { got = append(got, o); return nil }); err != nil {
		t.Fatal(err)
	}
	if len(got) != 2 || got[0].Key != "a.jsonl" || got[0].Size != 10 || got[1].Key != "broken.jsonl" {
		t.Errorf("listed %+v, want a.jsonl (10 bytes) and broken.jsonl", got)
	}
	if _, err := s.Open(ctx, "broken.jsonl", 0); !errors.Is(err, ErrNotFound) || !strings.Contains(err.Error(), "broken.jsonl") {
		t.Errorf("open of a broken link: %v, want ErrNotFound naming it", err)
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
// manifest before it publishes: files the new manifest will not list go;
// those it will list stay (the same bytes, published again or kept), and so
// do unfinished writes, which may be a live commit's of the same content
// (Commit removes them once its manifest is in place).
func TestClearUnfinished(t *testing.T) {
	ctx := context.Background()
	s := NewLocalStore(t.TempDir())
	for _, k := range []string{"ds/v1/pairs/part-00000.parquet", "ds/v1/pairs/part-99999.parquet",
		"ds/v1/manifest.json" + tempMarker + "5", "ds/v2/pairs/part-99999.parquet"} {
		localWrite(t, s, k, "x")
	}
	keep := map[string]bool{"ds/v1/pairs/part-00000.parquet": true, "ds/v1/frames/part-00000.parquet": true}
	if err := clearStale(ctx, s, "ds/v1/", keep); err != nil {
		t.Fatal(err)
	}
	if got, want := localKeys(t, s, ""), []string{"ds/v1/pairs/part-00000.parquet", "ds/v2/pairs/part-99999.parquet"}; !slices.Equal(got, want) {
		t.Errorf("keys after clearing ds/v1/: %q, want %q", got, want)
	}
	if _, err := os.Stat(s.Path("ds/v1/manifest.json" + tempMarker + "5")); err != nil {
		t.Errorf("the unfinished write after clearing: %v, want it left", err)
	}
	if err := clearStale(ctx, s, "ds/v3/", keep); err != nil {
		t.Errorf("clearing a folder that does not exist: %v", err)
	}
	// A commit of the same version that finished meanwhile: the folder is
	// a version now, and nothing in it is touched.
	localWrite(t, s, "ds/v2/manifest.json", "{}")
	if err := clearStale(ctx, s, "ds/v2/", keep); !errors.Is(err, ErrVersionExists) {
		t.Errorf("clearing a folder that became a version: %v, want ErrVersionExists", err)
	}
	if got, want := localKeys(t, s, "ds/v2/"), []string{"ds/v2/manifest.json", "ds/v2/pairs/part-99999.parquet"}; !slices.Equal(got, want) {
		t.Errorf("keys of the version after a refused clearing: %q, want %q", got, want)
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

// TestLocalStoreSyncFolders: a durable store syncs the folders under a
// prefix and those above it up to its root, and fails naming the prefix
// when one cannot be synced (here: it does not exist); a store that is not
// durable does nothing.
func TestLocalStoreSyncFolders(t *testing.T) {
	ctx := context.Background()
	s := NewLocalStore(t.TempDir())
	s.Durable = true
	localWrite(t, s, "ds/v1/frames/split=train/part-00000.parquet", "PAR1")
	if err := s.SyncFolders(ctx, "ds/v1/"); err != nil {
		t.Fatalf("sync of a version's folders: %v", err)
	}
	err := s.SyncFolders(ctx, "ds/none/")
	if err == nil || !strings.Contains(err.Error(), "ds/none/") {
		t.Errorf("sync of a missing folder: %v, want an error naming it", err)
	}
	s.Durable = false
	if err := s.SyncFolders(ctx, "ds/none/"); err != nil {
		t.Errorf("a store that is not durable syncs nothing: %v", err)
	}
}
