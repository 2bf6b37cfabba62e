package stages

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"net/url"
	"os"
	"path"
	"regexp"
	"strings"
	"syscall"

	"hindcast/pipeline"
	"hindcast/stages/imagecheck"
)

// Image references come from machines in the field (SPEC §1 `img`): a line
// must never make a run read outside the places its config names. Every
// reference is resolved to one allowed root (the source root or one of
// source.image_roots) and a key under it, and read confined to that root;
// anything else names no image, and its camera is image_missing.

var (
	// errBadRef marks an image reference that names no object hindcast may
	// read; such a camera counts as missing. The refusals below wrap it.
	errBadRef = errors.New("not an object key")
	// errOutside marks a reference that falls under no allowed root once
	// its scheme, host, percent escapes and dot segments are resolved, or a
	// local path that leads out of its root through a symbolic link.
	errOutside = fmt.Errorf("outside the source root and source.image_roots: %w", errBadRef)
	// errNotRegular marks a local reference to a device, FIFO, socket or
	// folder: only regular files are images, and opening anything else
	// can block or never end.
	errNotRegular = fmt.Errorf("not a regular file: %w", errBadRef)
	// errTooLarge marks an image larger than source.max_image_bytes.
	errTooLarge = fmt.Errorf("larger than source.max_image_bytes: %w", errBadRef)
	// errCorrupt marks a data URI whose payload does not decode.
	errCorrupt = errors.New("undecodable data URI")
)

// s3BucketName is the shape of an S3 bucket name: 3–63 of lower-case
// letters, digits, dots and hyphens, beginning and ending with a letter or
// digit (the S3 bucket naming rules, from memory). A reference to anything
// else names no bucket.
var s3BucketName = regexp.MustCompile(`^[a-z0-9][a-z0-9.-]{1,61}[a-z0-9]$`)

// imageRoot is one place image references may name.
type imageRoot struct {
	// uri is the root as the config resolves it, with a trailing slash:
	// "file:///abs/dir/" (decoded, cleaned) or "s3://bucket/prefix/".
	uri string
	// dir is the local folder of a file:// root ("" for any other).
	dir string
	// store reads the root's keys when it is not a local folder: the
	// source store, or one opened on first use for an s3:// image root.
	store pipeline.Store
}

// imageFetcher resolves and reads the image references of one object's
// lines. It keeps the folders it opened (os.Root) and the stores of s3://
// image roots for the object's other lines; close releases the folders.
type imageFetcher struct {
	env   *pipeline.Env
	max   int64
	roots []*imageRoot // the source root first, then source.image_roots
	// src is the source root, which relative keys name.
	src *imageRoot
	// local holds the open folders of file:// roots, by folder.
	local map[string]*os.Root
	// metrics counts the bytes read from local folders, which pass no
	// metered store (nil when the source store is not metered).
	metrics *pipeline.Metrics
}

// newImageFetcher returns the fetcher of env's config: the source root and
// source.image_roots, each image bounded by source.max_image_bytes.
func newImageFetcher(env *pipeline.Env) *imageFetcher {
	fe := &imageFetcher{env: env, local: map[string]*os.Root{}}
	if env.Config != nil {
		fe.max = env.Config.Source.MaxImageBytes
	}
	if fe.max <= 0 {
		fe.max = 16 << 20 // SPEC §2's default
	}
	if m, ok := env.Source.(pipeline.Metered); ok {
		fe.metrics = m.M
	}
	fe.src = &imageRoot{uri: env.Source.URI(), store: env.Source}
	if ls, ok := pipeline.Unwrap(env.Source).(*pipeline.LocalStore); ok {
		fe.src.dir, fe.src.store = ls.Root(), nil
		fe.src.uri = "file://" + path.Clean(ls.Root()) + "/"
	}
	fe.roots = append(fe.roots, fe.src)
	if env.Config != nil {
		for _, u := range env.Config.Source.ImageRoots {
			r := &imageRoot{uri: u}
			if strings.HasPrefix(u, "file://") {
				r.dir = path.Clean(strings.TrimPrefix(u, "file://"))
			}
			fe.roots = append(fe.roots, r)
		}
	}
	return fe
}

// close releases the folders the fetcher opened (stores hold no files).
func (fe *imageFetcher) close() error {
	var errs []error
	for _, r := range fe.local {
		errs = append(errs, r.Close())
	}
	clear(fe.local)
	return errors.Join(errs...)
}

// fetch returns the bytes an image reference names: an RFC 2397 data URI,
// an absolute file:// or s3:// URI, or a key relative to the source root.
// A reference that names nothing hindcast may read returns an error
// wrapping errBadRef (or pipeline.ErrNotFound); other errors are failures
// of the run.
func (fe *imageFetcher) fetch(ctx context.Context, ref string) ([]byte, error) {
	if imagecheck.IsDataURI(ref) {
		_, b, err := imagecheck.DecodeDataURI(ref)
		if err != nil {
			return nil, errCorrupt
		}
		if int64(len(b)) > fe.max {
			return nil, errTooLarge
		}
		return b, nil
	}
	root, key, err := fe.resolve(ref)
	if err != nil {
		return nil, err
	}
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	var b []byte
	if root.dir != "" {
		b, err = fe.readLocal(root, key)
	} else {
		b, err = fe.readStore(ctx, root, key)
	}
	if err != nil {
		return nil, fmt.Errorf("image %s: %w", ref, err)
	}
	// The live read rate counts image bytes too, when the progress
	// display takes them.
	if ir, ok := fe.env.Progress.(interface{ ImageRead(n int64) }); ok {
		ir.ImageRead(int64(len(b)))
	}
	return b, nil
}

// resolve finds the allowed root a reference falls under and its key
// there. Schemes and the file host are case-insensitive (RFC 3986 §3.1,
// §3.2.2); "file://localhost/" is "file:///" (RFC 8089 §2); a file URI's
// path is percent-decoded (RFC 3986 §2.1) and its dot segments removed
// (RFC 3986 §5.2.4) before it is compared, so no spelling of a path leads
// out of its root.
func (fe *imageFetcher) resolve(ref string) (*imageRoot, string, error) {
	i := strings.Index(ref, "://")
	if i <= 0 {
		// A key relative to the source root, taken as written (object keys
		// are not percent-encoded); no segment may climb out of it.
		if !safeKey(ref) {
			return nil, "", errOutside
		}
		return fe.src, ref, nil
	}
	rest := ref[i+3:]
	switch strings.ToLower(ref[:i]) {
	case "file":
		host, p, ok := strings.Cut(rest, "/")
		if !ok || (host != "" && !strings.EqualFold(host, "localhost")) {
			return nil, "", errOutside
		}
		// A query or fragment is no part of a file (a name holding ? or #
		// writes it percent-encoded).
		if strings.ContainsAny(p, "?#") {
			return nil, "", errBadRef
		}
		dec, err := url.PathUnescape("/" + p)
		if err != nil || strings.IndexByte(dec, 0) >= 0 {
			return nil, "", errBadRef
		}
		clean := path.Clean(dec)
		var best *imageRoot
		for _, r := range fe.roots {
			// The outermost root that holds the path: a link inside an
			// inner root may lead anywhere under the outer one.
			if r.dir != "" && under(clean, r.dir) && (best == nil || len(r.dir) < len(best.dir)) {
				best = r
			}
		}
		if best == nil {
			return nil, "", errOutside
		}
		return best, strings.TrimPrefix(strings.TrimPrefix(clean, best.dir), "/"), nil
	case "s3":
		bucket, key, _ := strings.Cut(rest, "/")
		if !s3BucketName.MatchString(bucket) || !safeKey(key) {
			return nil, "", errOutside
		}
		full := "s3://" + bucket + "/" + key
		for _, r := range fe.roots {
			if r.dir == "" && strings.HasPrefix(r.uri, "s3://") && strings.HasPrefix(full, r.uri) && len(full) > len(r.uri) {
				return r, full[len(r.uri):], nil
			}
		}
		return nil, "", errOutside
	}
	// No store reads this scheme (SPEC §1 allows keys, file://, s3:// and
	// data: URIs): the reference names no object.
	return nil, "", errBadRef
}

// under reports whether the cleaned absolute path p lies strictly inside
// the folder dir.
func under(p, dir string) bool {
	if dir == "/" {
		return p != "/"
	}
	return strings.HasPrefix(p, dir+"/") && len(p) > len(dir)+1
}

// safeKey reports whether key names an object under its root: not empty,
// not absolute, no NUL, and no ".." segment, as written or once
// percent-decoded (a store or gateway that maps keys to files might decode
// or resolve them).
func safeKey(key string) bool {
	if key == "" || strings.HasPrefix(key, "/") || strings.IndexByte(key, 0) >= 0 {
		return false
	}
	forms := []string{key}
	if dec, err := url.PathUnescape(key); err == nil && dec != key {
		forms = append(forms, dec)
	}
	for _, k := range forms {
		if strings.HasPrefix(k, "/") || strings.IndexByte(k, 0) >= 0 {
			return false
		}
		for _, s := range strings.Split(k, "/") {
			if s == ".." {
				return false
			}
		}
	}
	return true
}

// readLocal reads key under the local folder of root, confined to it by
// os.Root (no "..", no symbolic link leading out). Only a regular file is
// read: its kind is checked before it is opened (so a device is never
// opened), it is opened non-blocking (so a FIFO swapped in meanwhile cannot
// hang the run) and checked again on the open file.
func (fe *imageFetcher) readLocal(root *imageRoot, key string) ([]byte, error) {
	dir, ok := fe.local[root.dir]
	if !ok {
		var err error
		if dir, err = os.OpenRoot(root.dir); err != nil {
			if localRefusal(err) {
				return nil, fmt.Errorf("open %s: %w", root.uri, pipeline.ErrNotFound)
			}
			return nil, fmt.Errorf("open %s: %w", root.uri, err)
		}
		fe.local[root.dir] = dir
	}
	info, err := dir.Stat(key)
	if err == nil {
		err = fe.admit(info)
	}
	if err != nil {
		return nil, localError(err)
	}
	f, err := dir.OpenFile(key, os.O_RDONLY|syscall.O_NONBLOCK|syscall.O_NOCTTY, 0)
	if err != nil {
		return nil, localError(err)
	}
	defer f.Close()
	info, err = f.Stat()
	if err == nil {
		err = fe.admit(info)
	}
	if err != nil {
		return nil, localError(err)
	}
	b, err := fe.readBounded(f, info.Size())
	if fe.metrics != nil {
		fe.metrics.BytesRead.Add(int64(len(b)))
	}
	return b, err
}

// admit accepts a regular file of at most max bytes.
func (fe *imageFetcher) admit(info fs.FileInfo) error {
	if !info.Mode().IsRegular() {
		return errNotRegular
	}
	if info.Size() > fe.max {
		return errTooLarge
	}
	return nil
}

// readStore reads key from root's store (the source store, or an s3://
// image root's, opened on first use).
func (fe *imageFetcher) readStore(ctx context.Context, root *imageRoot, key string) ([]byte, error) {
	if root.store == nil {
		open := fe.env.Resolve
		if open == nil {
			open = pipeline.OpenStore
		}
		s, err := open(ctx, root.uri)
		if err != nil {
			return nil, err
		}
		root.store = s
	}
	r, err := root.store.Open(ctx, key, 0)
	if err != nil {
		return nil, err
	}
	defer r.Close()
	return fe.readBounded(r, 0)
}

// readBounded reads r whole, or fails with errTooLarge as soon as it gives
// more than max bytes (an object can grow after it was measured).
func (fe *imageFetcher) readBounded(r io.Reader, size int64) ([]byte, error) {
	var buf bytes.Buffer
	buf.Grow(int(min(size, fe.max)) + bytes.MinRead)
	if _, err := buf.ReadFrom(io.LimitReader(r, fe.max+1)); err != nil {
		return nil, err
	}
	if int64(buf.Len()) > fe.max {
		return nil, errTooLarge
	}
	return buf.Bytes(), nil
}

// localError turns a refusal of a confined open into errOutside or
// ErrNotFound (the camera is missing) and keeps any other failure (a
// permission or I/O error under an allowed root) as a failure of the run.
func localError(err error) error {
	switch {
	case errors.Is(err, errBadRef):
		return err
	case errors.Is(err, fs.ErrNotExist):
		return fmt.Errorf("%w: %w", pipeline.ErrNotFound, err)
	case localRefusal(err):
		return fmt.Errorf("%w: %w", errOutside, err)
	}
	return err
}

// localRefusal reports whether a local open failed because of the name
// rather than the machine: os.Root's own refusal of a path leading out (an
// error that is no system error number), or a name the system cannot
// resolve to a file (no such file, a file where a folder should be, too
// many links, too long, invalid, a socket).
func localRefusal(err error) bool {
	var errno syscall.Errno
	if !errors.As(err, &errno) {
		return true
	}
	switch errno {
	case syscall.ENOENT, syscall.ENOTDIR, syscall.ELOOP, syscall.ENAMETOOLONG, syscall.EINVAL, syscall.ENXIO, syscall.EISDIR:
		return true
	}
	return false
}
