package inspect

import (
	"context"
	"errors"
	"fmt"
	"io"
	"sync"

	"github.com/parquet-go/parquet-go"

	"hindcast/pipeline"
)

// trMaxSkip is how far ahead of the open stream a read may start and still
// be served from it, the bytes between being read and dropped. On S3 every
// reopen is a GET of its own (tens of milliseconds); a few KiB of discarded
// bytes cost far less, on a local disk too. Farther jumps (over the obs
// chunk of a row group to its src chunk, say) reopen at the new offset.
const trMaxSkip = 8 << 10

// trReaderAt is an io.ReaderAt over one object of a pipeline.Store, so that
// the Parquet reader can fetch only the ranges it needs (footer, page
// indexes, the pages of a few column chunks) instead of the whole file.
// It keeps one stream open and serves sequential reads from it, since the
// Parquet reader reads column chunks front to back in small buffered
// steps; any other read reopens the object at its offset with
// Store.Open(ctx, key, offset).
type trReaderAt struct {
	// ctx is the lookup's: a reader lives for one Trace call, and
	// io.ReaderAt has no context of its own.
	ctx   context.Context
	store pipeline.Store
	key   string
	size  int64

	mu  sync.Mutex // the Parquet reader is not known to read from one goroutine only
	rc  io.ReadCloser
	pos int64 // offset of rc's next byte
	// read counts the bytes taken from the store, opens the streams
	// opened: what a lookup cost.
	read, opens int64
}

// trOpenReaderAt stats key for its size and returns a reader over it.
func trOpenReaderAt(ctx context.Context, store pipeline.Store, key string) (*trReaderAt, error) {
	info, err := store.Stat(ctx, key)
	if err != nil {
		return nil, err
	}
	return &trReaderAt{ctx: ctx, store: store, key: key, size: info.Size}, nil
}

// ReadAt implements io.ReaderAt: a short read only at the end of the
// object, with io.EOF.
func (r *trReaderAt) ReadAt(p []byte, off int64) (int, error) {
	if off < 0 {
		return 0, fmt.Errorf("read %s at %d: negative offset", r.key, off)
	}
	if off >= r.size {
		return 0, io.EOF
	}
	want := p
	if rest := r.size - off; int64(len(want)) > rest {
		want = want[:rest]
	}
	r.mu.Lock()
	defer r.mu.Unlock()
	if err := r.seek(off); err != nil {
		return 0, err
	}
	n, err := io.ReadFull(r.rc, want)
	r.pos += int64(n)
	r.read += int64(n)
	if err != nil {
		r.drop()
		if errors.Is(err, io.ErrUnexpectedEOF) || errors.Is(err, io.EOF) {
			return n, fmt.Errorf("read %s at %d: object shorter than its %d bytes: %w", r.key, off, r.size, io.ErrUnexpectedEOF)
		}
		return n, fmt.Errorf("read %s at %d: %w", r.key, off, err)
	}
	if len(want) < len(p) {
		return n, io.EOF
	}
	return n, nil
}

// seek positions the open stream at off, reusing it when off is at or a
// little ahead of its position.
func (r *trReaderAt) seek(off int64) error {
	if r.rc != nil && off >= r.pos && off-r.pos <= trMaxSkip {
		skipped, err := io.CopyN(io.Discard, r.rc, off-r.pos)
		r.pos += skipped
		r.read += skipped
		if err == nil {
			return nil
		}
		r.drop()
	} else if r.rc != nil {
		r.drop()
	}
	rc, err := r.store.Open(r.ctx, r.key, off)
	if err != nil {
		return fmt.Errorf("read %s at %d: %w", r.key, off, err)
	}
	r.rc, r.pos = rc, off
	r.opens++
	return nil
}

func (r *trReaderAt) drop() {
	if r.rc != nil {
		r.rc.Close()
		r.rc = nil
	}
}

// Close releases the open stream, if any.
func (r *trReaderAt) Close() error {
	r.mu.Lock()
	defer r.mu.Unlock()
	r.drop()
	return nil
}

// trOpenParquet opens the Parquet file at key reading only its footer: the
// page indexes and bloom filters are read later, per column chunk, when a
// lookup needs them, so that a file of many row groups costs its footer and
// the few chunks a query touches.
func trOpenParquet(ctx context.Context, store pipeline.Store, key string) (*parquet.File, *trReaderAt, error) {
	ra, err := trOpenReaderAt(ctx, store, key)
	if err != nil {
		return nil, nil, err
	}
	// The leading magic bytes are not read: the footer's own magic is
	// checked, and a read at offset 0 before the footer would cost a
	// request (or, within trMaxSkip, the bytes up to the footer).
	f, err := parquet.OpenFile(ra, ra.size, parquet.SkipMagicBytes(true),
		parquet.SkipPageIndex(true), parquet.SkipBloomFilters(true), parquet.FileReadMode(parquet.ReadModeSync))
	if err != nil {
		ra.Close()
		return nil, nil, fmt.Errorf("open %s: %w", key, err)
	}
	return f, ra, nil
}
