package stages

import (
	"context"
	"errors"
	"math"

	"hindcast/pipeline"
	"hindcast/stages/imagecheck"
	"hindcast/stages/jsonl"
)

// Candidate is one would-be frame as an input format's decoder yields it: a
// JSON Lines line (decode_jsonl.go) or a recording's tick
// (ingest_recording.go). The ingest loop runs the same checks over every
// candidate, whatever its format, so a new input format is one decoder and
// a new reason is one check.
type Candidate struct {
	// Line is the candidate's 1-based position in its object, its src_line:
	// a physical line (blank lines counted) or a tick's index.
	Line int64
	// Reason is set when the decoder has already decided the drop (SPEC
	// §3.1 oversize, truncated, malformed; §7.4 stale, malformed, and
	// dim_mismatch of linear interpolation); the checks then do not run.
	Reason string
	// StaleTopic names the stale source's topic when Reason is stale.
	StaleTopic string
	// Raw is the line as read, for the quarantine (nil for a tick).
	Raw []byte

	Unit       string
	Embodiment string
	// HasT says T was read (for the quarantine).
	HasT bool
	T    int64
	// Obs and Act are the values as written or computed, before rounding
	// to the output type.
	Obs    []float64
	Act    []float64
	HasAct bool
	// NonFinite is the decoder's own finding of a NaN or ±Infinity token
	// (or an overflowing number) in obs or act.
	NonFinite  bool
	Ev         string // "start", "end" or ""
	Task       string
	HasTask    bool
	Success    bool
	HasSuccess bool
	// Either ImgRefs holds the image references as written (JSON Lines,
	// fetched by checkImagesPresent) or, with HasImages, Images holds the
	// bytes of every declared camera in the embodiment's order (ticks).
	ImgRefs   []jsonl.Camera
	Images    [][]byte
	HasImages bool
}

// A check decides whether a candidate is dropped. The checks run in the
// order of SPEC §3.1 and §7.4 after the decoder (which decides the reasons
// of its own format: oversize, truncated, malformed of a line; stale,
// malformed of a tick); the first that fails names the reason. Adding a
// check is one function here, one entry in candidateChecks, and one test;
// its reason is defined once in pipeline.ReasonDefs.
type check struct {
	reason string
	fn     func(ctx context.Context, c *checkCtx) (bool, error)
}

// candidateChecks lists the checks every candidate goes through, in the
// order of pipeline.ReasonDefs (a test holds them to it). A check that
// cannot fail for a format passes: a tick's embodiment is declared (or the
// recording was skipped), its camera bytes are present (or it was stale),
// and its times increase.
func candidateChecks() []check {
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

// decoderReasons lists, per input kind, the reasons its decoder decides
// before the checks, in order (a test holds them to pipeline.ReasonDefs).
func decoderReasons() (lines, ticks []string) {
	return []string{pipeline.Oversize, pipeline.Truncated, pipeline.Malformed},
		[]string{pipeline.Stale, pipeline.Malformed, pipeline.DimMismatch}
}

// checkCtx is one candidate under inspection, with what the checks learn on
// the way.
type checkCtx struct {
	cand  *Candidate
	cfg   *pipeline.Config
	emb   *pipeline.Embodiment
	f32   bool
	imgs  [][]byte // per declared camera, after checkImagesPresent
	fetch func(ctx context.Context, ref string) ([]byte, error)
	// lastT is the last accepted t per unit in this object.
	lastT map[string]int64
}

// runChecks returns the first failing check's reason, or "".
func runChecks(ctx context.Context, checks []check, c *checkCtx) (string, error) {
	for _, ch := range checks {
		ok, err := ch.fn(ctx, c)
		if err != nil {
			return "", err
		}
		if !ok {
			return ch.reason, nil
		}
	}
	return "", nil
}

func checkEmbodiment(_ context.Context, c *checkCtx) (bool, error) {
	c.emb = c.cfg.Embodiments[c.cand.Embodiment]
	return c.emb != nil, nil
}

func checkDims(_ context.Context, c *checkCtx) (bool, error) {
	l := c.cand
	return len(l.Obs) == c.emb.Obs && (!l.HasAct || len(l.Act) == c.emb.Act), nil
}

// checkFinite rejects NaN and ±Inf, including finite numbers that become
// infinite in the output float type (1e39 as float32): the shard would hold
// an infinity either way.
func checkFinite(_ context.Context, c *checkCtx) (bool, error) {
	l := c.cand
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

// checkRange compares the values as written or computed (before rounding
// to the output type) with the declared bounds.
func checkRange(_ context.Context, c *checkCtx) (bool, error) {
	l, e := c.cand, c.emb
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
// Data URIs that do not decode are left for checkImagesComplete. A tick
// brings its bytes along.
func checkImagesPresent(ctx context.Context, c *checkCtx) (bool, error) {
	c.imgs = c.imgs[:0]
	if c.cand.HasImages {
		if len(c.cand.Images) != len(c.emb.Cameras) {
			return false, nil
		}
		for _, b := range c.cand.Images {
			if b == nil {
				b = []byte{} // present but empty: corrupt, not missing
			}
			c.imgs = append(c.imgs, b)
		}
		return true, nil
	}
	for _, cam := range c.emb.Cameras {
		ref, ok := cameraRef(c.cand, cam)
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
func cameraRef(l *Candidate, cam string) (string, bool) {
	ref, ok := "", false
	for _, m := range l.ImgRefs {
		if m.Name == cam {
			ref, ok = m.Ref, true
		}
	}
	return ref, ok
}

func checkImagesComplete(_ context.Context, c *checkCtx) (bool, error) {
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

func checkTimeOrder(_ context.Context, c *checkCtx) (bool, error) {
	last, seen := c.lastT[c.cand.Unit]
	return !seen || c.cand.T > last, nil
}
