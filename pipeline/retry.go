package pipeline

import (
	"context"
	"errors"
	"io"
	"math/rand/v2"
	"sync/atomic"
	"time"
)

// Metrics counts what the stores of a run did; the run's log and summary
// report them. All counters are safe for concurrent use.
type Metrics struct {
	Requests     atomic.Int64
	Retries      atomic.Int64
	BytesRead    atomic.Int64
	BytesWritten atomic.Int64
}

// Retrier repeats a request that failed in a way that may pass: exponential
// backoff with full jitter (the sleep before attempt n+1 is uniform on
// [0, min(Cap, Base·2^(n−1))]), at most Attempts tries in all. Every retry is
// counted in Metrics.
type Retrier struct {
	Attempts int
	Base     time.Duration
	Cap      time.Duration
	// Retryable decides which errors are worth repeating; nil means
	// retryableS3.
	Retryable func(error) bool
	Metrics   *Metrics
}

// Do runs fn until it succeeds, fails permanently, or runs out of attempts.
func (r *Retrier) Do(ctx context.Context, fn func(ctx context.Context) error) error {
	retryable := r.Retryable
	if retryable == nil {
		retryable = retryableS3
	}
	for attempt := 1; ; attempt++ {
		if r.Metrics != nil {
			r.Metrics.Requests.Add(1)
		}
		err := fn(ctx)
		if err == nil {
			return nil
		}
		if ctx.Err() != nil || errors.Is(err, context.Canceled) && ctx.Err() != nil {
			return err
		}
		if attempt >= r.Attempts || !retryable(err) {
			return err
		}
		if r.Metrics != nil {
			r.Metrics.Retries.Add(1)
		}
		if err := r.sleep(ctx, attempt); err != nil {
			return err
		}
	}
}

func (r *Retrier) sleep(ctx context.Context, attempt int) error {
	ceiling := r.Cap
	if d := r.Base << min(attempt-1, 30); d > 0 && d < ceiling {
		ceiling = d
	}
	wait := time.Duration(rand.Int64N(int64(ceiling) + 1))
	t := time.NewTimer(wait)
	defer t.Stop()
	select {
	case <-t.C:
		return nil
	case <-ctx.Done():
		return ctx.Err()
	}
}

// Metered is a Store decorator that counts the bytes read and written
// through it, so that a run reports its traffic per store whatever the
// backend.
type Metered struct {
	Store
	M *Metrics
}

// Unwrap returns the decorated store (for Linker lookups).
func (m Metered) Unwrap() Store { return m.Store }

// Open implements Store.
func (m Metered) Open(ctx context.Context, key string, offset int64) (io.ReadCloser, error) {
	rc, err := m.Store.Open(ctx, key, offset)
	if err != nil {
		return nil, err
	}
	return &meteredReader{ReadCloser: rc, m: m.M}, nil
}

// PutBytes implements BytesPutter, through the backend's own when it has
// one.
func (m Metered) PutBytes(ctx context.Context, key string, data []byte, exclusive bool) error {
	p, ok := m.Store.(BytesPutter)
	if !ok {
		return putByCreate(ctx, m, key, data, exclusive)
	}
	if err := p.PutBytes(ctx, key, data, exclusive); err != nil {
		return err
	}
	m.M.BytesWritten.Add(int64(len(data)))
	return nil
}

// Create implements Store.
func (m Metered) Create(ctx context.Context, key string) (Upload, error) {
	u, err := m.Store.Create(ctx, key)
	if err != nil {
		return nil, err
	}
	return &meteredUpload{Upload: u, m: m.M}, nil
}

type meteredReader struct {
	io.ReadCloser
	m *Metrics
}

// VersionID passes the backend's object version through, when it has one.
func (r *meteredReader) VersionID() string {
	if v, ok := r.ReadCloser.(interface{ VersionID() string }); ok {
		return v.VersionID()
	}
	return ""
}

// ETag passes the backend's tag of the object being read through, when it
// has one.
func (r *meteredReader) ETag() string {
	if v, ok := r.ReadCloser.(interface{ ETag() string }); ok {
		return v.ETag()
	}
	return ""
}

func (r *meteredReader) Read(p []byte) (int, error) {
	n, err := r.ReadCloser.Read(p)
	r.m.BytesRead.Add(int64(n))
	return n, err
}

type meteredUpload struct {
	Upload
	m *Metrics
}

func (u *meteredUpload) Write(p []byte) (int, error) {
	n, err := u.Upload.Write(p)
	u.m.BytesWritten.Add(int64(n))
	return n, err
}
