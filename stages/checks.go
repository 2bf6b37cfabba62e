package stages

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"io"
	"net/url"
	"path"
	"regexp"
	"strings"

	"hindcast/pipeline"
	"hindcast/schemas"
	"hindcast/stages/imagecheck"
)

var (
	// errBadRef marks an image reference that names no object (a key
	// escaping the source root); such a camera counts as missing.
	errBadRef = errors.New("not an object key")
	// errCorrupt marks a data URI whose payload does not decode.
	errCorrupt = errors.New("undecodable data URI")
)

// s3BucketName is the shape of an S3 bucket name: 3–63 of lower-case
// letters, digits, dots and hyphens, beginning and ending with a letter or
// digit (the S3 bucket naming rules, from memory). A reference to anything
// else names no bucket.
var s3BucketName = regexp.MustCompile(`^[a-z0-9][a-z0-9.-]{1,61}[a-z0-9]$`)

// maxImageBytes bounds one camera frame read into memory.
const maxImageBytes = 64 << 20

// imageFetcher resolves an image reference (SPEC §1 `img`): an RFC 2397 data
// URI, an absolute file:// or s3:// URI, or a key relative to the source root.
type imageFetcher struct {
	env    *pipeline.Env
	stores map[string]pipeline.Store
}

func (fe *imageFetcher) fetch(ctx context.Context, ref string) ([]byte, error) {
	if imagecheck.IsDataURI(ref) {
		_, b, err := imagecheck.DecodeDataURI(ref)
		if err != nil {
			return nil, errCorrupt
		}
		return b, nil
	}
	store, key := fe.env.Source, ref
	if i := strings.Index(ref, "://"); i > 0 {
		var root string
		// Schemes are case-insensitive (RFC 3986 §3.1).
		switch strings.ToLower(ref[:i]) {
		case "file":
			// A file URI is percent-encoded (RFC 8089, RFC 3986 §2.1); the
			// folder part is decoded when its store opens, the name here.
			// One store per folder: a local store holds no resources.
			j := strings.LastIndex(ref, "/")
			root = "file://" + ref[i+3:j+1]
			k, err := url.PathUnescape(ref[j+1:])
			if err != nil {
				return nil, errBadRef
			}
			key = k
		case "s3":
			// One store per bucket, so that images spread over many
			// folders share one client and its connections. S3 keys are
			// taken as written.
			bucket, k, _ := strings.Cut(ref[i+3:], "/")
			if !s3BucketName.MatchString(bucket) {
				return nil, errBadRef
			}
			root, key = "s3://"+bucket+"/", k
		default:
			// No store reads this scheme (SPEC §1 allows keys, file://,
			// s3:// and data: URIs): the reference names no object.
			return nil, errBadRef
		}
		if fe.stores == nil {
			fe.stores = map[string]pipeline.Store{}
		}
		s, ok := fe.stores[root]
		if !ok {
			open := fe.env.Resolve
			if open == nil {
				open = pipeline.OpenStore
			}
			var err error
			if s, err = open(ctx, root); err != nil {
				return nil, fmt.Errorf("image %s: %w", ref, err)
			}
			fe.stores[root] = s
		}
		store = s
	} else if key == "" || strings.HasPrefix(key, "/") || hasDotDot(key) {
		return nil, errBadRef
	}
	if key == "" {
		return nil, errBadRef
	}
	r, err := store.Open(ctx, key, 0)
	if err != nil {
		return nil, err
	}
	defer r.Close()
	b, err := io.ReadAll(io.LimitReader(r, maxImageBytes+1))
	if err != nil {
		return nil, fmt.Errorf("image %s: %w", ref, err)
	}
	if len(b) > maxImageBytes {
		return nil, errCorrupt
	}
	// The live read rate counts image bytes too, when the progress
	// display takes them.
	if ir, ok := fe.env.Progress.(interface{ ImageRead(n int64) }); ok {
		ir.ImageRead(int64(len(b)))
	}
	return b, nil
}

func hasDotDot(key string) bool {
	for _, s := range strings.Split(key, "/") {
		if s == ".." {
			return true
		}
	}
	return path.IsAbs(key)
}

// toFrame fills f from an accepted candidate, rounding vectors to the
// output type.
func toFrame(f *schemas.Frame, c *checkCtx, src string) {
	l := c.cand
	f.Reset()
	f.Unit, f.Embodiment, f.T, f.Src, f.Line = l.Unit, l.Embodiment, l.T, src, l.Line
	f.Obs = appendRounded(f.Obs, l.Obs, c.f32)
	f.HasAct = l.HasAct
	if l.HasAct {
		f.Act = appendRounded(f.Act, l.Act, c.f32)
	}
	switch l.Ev {
	case "start":
		f.Ev = schemas.EvStart
	case "end":
		f.Ev = schemas.EvEnd
	}
	f.Task, f.HasTask = l.Task, l.HasTask
	f.Success, f.HasSuccess = l.Success, l.HasSuccess
	for i, cam := range c.emb.Cameras {
		var ref string
		if l.HasImages {
			ref = recordedImageRef(c.imgs[i])
		} else {
			ref, _ = cameraRef(l, cam)
		}
		f.ImgRef = append(f.ImgRef, ref)
		f.Img = append(f.Img, c.imgs[i])
	}
}

// recordedImageRef stands for a recording's camera bytes where a JSON Lines
// frame has its reference as written, so that §3.2's comparison (by
// reference) finds two recording frames equal exactly when their bytes are
// (SPEC §7.4). It starts with a byte that is never valid UTF-8, so it can
// never equal a reference a JSON Lines line wrote (such a line is
// malformed).
func recordedImageRef(b []byte) string {
	h := sha256.Sum256(b)
	return "\xffsha256:" + hex.EncodeToString(h[:])
}

func appendRounded(dst, src []float64, f32 bool) []float64 {
	if !f32 {
		return append(dst, src...)
	}
	for _, v := range src {
		dst = append(dst, float64(float32(v)))
	}
	return dst
}
