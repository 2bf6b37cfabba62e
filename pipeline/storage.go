package pipeline

import (
	"context"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"math/rand/v2"
	"net/url"
	"os"
	"path"
	"path/filepath"
	"sort"
	"strings"
	"syscall"
)

// ErrNotFound is returned (wrapped) by a Store when a key does not exist.
var ErrNotFound = errors.New("not found")

// ErrExists is returned (wrapped) by PutNew when the key already exists.
var ErrExists = errors.New("already exists")

// ObjectInfo describes one stored object. ETag is the store's content tag
// when it has one (S3), or a stand-in built from size and modification time
// (local folders), so that caches can tell a changed object without reading it.
type ObjectInfo struct {
	Key     string // relative to the store's root, "/"-separated
	Size    int64
	ETag    string
	Version string // object version id, when the store keeps versions
}

// Store is the narrow storage interface every stage uses: a flat namespace of
// keys under one root. Implementations: a local folder (LocalStore) and S3;
// decorators (retries, metrics) wrap a Store and are Stores themselves.
type Store interface {
	// URI is the root, e.g. "file:///data/logs/" or "s3://bucket/prefix/".
	URI() string
	// List calls fn for every object whose key starts with prefix, in byte order of keys.
	List(ctx context.Context, prefix string, fn func(ObjectInfo) error) error
	// Stat returns the object's info, or an error wrapping ErrNotFound.
	Stat(ctx context.Context, key string) (ObjectInfo, error)
	// Open streams the object from offset to its end.
	Open(ctx context.Context, key string, offset int64) (io.ReadCloser, error)
	// Create returns a writer whose content becomes visible at key, atomically,
	// only when Commit is called; Abort (or a failed Commit) leaves nothing.
	Create(ctx context.Context, key string) (Upload, error)
	// Delete removes the object; a missing key is not an error.
	Delete(ctx context.Context, key string) error
}

// Upload is an object being written. Exactly one of Commit or Abort must be
// called; after Commit the object is complete and visible, after Abort there
// is no trace of it.
type Upload interface {
	io.Writer
	// Commit publishes the object. When exclusive, it fails with ErrExists if
	// the key already exists, and never replaces it.
	Commit(exclusive bool) error
	Abort() error
}

// ReadAll reads a whole (small) object: summaries, completion records, manifests.
func ReadAll(ctx context.Context, s Store, key string) ([]byte, error) {
	r, err := s.Open(ctx, key, 0)
	if err != nil {
		return nil, err
	}
	defer r.Close()
	b, err := io.ReadAll(r)
	if err != nil {
		return nil, fmt.Errorf("read %s: %w", JoinURI(s.URI(), key), err)
	}
	return b, nil
}

// BytesPutter is implemented by stores that write an object held in memory
// better in one request than through Create (S3: one conditional PUT).
type BytesPutter interface {
	PutBytes(ctx context.Context, key string, data []byte, exclusive bool) error
}

// Put writes a whole (small) object atomically.
func Put(ctx context.Context, s Store, key string, data []byte, exclusive bool) error {
	if p, ok := s.(BytesPutter); ok {
		return p.PutBytes(ctx, key, data, exclusive)
	}
	return putByCreate(ctx, s, key, data, exclusive)
}

func putByCreate(ctx context.Context, s Store, key string, data []byte, exclusive bool) error {
	u, err := s.Create(ctx, key)
	if err != nil {
		return err
	}
	if _, err := u.Write(data); err != nil {
		u.Abort()
		return fmt.Errorf("write %s: %w", JoinURI(s.URI(), key), err)
	}
	return u.Commit(exclusive)
}

// JoinURI joins a root URI (with or without its trailing "/") and a key.
func JoinURI(root, key string) string {
	if key == "" {
		return root
	}
	return strings.TrimSuffix(root, "/") + "/" + key
}

// OpenStore returns the Store for a resolved URI (file://, s3:// or a plain
// absolute path) with default connection settings.
func OpenStore(ctx context.Context, uri string) (Store, error) {
	return (&Opener{}).Open(ctx, uri)
}

// Opener opens the stores of one run: every store shares the run's
// connection settings and metrics, and is wrapped in the Metered decorator.
type Opener struct {
	Storage StorageConfig
	Metrics *Metrics
}

// Open returns the Store rooted at uri.
func (o *Opener) Open(ctx context.Context, uri string) (Store, error) {
	m := o.Metrics
	if m == nil {
		m = &Metrics{}
	}
	switch {
	case strings.HasPrefix(uri, "file://"):
		u, err := url.Parse(uri)
		if err != nil {
			return nil, fmt.Errorf("open store %s: %w", uri, err)
		}
		return Metered{Store: NewLocalStore(u.Path), M: m}, nil
	case strings.HasPrefix(uri, "s3://"):
		s, err := NewS3Store(ctx, uri, o.Storage, m)
		if err != nil {
			return nil, err
		}
		return Metered{Store: s, M: m}, nil
	case filepath.IsAbs(uri):
		return Metered{Store: NewLocalStore(uri), M: m}, nil
	}
	return nil, fmt.Errorf("open store %s: unsupported location (want file://, s3:// or an absolute path)", uri)
}

// Unwrap strips decorators (anything with an Unwrap method) off a Store, to
// reach the backend's own optional interfaces such as Linker.
func Unwrap(s Store) Store {
	for {
		u, ok := s.(interface{ Unwrap() Store })
		if !ok {
			return s
		}
		s = u.Unwrap()
	}
}

// LocalStore is a Store on a local folder. Writes go to a temporary file in
// the same folder and are renamed into place, so a reader never sees a
// partial object and a crash leaves only a temporary file that List ignores.
type LocalStore struct {
	root string
	// Durable makes every commit fsync the file before it is renamed into
	// place: wanted for published versions, not for the work area, where a
	// lost item is only redone.
	Durable bool
}

// NewLocalStore returns a Store rooted at the folder dir (which need not exist yet).
func NewLocalStore(dir string) *LocalStore {
	return &LocalStore{root: filepath.Clean(dir)}
}

// Root is the local folder.
func (s *LocalStore) Root() string { return s.root }

// URI implements Store.
func (s *LocalStore) URI() string { return "file://" + filepath.ToSlash(s.root) + "/" }

// Path returns the local file path of key.
func (s *LocalStore) Path(key string) string {
	return filepath.Join(s.root, filepath.FromSlash(key))
}

const tempMarker = ".hindcast-tmp-"

// List implements Store. Keys are walked in byte order; temporary files of
// unfinished writes are skipped.
func (s *LocalStore) List(ctx context.Context, prefix string, fn func(ObjectInfo) error) error {
	var keys []ObjectInfo
	start := s.root
	if dir := path.Dir(prefix); prefix != "" && dir != "." {
		start = s.Path(dir)
	}
	err := filepath.WalkDir(start, func(p string, d fs.DirEntry, err error) error {
		if err != nil {
			if errors.Is(err, fs.ErrNotExist) && p == start {
				if start == s.root {
					return fmt.Errorf("folder %s: %w", s.root, ErrNotFound)
				}
				return nil
			}
			return err
		}
		if err := ctx.Err(); err != nil {
			return err
		}
		if d.IsDir() || strings.Contains(d.Name(), tempMarker) {
			return nil
		}
		rel, err := filepath.Rel(s.root, p)
		if err != nil {
			return err
		}
		key := filepath.ToSlash(rel)
		if !strings.HasPrefix(key, prefix) {
			return nil
		}
		info, err := d.Info()
		if err != nil {
			return err
		}
		if d.Type()&fs.ModeSymlink != 0 {
			// A linked object is what it links to (Open follows the link):
			// its size and time, not the link's. A link to a folder is no
			// object; a broken one stays listed, so that reading it fails
			// naming it.
			if to, err := os.Stat(p); err == nil {
				if to.IsDir() {
					return nil
				}
				info = to
			}
		}
		keys = append(keys, localInfo(key, info))
		return nil
	})
	if err != nil {
		return fmt.Errorf("list %s: %w", JoinURI(s.URI(), prefix), err)
	}
	// WalkDir's lexical order is per path element; keys compare as whole
	// strings ("a/b" vs "a-b"), so sort them as the SPEC's byte order says.
	sort.Slice(keys, func(i, j int) bool { return keys[i].Key < keys[j].Key })
	for _, k := range keys {
		if err := fn(k); err != nil {
			return err
		}
	}
	return nil
}

func localInfo(key string, info fs.FileInfo) ObjectInfo {
	return ObjectInfo{
		Key:  key,
		Size: info.Size(),
		ETag: fmt.Sprintf("%x-%x", info.Size(), info.ModTime().UnixNano()),
	}
}

// Stat implements Store.
func (s *LocalStore) Stat(ctx context.Context, key string) (ObjectInfo, error) {
	info, err := os.Stat(s.Path(key))
	if err != nil {
		if errors.Is(err, fs.ErrNotExist) {
			return ObjectInfo{}, fmt.Errorf("stat %s: %w", JoinURI(s.URI(), key), ErrNotFound)
		}
		return ObjectInfo{}, fmt.Errorf("stat %s: %w", JoinURI(s.URI(), key), err)
	}
	if info.IsDir() {
		return ObjectInfo{}, fmt.Errorf("stat %s: is a folder: %w", JoinURI(s.URI(), key), ErrNotFound)
	}
	return localInfo(key, info), nil
}

// ErrNotRegular is returned (wrapped) when a local object is not a regular
// file: a named pipe, a device or a socket (or a link to one). Reading one
// would block forever (a FIFO without a writer) or never end (/dev/zero), so
// it is refused at open, and the object's item fails naming it.
var ErrNotRegular = errors.New("not a regular file")

// ErrChanged is returned (wrapped) when a local object was modified while it
// was read: the bytes read may be a splice of two contents, so neither its
// SHA-256 nor anything derived from it can be trusted.
var ErrChanged = errors.New("changed while it was read")

// Open implements Store. The file is opened without blocking (O_NONBLOCK:
// opening a FIFO for reading would otherwise wait for a writer, past any
// signal) and refused unless it is a regular file, which ignores the flag.
// The reader compares the file's state at open with its state when it
// reaches the end or is closed, and fails with ErrChanged when they differ.
func (s *LocalStore) Open(ctx context.Context, key string, offset int64) (io.ReadCloser, error) {
	uri := JoinURI(s.URI(), key)
	f, err := os.OpenFile(s.Path(key), os.O_RDONLY|syscall.O_NONBLOCK, 0)
	if err != nil {
		if errors.Is(err, fs.ErrNotExist) {
			return nil, fmt.Errorf("open %s: %w", uri, ErrNotFound)
		}
		return nil, fmt.Errorf("open %s: %w", uri, err)
	}
	info, err := f.Stat()
	if err != nil {
		f.Close()
		return nil, fmt.Errorf("open %s: %w", uri, err)
	}
	if !info.Mode().IsRegular() {
		f.Close()
		return nil, fmt.Errorf("open %s: %w (%s); remove it or leave it out with source.exclude", uri, ErrNotRegular, fileKind(info.Mode()))
	}
	if offset > 0 {
		if _, err := f.Seek(offset, io.SeekStart); err != nil {
			f.Close()
			return nil, fmt.Errorf("open %s at %d: %w", uri, offset, err)
		}
	}
	return &localReader{ctx: ctx, f: f, uri: uri, at: stateOf(info), etag: localInfo(key, info).ETag}, nil
}

// fileKind names what a non-regular file is, for messages.
func fileKind(m fs.FileMode) string {
	switch {
	case m&fs.ModeNamedPipe != 0:
		return "a named pipe"
	case m&fs.ModeCharDevice != 0:
		return "a character device"
	case m&fs.ModeDevice != 0:
		return "a block device"
	case m&fs.ModeSocket != 0:
		return "a socket"
	case m.IsDir():
		return "a folder"
	}
	return "mode " + m.String()
}

// localReader reads an opened local file and checks, when it reaches the
// end and when it is closed, that the file is still as it was at open: same
// size, modification time, change time and inode (fileState). A file
// rewritten in place with the same size changes its times. A file replaced
// by another (renamed over it) is no splice: the open file keeps the inode it
// had, and is read whole as it was. What the check cannot see is a rewrite
// within the file system's timestamp granularity of the write before the
// open, which leaves both times as they were.
//
// A read after ctx is done fails with ctx's error, as an S3 read does: every
// stage streams from a store, so a cancelled run (SIGTERM) stops at its
// next read instead of at the end of its item.
type localReader struct {
	ctx     context.Context
	f       *os.File
	uri     string
	at      fileState
	etag    string
	checked bool
	err     error // the result of the check, once made
}

// ETag is the local stand-in tag (size and modification time) of the file
// as it was opened, so a reader can tell it differs from its listing.
func (r *localReader) ETag() string { return r.etag }

func (r *localReader) Read(p []byte) (int, error) {
	if err := r.ctx.Err(); err != nil {
		return 0, fmt.Errorf("read %s: %w", r.uri, err)
	}
	n, err := r.f.Read(p)
	if err == io.EOF {
		if cerr := r.check(); cerr != nil {
			return n, cerr
		}
	}
	return n, err
}

// check compares the file's state now with its state at open, once.
func (r *localReader) check() error {
	if r.checked {
		return r.err
	}
	r.checked = true
	info, err := r.f.Stat()
	if err != nil {
		r.err = fmt.Errorf("read %s: %w", r.uri, err)
		return r.err
	}
	if what := r.at.diff(stateOf(info)); what != "" {
		r.err = fmt.Errorf("%s %w (%s differ from when it was opened); run again", r.uri, ErrChanged, what)
	}
	return r.err
}

// Close closes the file; a file that changed since it was opened makes it
// fail with ErrChanged, for readers that stop before the end.
func (r *localReader) Close() error {
	cerr := r.check()
	if err := r.f.Close(); err != nil {
		return fmt.Errorf("close %s: %w", r.uri, err)
	}
	return cerr
}

// Create implements Store.
func (s *LocalStore) Create(ctx context.Context, key string) (Upload, error) {
	dst := s.Path(key)
	if err := os.MkdirAll(filepath.Dir(dst), 0o755); err != nil {
		return nil, fmt.Errorf("create %s: %w", JoinURI(s.URI(), key), err)
	}
	f, err := createTemp(dst)
	if err != nil {
		return nil, fmt.Errorf("create %s: %w", JoinURI(s.URI(), key), err)
	}
	return &localUpload{f: f, dst: dst, uri: JoinURI(s.URI(), key), sync: s.Durable}, nil
}

// createTemp creates a new temporary file beside dst. Unlike os.CreateTemp
// (mode 0600) it asks for mode 0666, so that the process's umask decides,
// as for any file a tool writes: a published dataset is then readable by
// whoever the operator's umask lets read it, and not by its writer alone.
func createTemp(dst string) (*os.File, error) {
	for range 100 {
		name := fmt.Sprintf("%s%s%d", dst, tempMarker, rand.Uint32())
		f, err := os.OpenFile(name, os.O_RDWR|os.O_CREATE|os.O_EXCL, 0o666)
		if errors.Is(err, fs.ErrExist) {
			continue
		}
		return f, err
	}
	return nil, fmt.Errorf("no free temporary name beside %s", dst)
}

// syncPath flushes a file's data, or a folder's names, to disk: on POSIX
// file systems a rename or link into a folder is only durable once the
// folder is synced.
func syncPath(name string) error {
	f, err := os.Open(name)
	if err != nil {
		return err
	}
	defer f.Close()
	return f.Sync()
}

// SyncFolders implements FolderSyncer: for a durable store it syncs every
// folder under prefix and each folder above it up to the store's root, so
// that folders made for a version (its own, frames/, split=…/) are on disk
// with their names before the manifest that makes the version exist.
func (s *LocalStore) SyncFolders(ctx context.Context, prefix string) error {
	if !s.Durable {
		return nil
	}
	start := s.Path(prefix)
	err := filepath.WalkDir(start, func(p string, d fs.DirEntry, err error) error {
		if err != nil {
			return err
		}
		if d.IsDir() {
			return syncPath(p)
		}
		return nil
	})
	for dir := filepath.Dir(start); err == nil && strings.HasPrefix(dir, s.root) && dir != filepath.Dir(s.root); dir = filepath.Dir(dir) {
		err = syncPath(dir)
	}
	if err != nil {
		return fmt.Errorf("sync %s: %w", JoinURI(s.URI(), prefix), err)
	}
	return nil
}

// Delete implements Store.
func (s *LocalStore) Delete(ctx context.Context, key string) error {
	if err := os.Remove(s.Path(key)); err != nil && !errors.Is(err, fs.ErrNotExist) {
		return fmt.Errorf("delete %s: %w", JoinURI(s.URI(), key), err)
	}
	return nil
}

// DeletePrefix removes every object under prefix (used to clear a stage item
// before it is rewritten). A store that can remove a whole folder at once,
// temporary files of killed writers included, does so.
func DeletePrefix(ctx context.Context, s Store, prefix string) error {
	if d, ok := Unwrap(s).(interface {
		DeleteFolder(ctx context.Context, prefix string) error
	}); ok && strings.HasSuffix(prefix, "/") {
		return d.DeleteFolder(ctx, prefix)
	}
	var keys []string
	err := s.List(ctx, prefix, func(o ObjectInfo) error { keys = append(keys, o.Key); return nil })
	if err != nil && !errors.Is(err, ErrNotFound) {
		return err
	}
	for _, k := range keys {
		if err := s.Delete(ctx, k); err != nil {
			return err
		}
	}
	// What a killed writer left that List does not show (S3: its pending
	// multipart uploads, stored and billed until aborted).
	if u, ok := Unwrap(s).(UnfinishedDeleter); ok {
		return u.DeleteUnfinished(ctx, prefix)
	}
	return nil
}

// DeleteFolder removes the folder of prefix (ending in "/") with everything
// in it, including the temporary files a killed writer left, which List
// does not show.
func (s *LocalStore) DeleteFolder(ctx context.Context, prefix string) error {
	if err := os.RemoveAll(s.Path(prefix)); err != nil {
		return fmt.Errorf("delete %s: %w", JoinURI(s.URI(), prefix), err)
	}
	return nil
}

// DeleteUnfinished implements UnfinishedDeleter: it removes the temporary
// files of unfinished writes under prefix, which List does not show.
func (s *LocalStore) DeleteUnfinished(ctx context.Context, prefix string) error {
	start := s.Path(prefix)
	err := filepath.WalkDir(start, func(p string, d fs.DirEntry, err error) error {
		if err != nil {
			if errors.Is(err, fs.ErrNotExist) && p == start {
				return filepath.SkipAll
			}
			return err
		}
		if d.IsDir() || !strings.Contains(d.Name(), tempMarker) {
			return nil
		}
		if err := os.Remove(p); err != nil && !errors.Is(err, fs.ErrNotExist) {
			return err
		}
		return nil
	})
	if err != nil {
		return fmt.Errorf("delete unfinished writes %s: %w", JoinURI(s.URI(), prefix), err)
	}
	return nil
}

// Link implements Linker: a hard link publishes a local file without
// copying it; it fails (and the caller copies) across file systems.
func (s *LocalStore) Link(ctx context.Context, from Store, fromKey, key string) error {
	src, ok := Unwrap(from).(*LocalStore)
	if !ok {
		return fmt.Errorf("link %s: not a local store", JoinURI(from.URI(), fromKey))
	}
	dst, orig := s.Path(key), src.Path(fromKey)
	// Already published (a commit rerun after a crash): rename(2) of two
	// links of one file does nothing and would leave the temporary link.
	if a, err := os.Stat(orig); err == nil {
		if b, err := os.Stat(dst); err == nil && os.SameFile(a, b) {
			if s.Durable {
				return syncPath(orig) // the crash may have come before its sync
			}
			return nil
		}
	}
	if err := os.MkdirAll(filepath.Dir(dst), 0o755); err != nil {
		return err
	}
	// A name of its own per call: two runs publishing to one path must
	// not share (and remove) each other's temporary link.
	tmp := fmt.Sprintf("%s%slink%d-%d", dst, tempMarker, os.Getpid(), rand.Uint32())
	if s.Durable {
		// The work area writes without fsync; a published shard must be
		// on disk before the manifest that names it.
		if err := syncPath(orig); err != nil {
			return err
		}
	}
	if err := os.Link(orig, tmp); err != nil {
		return err
	}
	err := os.Rename(tmp, dst)
	os.Remove(tmp) // gone after a rename; there after a failed one
	if err == nil && s.Durable {
		err = syncPath(filepath.Dir(dst))
	}
	return err
}

type localUpload struct {
	f    *os.File
	dst  string
	uri  string
	sync bool
	done bool
}

func (u *localUpload) Write(p []byte) (int, error) { return u.f.Write(p) }

func (u *localUpload) Commit(exclusive bool) error {
	if u.done {
		return fmt.Errorf("commit %s: already finished", u.uri)
	}
	u.done = true
	tmp := u.f.Name()
	if u.sync {
		if err := u.f.Sync(); err != nil {
			u.f.Close()
			os.Remove(tmp)
			return fmt.Errorf("commit %s: %w", u.uri, err)
		}
	}
	if err := u.f.Close(); err != nil {
		os.Remove(tmp)
		return fmt.Errorf("commit %s: %w", u.uri, err)
	}
	if exclusive {
		// A hard link fails when the destination exists, which makes the
		// check and the publication one atomic step.
		err := os.Link(tmp, u.dst)
		os.Remove(tmp)
		if err != nil {
			if errors.Is(err, fs.ErrExist) {
				return fmt.Errorf("commit %s: %w", u.uri, ErrExists)
			}
			return fmt.Errorf("commit %s: %w", u.uri, err)
		}
		return u.syncFolder()
	}
	if err := os.Rename(tmp, u.dst); err != nil {
		os.Remove(tmp)
		return fmt.Errorf("commit %s: %w", u.uri, err)
	}
	return u.syncFolder()
}

func (u *localUpload) syncFolder() error {
	if !u.sync {
		return nil
	}
	if err := syncPath(filepath.Dir(u.dst)); err != nil {
		return fmt.Errorf("commit %s: sync its folder: %w", u.uri, err)
	}
	return nil
}

func (u *localUpload) Abort() error {
	if u.done {
		return nil
	}
	u.done = true
	u.f.Close()
	return os.Remove(u.f.Name())
}

func absPath(p string) (string, error) { return filepath.Abs(p) }

// RedactURI returns uri with any password replaced by "xxxxx" (net/url
// URL.Redacted), so that errors naming an endpoint never echo a secret.
// A string that does not parse as a URL is replaced whole, since it may
// still hold one.
func RedactURI(uri string) string {
	u, err := url.Parse(uri)
	if err != nil {
		return "(an unparsable URL)"
	}
	return u.Redacted()
}
