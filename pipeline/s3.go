package pipeline

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"net"
	"net/http"
	"net/url"
	"os"
	"slices"
	"sort"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/aws/aws-sdk-go-v2/aws"
	v4 "github.com/aws/aws-sdk-go-v2/aws/signer/v4"
	awshttp "github.com/aws/aws-sdk-go-v2/aws/transport/http"
	"github.com/aws/aws-sdk-go-v2/config"
	"github.com/aws/aws-sdk-go-v2/service/s3"
	"github.com/aws/aws-sdk-go-v2/service/s3/types"
	"github.com/aws/smithy-go"
	"github.com/aws/smithy-go/logging"
	"github.com/aws/smithy-go/middleware"
	smithyhttp "github.com/aws/smithy-go/transport/http"
	"golang.org/x/sync/errgroup"
)

// S3Store is a Store on an S3 bucket and prefix, through aws-sdk-go-v2 with
// the standard credential chain (environment, shared config and profile, web
// identity for cluster service accounts). The SDK's own retries are off:
// every request goes through the store's Retrier, so retries are counted and
// follow one policy, and reads resume where they were cut.
type S3Store struct {
	client  *s3.Client
	bucket  string
	prefix  string // "" or ending in "/"
	opt     StorageConfig
	retry   *Retrier
	metrics *Metrics
	// accepted is set once the service has answered any request with
	// success, which proves it takes the credentials; until then an
	// ambiguous HEAD answer is checked (see Stat).
	accepted *atomic.Bool
}

// NewS3Store opens s3://bucket/prefix/ with the given connection settings.
// metrics may be nil.
func NewS3Store(ctx context.Context, uri string, opt StorageConfig, metrics *Metrics) (*S3Store, error) {
	u, err := url.Parse(uri)
	if err != nil || u.Scheme != "s3" || u.Host == "" {
		return nil, fmt.Errorf("open store %s: want s3://bucket/prefix/", uri)
	}
	prefix := strings.TrimPrefix(u.Path, "/")
	if prefix != "" && !strings.HasSuffix(prefix, "/") {
		prefix += "/"
	}
	if metrics == nil {
		metrics = &Metrics{}
	}
	if opt.Attempts < 1 {
		opt.Attempts = 6
	}
	if opt.Timeout <= 0 {
		opt.Timeout = Duration(time.Minute)
	}
	if opt.PartSize < 5<<20 {
		opt.PartSize = 16 << 20
	}
	if opt.MaxConcurrency < 1 {
		opt.MaxConcurrency = 8
	}
	timeout := time.Duration(opt.Timeout)
	httpClient := awshttp.NewBuildableClient().WithDialerOptions(func(d *net.Dialer) {
		d.Timeout = timeout
	}).WithTransportOptions(func(tr *http.Transport) {
		tr.MaxIdleConnsPerHost = 64
		tr.ResponseHeaderTimeout = timeout
	})
	loads := []func(*config.LoadOptions) error{
		config.WithHTTPClient(httpClient),
		config.WithRetryMaxAttempts(1),
		// The SDK's own log lines (an unread body it could not discard, a
		// fallback of the metadata service) say nothing the error that
		// reaches the user does not, and break the run's JSON log.
		config.WithLogger(logging.Nop{}),
	}
	if opt.Region != "" {
		loads = append(loads, config.WithRegion(opt.Region))
	}
	awsCfg, err := config.LoadDefaultConfig(ctx, loads...)
	if err != nil {
		return nil, fmt.Errorf("open store %s: aws config: %w", uri, err)
	}
	if awsCfg.Region == "" {
		awsCfg.Region = "us-east-1"
	}
	custom := opt.Endpoint != "" || os.Getenv("AWS_ENDPOINT_URL_S3") != "" || os.Getenv("AWS_ENDPOINT_URL") != ""
	pathStyle := custom
	if opt.PathStyle != nil {
		pathStyle = *opt.PathStyle
	}
	accepted := &atomic.Bool{}
	client := s3.NewFromConfig(awsCfg, func(o *s3.Options) {
		o.APIOptions = append(o.APIOptions, noteAccepted(accepted))
		if opt.Endpoint != "" {
			o.BaseEndpoint = aws.String(opt.Endpoint)
		}
		o.UsePathStyle = pathStyle
		o.RetryMaxAttempts = 1
		// Checksums only where the API requires them: S3-compatible stores
		// differ in the trailing-checksum encodings they accept.
		o.RequestChecksumCalculation = aws.RequestChecksumCalculationWhenRequired
		o.ResponseChecksumValidation = aws.ResponseChecksumValidationWhenRequired
	})
	return &S3Store{
		client: client, bucket: u.Host, prefix: prefix, opt: opt, metrics: metrics, accepted: accepted,
		retry: &Retrier{Attempts: opt.Attempts, Base: 50 * time.Millisecond, Cap: 5 * time.Second, Metrics: metrics},
	}, nil
}

// URI implements Store.
func (s *S3Store) URI() string { return "s3://" + s.bucket + "/" + s.prefix }

func (s *S3Store) uriOf(key string) string { return "s3://" + s.bucket + "/" + s.prefix + key }

// attempt bounds one request by the store's timeout.
func (s *S3Store) attempt(ctx context.Context) (context.Context, context.CancelFunc) {
	return context.WithTimeout(ctx, time.Duration(s.opt.Timeout))
}

// List implements Store. S3 lists keys in UTF-8 binary order, the byte order
// SPEC §3.1 asks for; each page is retried on its own.
func (s *S3Store) List(ctx context.Context, prefix string, fn func(ObjectInfo) error) error {
	var token *string
	for {
		var out *s3.ListObjectsV2Output
		err := s.retry.Do(ctx, func(ctx context.Context) error {
			ctx, cancel := s.attempt(ctx)
			defer cancel()
			var err error
			out, err = s.client.ListObjectsV2(ctx, &s3.ListObjectsV2Input{
				Bucket: aws.String(s.bucket), Prefix: aws.String(s.prefix + prefix), ContinuationToken: token,
			})
			return err
		})
		if err != nil {
			return fmt.Errorf("list %s: %w", s.uriOf(prefix), mapS3Error(err))
		}
		for _, o := range out.Contents {
			key := strings.TrimPrefix(aws.ToString(o.Key), s.prefix)
			if strings.HasSuffix(key, "/") {
				continue // a folder marker, not an object
			}
			if err := fn(ObjectInfo{Key: key, Size: aws.ToInt64(o.Size), ETag: aws.ToString(o.ETag)}); err != nil {
				return err
			}
		}
		if !aws.ToBool(out.IsTruncated) || out.NextContinuationToken == nil {
			return nil
		}
		token = out.NextContinuationToken
	}
}

// Stat implements Store.
func (s *S3Store) Stat(ctx context.Context, key string) (ObjectInfo, error) {
	return s.stat(ctx, key, true)
}

// stat is Stat; check says whether an ambiguous failure is checked for
// refused credentials (see headRefused), needless where the caller's next
// request would tell anyway.
func (s *S3Store) stat(ctx context.Context, key string, check bool) (ObjectInfo, error) {
	var out *s3.HeadObjectOutput
	err := s.retry.Do(ctx, func(ctx context.Context) error {
		ctx, cancel := s.attempt(ctx)
		defer cancel()
		var err error
		out, err = s.client.HeadObject(ctx, &s3.HeadObjectInput{Bucket: aws.String(s.bucket), Key: aws.String(s.prefix + key)})
		return err
	})
	if err != nil {
		if check {
			if perr := s.headRefused(ctx, key, err); perr != nil {
				err = perr
			}
		}
		return ObjectInfo{}, fmt.Errorf("stat %s: %w", s.uriOf(key), mapS3Error(err))
	}
	return ObjectInfo{Key: key, Size: aws.ToInt64(out.ContentLength), ETag: aws.ToString(out.ETag), Version: aws.ToString(out.VersionId)}, nil
}

// headRefused tells a missing key from refused credentials after a HEAD
// failed with 404 or 403. A HEAD answer has no body, so no error code: a
// service may answer an unknown access key with 404 (versitygw v1.8.0
// does, measured) and a wrong secret with a bare 403. Until the service has
// once answered this store with success, one GET of the key's first byte,
// whose error has a body, says which; it returns that GET's error when it
// names refused credentials, else nil.
func (s *S3Store) headRefused(ctx context.Context, key string, headErr error) error {
	if s.accepted.Load() || !isStatus(headErr, http.StatusNotFound) && !isStatus(headErr, http.StatusForbidden) {
		return nil
	}
	err := s.retry.Do(ctx, func(ctx context.Context) error {
		ctx, cancel := s.attempt(ctx)
		defer cancel()
		out, err := s.client.GetObject(ctx, &s3.GetObjectInput{Bucket: aws.String(s.bucket), Key: aws.String(s.prefix + key), Range: aws.String("bytes=0-0")})
		if err == nil {
			out.Body.Close()
		}
		return err
	})
	if err != nil && credentialsRefused(err) {
		return err
	}
	return nil
}

// noteAccepted adds to every request a step that records a successful
// answer (any status below 300) in accepted.
func noteAccepted(accepted *atomic.Bool) func(*middleware.Stack) error {
	return func(st *middleware.Stack) error {
		return st.Deserialize.Add(middleware.DeserializeMiddlewareFunc("hindcastNoteAccepted",
			func(ctx context.Context, in middleware.DeserializeInput, next middleware.DeserializeHandler) (middleware.DeserializeOutput, middleware.Metadata, error) {
				out, md, err := next.HandleDeserialize(ctx, in)
				if r, ok := out.RawResponse.(*smithyhttp.Response); ok && r.StatusCode < 300 {
					accepted.Store(true)
				}
				return out, md, err
			}), middleware.After)
	}
}

// Open implements Store: the object from offset, as a reader that resumes a
// cut read with a Range request pinned to the object's ETag (If-Match), so an
// object that changed meanwhile is an error, never a splice of two versions.
func (s *S3Store) Open(ctx context.Context, key string, offset int64) (io.ReadCloser, error) {
	r := &s3Reader{s: s, ctx: ctx, key: key, pos: offset}
	if err := s.retry.Do(ctx, r.get); err != nil {
		return nil, fmt.Errorf("open %s: %w", s.uriOf(key), mapS3Error(err))
	}
	return r, nil
}

// s3Reader streams one object, resuming on failures mid-body.
type s3Reader struct {
	s       *S3Store
	ctx     context.Context
	key     string
	pos     int64 // next byte to deliver
	end     int64 // object size
	etag    string
	version string
	body    io.ReadCloser
	cancel  context.CancelFunc
	timer   *time.Timer
	err     error
}

// get issues one GET from r.pos; after the first it is pinned to the ETag.
func (r *s3Reader) get(ctx context.Context) error {
	actx, cancel := context.WithCancel(ctx)
	in := &s3.GetObjectInput{Bucket: aws.String(r.s.bucket), Key: aws.String(r.s.prefix + r.key)}
	if r.pos > 0 {
		in.Range = aws.String(fmt.Sprintf("bytes=%d-", r.pos))
	}
	if r.etag != "" {
		in.IfMatch = aws.String(r.etag)
	}
	// A watchdog cancels the attempt when no byte arrives for the timeout:
	// a stalled connection then fails like a reset and is resumed.
	timer := time.AfterFunc(time.Duration(r.s.opt.Timeout), cancel)
	out, err := r.s.client.GetObject(actx, in)
	if err != nil {
		timer.Stop()
		cancel()
		if r.pos > 0 && isStatus(err, http.StatusRequestedRangeNotSatisfiable) {
			// A range at or past the end: at the end is an empty stream,
			// as a local file gives.
			info, serr := r.s.Stat(ctx, r.key)
			if serr == nil && info.Size == r.pos {
				if r.etag == "" {
					r.etag, r.version, r.end = info.ETag, info.Version, info.Size
				}
				r.body = io.NopCloser(bytes.NewReader(nil))
				return nil
			}
		}
		return err
	}
	if r.etag == "" {
		r.etag = aws.ToString(out.ETag)
		r.version = aws.ToString(out.VersionId)
		r.end = r.pos + aws.ToInt64(out.ContentLength)
	}
	timer.Stop()
	r.body, r.cancel, r.timer = out.Body, cancel, timer
	return nil
}

func (r *s3Reader) closeBody() {
	if r.body != nil {
		r.body.Close()
		r.body = nil
	}
	if r.timer != nil {
		r.timer.Stop()
	}
	if r.cancel != nil {
		r.cancel()
	}
}

func (r *s3Reader) Read(p []byte) (int, error) {
	if r.err != nil {
		return 0, r.err
	}
	for attempt := 1; ; attempt++ {
		if r.body == nil {
			if err := r.s.retry.Do(r.ctx, r.get); err != nil {
				r.err = fmt.Errorf("read %s at %d: %w", r.s.uriOf(r.key), r.pos, mapS3Error(err))
				return 0, r.err
			}
		}
		// The watchdog runs only while this read waits on the network: a
		// consumer that pauses between reads is not a stalled connection.
		if r.timer != nil {
			r.timer.Reset(time.Duration(r.s.opt.Timeout))
		}
		n, err := r.body.Read(p)
		if r.timer != nil {
			r.timer.Stop()
		}
		r.pos += int64(n)
		if err == nil {
			return n, nil
		}
		if err == io.EOF && r.pos >= r.end {
			return n, io.EOF
		}
		// A reset, a stall or a body shorter than announced: resume from
		// r.pos, pinned to the ETag.
		r.closeBody()
		if r.ctx.Err() != nil {
			r.err = r.ctx.Err()
			return n, r.err
		}
		if attempt >= r.s.retry.Attempts {
			r.err = fmt.Errorf("read %s at %d: %w", r.s.uriOf(r.key), r.pos, err)
			return n, r.err
		}
		r.s.metrics.Retries.Add(1)
		r.s.retry.sleep(r.ctx, attempt)
		if n > 0 {
			return n, nil
		}
	}
}

func (r *s3Reader) Close() error {
	r.closeBody()
	return nil
}

// VersionID is the object's version id, when the bucket keeps versions.
func (r *s3Reader) VersionID() string { return r.version }

// ETag is the tag of the object being read.
func (r *s3Reader) ETag() string { return r.etag }

// Delete implements Store.
func (s *S3Store) Delete(ctx context.Context, key string) error {
	err := s.retry.Do(ctx, func(ctx context.Context) error {
		ctx, cancel := s.attempt(ctx)
		defer cancel()
		_, err := s.client.DeleteObject(ctx, &s3.DeleteObjectInput{Bucket: aws.String(s.bucket), Key: aws.String(s.prefix + key)})
		return err
	})
	if err != nil && !errors.Is(mapS3Error(err), ErrNotFound) {
		return fmt.Errorf("delete %s: %w", s.uriOf(key), mapS3Error(err))
	}
	return nil
}

// DeleteUnfinished implements UnfinishedDeleter: it aborts the multipart
// uploads pending under prefix. A writer killed mid-upload cannot abort its
// own; DeletePrefix (an item redone) and a commit over an unfinished version
// call this.
func (s *S3Store) DeleteUnfinished(ctx context.Context, prefix string) error {
	var keyMarker, idMarker *string
	for {
		var out *s3.ListMultipartUploadsOutput
		err := s.retry.Do(ctx, func(ctx context.Context) error {
			ctx, cancel := s.attempt(ctx)
			defer cancel()
			var err error
			out, err = s.client.ListMultipartUploads(ctx, &s3.ListMultipartUploadsInput{
				Bucket: aws.String(s.bucket), Prefix: aws.String(s.prefix + prefix),
				KeyMarker: keyMarker, UploadIdMarker: idMarker,
			})
			return err
		})
		if isStatus(err, http.StatusNotImplemented) || isStatus(err, http.StatusForbidden) && !credentialsRefused(err) {
			// A store without the call, or credentials without
			// s3:ListBucketMultipartUploads: what is pending cannot be
			// seen, so a bucket lifecycle rule has to abort it.
			return nil
		}
		if err != nil {
			return fmt.Errorf("list pending uploads %s: %w", s.uriOf(prefix), mapS3Error(err))
		}
		for _, up := range out.Uploads {
			err := s.retry.Do(ctx, func(ctx context.Context) error {
				ctx, cancel := s.attempt(ctx)
				defer cancel()
				_, err := s.client.AbortMultipartUpload(ctx, &s3.AbortMultipartUploadInput{
					Bucket: aws.String(s.bucket), Key: up.Key, UploadId: up.UploadId})
				return err
			})
			// Gone meanwhile (aborted or completed by its writer) is fine.
			if err != nil && (!isStatus(err, http.StatusNotFound) || credentialsRefused(err)) {
				return fmt.Errorf("abort pending upload s3://%s/%s: %w", s.bucket, aws.ToString(up.Key), mapS3Error(err))
			}
		}
		if !aws.ToBool(out.IsTruncated) || (out.NextKeyMarker == nil && out.NextUploadIdMarker == nil) {
			return nil
		}
		keyMarker, idMarker = out.NextKeyMarker, out.NextUploadIdMarker
	}
}

// Link implements Linker with a server-side copy, when both stores are on
// the same S3 service (objects up to 5 GiB, CopyObject's limit).
func (s *S3Store) Link(ctx context.Context, from Store, fromKey, key string) error {
	src, ok := Unwrap(from).(*S3Store)
	if !ok || src.client != s.client && src.opt.Endpoint != s.opt.Endpoint {
		return fmt.Errorf("link %s: not on this S3 service", JoinURI(from.URI(), fromKey))
	}
	// CopySource is URL-encoded; a "+" must be escaped too, or the service
	// reads it as a space (form encoding).
	source := src.bucket + "/" + strings.ReplaceAll((&url.URL{Path: src.prefix + fromKey}).EscapedPath(), "+", "%2B")
	err := s.retry.Do(ctx, func(ctx context.Context) error {
		ctx, cancel := s.attempt(ctx)
		defer cancel()
		_, err := s.client.CopyObject(ctx, &s3.CopyObjectInput{
			Bucket: aws.String(s.bucket), Key: aws.String(s.prefix + key), CopySource: aws.String(source),
		})
		return err
	})
	if err != nil {
		return fmt.Errorf("copy %s to %s: %w", src.uriOf(fromKey), s.uriOf(key), mapS3Error(err))
	}
	return nil
}

// Create implements Store. Small objects go in one PUT; an object larger
// than the part size becomes a multipart upload whose parts are sent while
// the writer goes on, at most max_concurrency at a time (so at most that many
// parts are in memory). A failed or aborted upload is aborted on the server,
// so no parts are left behind.
func (s *S3Store) Create(ctx context.Context, key string) (Upload, error) {
	return &s3Upload{s: s, ctx: ctx, key: key, sem: make(chan struct{}, s.opt.MaxConcurrency)}, nil
}

type s3Upload struct {
	s   *S3Store
	ctx context.Context
	key string
	buf []byte

	uploadID string
	parts    []types.CompletedPart
	mu       sync.Mutex
	g        errgroup.Group
	sem      chan struct{}
	failed   error
	done     bool
}

func (u *s3Upload) Write(p []byte) (int, error) {
	if u.done {
		return 0, fmt.Errorf("write %s: upload finished", u.s.uriOf(u.key))
	}
	n := len(p)
	for len(p) > 0 {
		room := int(u.s.opt.PartSize) - len(u.buf)
		take := min(room, len(p))
		u.buf = append(u.buf, p[:take]...)
		p = p[take:]
		if len(u.buf) == int(u.s.opt.PartSize) {
			if err := u.sendPart(); err != nil {
				return 0, err
			}
		}
	}
	return n, nil
}

// sendPart starts uploading the buffered bytes as the next part.
func (u *s3Upload) sendPart() error {
	if u.failed != nil {
		return u.failed
	}
	if u.uploadID == "" {
		var out *s3.CreateMultipartUploadOutput
		err := u.s.retry.Do(u.ctx, func(ctx context.Context) error {
			ctx, cancel := u.s.attempt(ctx)
			defer cancel()
			var err error
			out, err = u.s.client.CreateMultipartUpload(ctx, &s3.CreateMultipartUploadInput{
				Bucket: aws.String(u.s.bucket), Key: aws.String(u.s.prefix + u.key)})
			return err
		})
		if err != nil {
			u.failed = fmt.Errorf("upload %s: %w", u.s.uriOf(u.key), mapS3Error(err))
			return u.failed
		}
		u.uploadID = aws.ToString(out.UploadId)
	}
	body := u.buf
	u.buf = make([]byte, 0, u.s.opt.PartSize)
	u.mu.Lock()
	num := int32(len(u.parts) + 1)
	u.parts = append(u.parts, types.CompletedPart{PartNumber: aws.Int32(num)})
	u.mu.Unlock()
	u.sem <- struct{}{}
	u.g.Go(func() error {
		defer func() { <-u.sem }()
		var etag string
		err := u.s.retry.Do(u.ctx, func(ctx context.Context) error {
			ctx, cancel := u.s.attempt(ctx)
			defer cancel()
			out, err := u.s.client.UploadPart(ctx, &s3.UploadPartInput{
				Bucket: aws.String(u.s.bucket), Key: aws.String(u.s.prefix + u.key), UploadId: aws.String(u.uploadID),
				PartNumber: aws.Int32(num), Body: bytes.NewReader(body), ContentLength: aws.Int64(int64(len(body))),
			})
			if err == nil {
				etag = aws.ToString(out.ETag)
			}
			return err
		})
		if err != nil {
			return fmt.Errorf("upload %s part %d: %w", u.s.uriOf(u.key), num, mapS3Error(err))
		}
		u.mu.Lock()
		u.parts[num-1].ETag = aws.String(etag)
		u.mu.Unlock()
		return nil
	})
	return nil
}

func (u *s3Upload) Commit(exclusive bool) error {
	if u.done {
		return fmt.Errorf("commit %s: already finished", u.s.uriOf(u.key))
	}
	u.done = true
	if u.uploadID == "" {
		return u.put(exclusive)
	}
	if len(u.buf) > 0 {
		if err := u.sendPart(); err != nil {
			u.abort()
			return err
		}
	}
	if err := u.g.Wait(); err != nil {
		u.abort()
		return err
	}
	sort.Slice(u.parts, func(i, j int) bool { return *u.parts[i].PartNumber < *u.parts[j].PartNumber })
	in := &s3.CompleteMultipartUploadInput{
		Bucket: aws.String(u.s.bucket), Key: aws.String(u.s.prefix + u.key), UploadId: aws.String(u.uploadID),
		MultipartUpload: &types.CompletedMultipartUpload{Parts: u.parts},
	}
	if exclusive {
		in.IfNoneMatch = aws.String("*")
	}
	err := u.s.retry.Do(u.ctx, func(ctx context.Context) error {
		ctx, cancel := u.s.attempt(ctx)
		defer cancel()
		_, err := u.s.client.CompleteMultipartUpload(ctx, in)
		return err
	})
	if err != nil {
		u.abort()
		if isStatus(err, http.StatusPreconditionFailed) {
			return fmt.Errorf("commit %s: %w", u.s.uriOf(u.key), ErrExists)
		}
		return fmt.Errorf("commit %s: %w", u.s.uriOf(u.key), mapS3Error(err))
	}
	return nil
}

// put sends a small object in one request. An exclusive put is a
// conditional write (If-None-Match: *); a store that does not support it is
// checked with a HEAD first, and the message says the check was not atomic.
// PutBytes implements BytesPutter: one PUT whatever the size (S3 takes up
// to 5 GiB in one), so that an exclusive write of data already in memory,
// the manifest above all, keeps the conditional write and its lost-answer
// and 501 handling, which a multipart upload would not.
func (s *S3Store) PutBytes(ctx context.Context, key string, data []byte, exclusive bool) error {
	u := &s3Upload{s: s, ctx: ctx, key: key, buf: data, done: true}
	return u.put(exclusive)
}

func (u *s3Upload) put(exclusive bool) error {
	tries := 0
	do := func(cond bool) error {
		return u.s.retry.Do(u.ctx, func(ctx context.Context) error {
			tries++
			ctx, cancel := u.s.attempt(ctx)
			defer cancel()
			in := &s3.PutObjectInput{Bucket: aws.String(u.s.bucket), Key: aws.String(u.s.prefix + u.key),
				Body: bytes.NewReader(u.buf), ContentLength: aws.Int64(int64(len(u.buf)))}
			if cond {
				in.IfNoneMatch = aws.String("*")
			}
			_, err := u.s.client.PutObject(ctx, in)
			return err
		})
	}
	err := do(exclusive)
	if exclusive && isStatus(err, http.StatusNotImplemented) {
		// Refused credentials show in the PUT that follows.
		if _, serr := u.s.stat(u.ctx, u.key, false); serr == nil {
			return fmt.Errorf("commit %s: %w (checked with HEAD: this store has no conditional writes)", u.s.uriOf(u.key), ErrExists)
		} else if !errors.Is(serr, ErrNotFound) {
			return serr
		}
		err = do(false)
	}
	if err != nil && exclusive && tries > 1 && isStatus(err, http.StatusPreconditionFailed) && u.holdsOwnBytes() {
		// An earlier attempt stored the object but its answer was lost; the
		// retry then met our own object. That is a success.
		err = nil
	}
	if err != nil {
		if isStatus(err, http.StatusPreconditionFailed) || isStatus(err, http.StatusConflict) && exclusive {
			return fmt.Errorf("commit %s: %w", u.s.uriOf(u.key), ErrExists)
		}
		return fmt.Errorf("commit %s: %w", u.s.uriOf(u.key), mapS3Error(err))
	}
	return nil
}

// holdsOwnBytes reports whether the key now holds exactly this upload's bytes.
func (u *s3Upload) holdsOwnBytes() bool {
	r, err := u.s.Open(u.ctx, u.key, 0)
	if err != nil {
		return false
	}
	defer r.Close()
	got, err := io.ReadAll(io.LimitReader(r, int64(len(u.buf))+1))
	return err == nil && bytes.Equal(got, u.buf)
}

func (u *s3Upload) Abort() error {
	if u.done {
		return nil
	}
	u.done = true
	u.g.Wait()
	return u.abort()
}

// abort removes the parts of a multipart upload from the server. It uses a
// fresh context: an upload abandoned because its run was cancelled must
// still be cleaned up.
func (u *s3Upload) abort() error {
	if u.uploadID == "" {
		return nil
	}
	ctx, cancel := context.WithTimeout(context.WithoutCancel(u.ctx), time.Duration(u.s.opt.Timeout))
	defer cancel()
	err := u.s.retry.Do(ctx, func(ctx context.Context) error {
		_, err := u.s.client.AbortMultipartUpload(ctx, &s3.AbortMultipartUploadInput{
			Bucket: aws.String(u.s.bucket), Key: aws.String(u.s.prefix + u.key), UploadId: aws.String(u.uploadID)})
		return err
	})
	if err != nil {
		return fmt.Errorf("abort upload %s: %w", u.s.uriOf(u.key), mapS3Error(err))
	}
	return nil
}

// isStatus reports whether err is an HTTP response error with that status.
func isStatus(err error, status int) bool {
	var re *awshttp.ResponseError
	return errors.As(err, &re) && re.HTTPStatusCode() == status
}

// ErrCredentialsRefused is returned (wrapped) when the S3 service refuses
// the credentials themselves: an unknown access key, a wrong secret, an
// expired or invalid session token. It is not ErrNotFound, whatever status
// the service answered with.
var ErrCredentialsRefused = errors.New("credentials refused")

// refusedCodes are the error codes that refuse the credentials rather than
// the request: InvalidAccessKeyId, SignatureDoesNotMatch, InvalidToken,
// ExpiredToken and TokenRefreshRequired (Amazon S3 API reference, "Error
// responses", from memory), and XAdminUserNotFound, versitygw's answer (with
// status 404) to an access key it does not know (versitygw v1.8.0,
// s3err/s3err.go, and measured against it).
var refusedCodes = []string{"InvalidAccessKeyId", "SignatureDoesNotMatch", "InvalidToken", "ExpiredToken",
	"TokenRefreshRequired", "XAdminUserNotFound"}

// credentialsRefused reports whether the service refused the credentials:
// one of refusedCodes, or a 403 whose error code could not be read. The
// latter happens on uploads: a server that refuses the signature may answer
// before it reads the body and close the connection, so the SDK sees the
// status but no error document (seen with versitygw on PutObject under
// load); a 403 that names another code (AccessDenied by a policy) is left
// as it is.
func credentialsRefused(err error) bool {
	var ae smithy.APIError
	if errors.As(err, &ae) {
		if slices.Contains(refusedCodes, ae.ErrorCode()) {
			return true
		}
		if c := ae.ErrorCode(); c != "" && c != "Forbidden" {
			return false
		}
	}
	return isStatus(err, http.StatusForbidden)
}

// mapS3Error turns "no such key" answers into ErrNotFound and refused
// credentials into ErrCredentialsRefused, keeping the service's message;
// credentials never appear in SDK errors.
func mapS3Error(err error) error {
	if credentialsRefused(err) {
		return fmt.Errorf("%w: the S3 service does not accept these credentials; check AWS_ACCESS_KEY_ID and AWS_SECRET_ACCESS_KEY, AWS_PROFILE, or the session token (%v)", ErrCredentialsRefused, err)
	}
	var nsk *types.NoSuchKey
	var nf *types.NotFound
	if errors.As(err, &nsk) || errors.As(err, &nf) || isStatus(err, http.StatusNotFound) {
		return fmt.Errorf("%w (%v)", ErrNotFound, err)
	}
	if noCredentials(err) {
		return fmt.Errorf("%w (no S3 credentials found: set AWS_ACCESS_KEY_ID and AWS_SECRET_ACCESS_KEY, AWS_PROFILE, or a web identity token for the cluster's service account)", err)
	}
	return err
}

// noCredentials reports whether a request failed before it was sent, for
// want of credentials. The SDK gives that failure no type of its own when
// the identity step fails (its text, "get identity: ", is the mark), and a
// SigningError when signing does.
func noCredentials(err error) bool {
	var se *v4.SigningError
	return errors.As(err, &se) || strings.Contains(err.Error(), "get identity: ")
}

// retryableS3 decides whether a failed request may succeed when repeated:
// server errors (5xx), throttling (429, 503 SlowDown), timeouts, connection
// resets and short bodies are; permission, missing-object and bad-request
// answers (4xx) are not, nor 501 (the store lacks the call or the header:
// RFC 9110 §15.6.2), which callers that can do without it handle.
func retryableS3(err error) bool {
	// No credentials to sign with: asking again finds none either.
	if noCredentials(err) {
		return false
	}
	// The SDK also wraps failures that got no answer (a reset, a timeout:
	// status 0) or a cut one (status 200) in a ResponseError; only a real
	// error status decides here.
	var re *awshttp.ResponseError
	if errors.As(err, &re) && re.HTTPStatusCode() >= 300 {
		code := re.HTTPStatusCode()
		return code >= 500 && code != http.StatusNotImplemented || code == http.StatusTooManyRequests || code == http.StatusRequestTimeout
	}
	var ae smithy.APIError
	if errors.As(err, &ae) {
		switch ae.ErrorCode() {
		case "SlowDown", "InternalError", "RequestTimeout", "RequestTimeTooSkewed", "ServiceUnavailable":
			return true
		}
		return false
	}
	// Transport failures: resets, refused or timed-out connections, cut
	// responses. Nothing reached the service, or nothing came back whole.
	return true
}
