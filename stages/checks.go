package stages

import (
	"context"
	"errors"
	"fmt"
	"io"
	"math"
	"net/url"
	"path"
	"regexp"
	"strings"

	"hindcast/pipeline"
	"hindcast/schemas"
	"hindcast/stages/imagecheck"
	"hindcast/stages/jsonl"
)

// A check decides whether a parsed line is dropped. The checks run in the
// order of SPEC §3.1 after the line parsed (oversize, truncated and malformed
// are decided while reading and parsing); the first that fails names the
// reason. Adding a check is one function here, one entry in lineChecks, and
// one test.
type check struct {
	reason string
	fn     func(ctx context.Context, c *lineCtx) (bool, error)
}

func lineChecks() []check {
	return []check{
		{pipeline.UnknownEmbodiment, checkEmbodiment},
		{pipeline.DimMismatch, checkDims},
		{pipeline.NonFinite, checkFinite},
		{pipeline.OutOfRange, checkRange},
		{pipeline.ImageMissing, checkImagesPresent},
		{pipeline.ImageCorrupt, checkImagesComplete},
		{pipeline.TimeRegress, checkTimeOrder},
	}
}

// lineCtx is one line under inspection, with what the checks learn on the way.
type lineCtx struct {
	line  *jsonl.Line
	cfg   *pipeline.Config
	emb   *pipeline.Embodiment
	f32   bool
	imgs  [][]byte // per declared camera, after checkImagesPresent
	fetch func(ctx context.Context, ref string) ([]byte, error)
	// lastT is the last accepted t per unit in this object.
	lastT map[string]int64
}

func checkEmbodiment(_ context.Context, c *lineCtx) (bool, error) {
	c.emb = c.cfg.Embodiments[c.line.Embodiment]
	return c.emb != nil, nil
}

func checkDims(_ context.Context, c *lineCtx) (bool, error) {
	l := c.line
	return len(l.Obs) == c.emb.Obs && (!l.HasAct || len(l.Act) == c.emb.Act), nil
}

// checkFinite rejects NaN and ±Inf, including finite JSON numbers that
// become infinite in the output float type (1e39 as float32): the shard
// would hold an infinity either way.
func checkFinite(_ context.Context, c *lineCtx) (bool, error) {
	l := c.line
	if l.NonFinite {
		return false, nil
	}
	return finiteIn(l.Obs, c.f32) && (!l.HasAct || finiteIn(l.Act, c.f32)), nil
}

func finiteIn(v []float64, f32 bool) bool {
	for _, x := range v {
		if math.IsNaN(x) || math.IsInf(x, 0) || (f32 && math.IsInf(float64(float32(x)), 0)) {
			return false
		}
	}
	return true
}

// checkRange compares the values as written (before rounding to the output
// type) with the declared bounds.
func checkRange(_ context.Context, c *lineCtx) (bool, error) {
	l, e := c.line, c.emb
	if !within(l.Obs, e.ObsLow, e.ObsHigh) {
		return false, nil
	}
	return !l.HasAct || within(l.Act, e.ActLow, e.ActHigh), nil
}

func within(v, low, high []float64) bool {
	for i, x := range v {
		if (low != nil && x < low[i]) || (high != nil && x > high[i]) {
			return false
		}
	}
	return true
}

// checkImagesPresent finds every declared camera and fetches its bytes; a
// camera absent from the line, or an object that does not exist, drops it.
// Data URIs that do not decode are left for checkImagesComplete.
func checkImagesPresent(ctx context.Context, c *lineCtx) (bool, error) {
	c.imgs = c.imgs[:0]
	for _, cam := range c.emb.Cameras {
		ref, ok := cameraRef(c.line, cam)
		if !ok {
			return false, nil
		}
		b, err := c.fetch(ctx, ref)
		if errors.Is(err, pipeline.ErrNotFound) || errors.Is(err, errBadRef) {
			return false, nil
		}
		if err != nil && !errors.Is(err, errCorrupt) {
			return false, err
		}
		c.imgs = append(c.imgs, b) // nil when corrupt
	}
	return true, nil
}

// cameraRef returns the last value written for cam (JSON's last-wins rule for
// repeated names).
func cameraRef(l *jsonl.Line, cam string) (string, bool) {
	ref, ok := "", false
	for _, m := range l.Img {
		if m.Name == cam {
			ref, ok = m.Ref, true
		}
	}
	return ref, ok
}

func checkImagesComplete(_ context.Context, c *lineCtx) (bool, error) {
	for _, b := range c.imgs {
		if b == nil {
			return false, nil
		}
		if _, err := imagecheck.Check(b); err != nil {
			return false, nil
		}
	}
	return true, nil
}

func checkTimeOrder(_ context.Context, c *lineCtx) (bool, error) {
	last, seen := c.lastT[c.line.Unit]
	return !seen || c.line.T > last, nil
}

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

// toFrame fills f from an accepted line, rounding vectors to the output type.
func toFrame(f *schemas.Frame, c *lineCtx, src string, line int64) {
	l := c.line
	f.Reset()
	f.Unit, f.Embodiment, f.T, f.Src, f.Line = l.Unit, l.Embodiment, l.T, src, line
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
		ref, _ := cameraRef(l, cam)
		f.ImgRef = append(f.ImgRef, ref)
		f.Img = append(f.Img, c.imgs[i])
	}
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
