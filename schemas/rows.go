// Package schemas holds the row types that travel between stages, the Arrow
// schema of the intermediates, the Parquet row types of the shards, and the
// JSON Schemas of the config and the manifest.
package schemas

import (
	"github.com/apache/arrow-go/v18/arrow"
)

// Event is a frame's episode event (SPEC §1 `ev`).
type Event int8

const (
	EvNone  Event = 0
	EvStart Event = 1
	EvEnd   Event = 2
)

// Frame is one accepted log line as it travels between stages. Vectors are
// already rounded to the output float type (SPEC §3.2 compares after that
// conversion), but kept as float64 so one code path serves both types.
type Frame struct {
	Unit       string
	Embodiment string
	T          int64
	Src        string // object key relative to the source root
	Line       int64  // 1-based physical line in the decompressed object
	Obs        []float64
	Act        []float64
	HasAct     bool
	Ev         Event
	Task       string
	HasTask    bool
	Success    bool
	HasSuccess bool
	ImgRef     []string // per declared camera of the embodiment, as written
	// Img holds, per declared camera, the image bytes where a stage needs
	// them (ingest, which checks them, and pack, which writes them). In
	// between, a frame carries only where they wait in the work area: the
	// object ImgObj at ImgAt, one place per camera. Camera bytes dominate
	// a frame's size, and the stages between need none of them.
	Img    [][]byte
	ImgObj string
	ImgAt  []ImageAt

	// Set by the episodes stage.
	Episode string
	Step    int32
	Last    bool
}

// ImageAt is where one camera frame's bytes are in a work object: Len
// bytes from Off.
type ImageAt struct {
	Off, Len int64
}

// Reset empties f for reuse, keeping slice capacity.
func (f *Frame) Reset() {
	obs, act, ref, img, at := f.Obs[:0], f.Act[:0], f.ImgRef[:0], f.Img[:0], f.ImgAt[:0]
	*f = Frame{Obs: obs, Act: act, ImgRef: ref, Img: img, ImgAt: at}
}

// CopyFrom makes f a deep copy of g, reusing f's slices.
func (f *Frame) CopyFrom(g *Frame) {
	obs, act, ref, img := append(f.Obs[:0], g.Obs...), append(f.Act[:0], g.Act...), append(f.ImgRef[:0], g.ImgRef...), f.Img[:0]
	at := append(f.ImgAt[:0], g.ImgAt...)
	for _, b := range g.Img {
		img = append(img, append([]byte(nil), b...))
	}
	*f = *g
	f.Obs, f.Act, f.ImgRef, f.Img, f.ImgAt = obs, act, ref, img, at
}

// Floats hands out float64 slices carved from large blocks, so that holding
// many frames (a chunk before it is sorted, episodes before they are
// spilled) costs a few allocations instead of two per frame. A block is
// freed by the garbage collector once no frame points into it; nothing is
// ever reused, so no slice handed out can be overwritten.
type Floats struct{ block []float64 }

const floatsBlock = 1 << 16

// Copy returns a copy of v in block memory (nil for a nil v).
func (a *Floats) Copy(v []float64) []float64 {
	if v == nil {
		return nil
	}
	if len(a.block)+len(v) > cap(a.block) {
		a.block = make([]float64, 0, max(floatsBlock, len(v)))
	}
	start := len(a.block)
	a.block = append(a.block, v...)
	return a.block[start:len(a.block):len(a.block)]
}

// CopyInto makes f a deep copy of g with its vectors in a's blocks: f must
// be a fresh Frame (its own slices are dropped, not reused).
func (a *Floats) CopyInto(f, g *Frame) {
	*f = *g
	f.Obs, f.Act = a.Copy(g.Obs), a.Copy(g.Act)
	f.ImgRef, f.Img, f.ImgAt = nil, nil, nil
	if len(g.ImgRef) > 0 {
		f.ImgRef = append([]string(nil), g.ImgRef...)
		for _, b := range g.Img {
			f.Img = append(f.Img, append([]byte(nil), b...))
		}
	}
	if len(g.ImgAt) > 0 {
		f.ImgAt = append([]ImageAt(nil), g.ImgAt...)
	}
}

// SameContent reports whether two frames of one unit at one t carry the same
// content in the sense of SPEC §3.2: embodiment, obs, act, ev, task, success
// and img as written (vectors compare after conversion to the output type,
// which ingest has already done).
func SameContent(a, b *Frame) bool {
	if a.Embodiment != b.Embodiment || a.Ev != b.Ev || a.HasAct != b.HasAct ||
		a.HasTask != b.HasTask || a.Task != b.Task || a.HasSuccess != b.HasSuccess || a.Success != b.Success {
		return false
	}
	return equalFloats(a.Obs, b.Obs) && equalFloats(a.Act, b.Act) && equalStrings(a.ImgRef, b.ImgRef)
}

func equalFloats(a, b []float64) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if a[i] != b[i] {
			return false
		}
	}
	return true
}

func equalStrings(a, b []string) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if a[i] != b[i] {
			return false
		}
	}
	return true
}

// FrameArrow is the Arrow schema of frame intermediates (ingest runs and
// episode files): one schema for both, the episode columns empty before the
// episodes stage fills them. Vectors are stored in the output float type:
// ingest has rounded them already, so float32 storage loses nothing and
// halves what the stages write and read. Camera bytes are not in the stream:
// img_obj, img_off and img_len say where they are (Frame.ImgAt).
func FrameArrow(f32 bool) *arrow.Schema {
	var elem arrow.DataType = arrow.PrimitiveTypes.Float64
	if f32 {
		elem = arrow.PrimitiveTypes.Float32
	}
	return arrow.NewSchema([]arrow.Field{
		{Name: "unit", Type: arrow.BinaryTypes.String},
		{Name: "embodiment", Type: arrow.BinaryTypes.String},
		{Name: "t", Type: arrow.PrimitiveTypes.Int64},
		{Name: "src", Type: arrow.BinaryTypes.String},
		{Name: "src_line", Type: arrow.PrimitiveTypes.Int64},
		{Name: "obs", Type: arrow.ListOf(elem)},
		{Name: "act", Type: arrow.ListOf(elem), Nullable: true},
		{Name: "ev", Type: arrow.PrimitiveTypes.Int8},
		{Name: "task", Type: arrow.BinaryTypes.String, Nullable: true},
		{Name: "success", Type: arrow.FixedWidthTypes.Boolean, Nullable: true},
		{Name: "img_ref", Type: arrow.ListOf(arrow.BinaryTypes.String)},
		{Name: "img_obj", Type: arrow.BinaryTypes.String},
		{Name: "img_off", Type: arrow.ListOf(arrow.PrimitiveTypes.Int64)},
		{Name: "img_len", Type: arrow.ListOf(arrow.PrimitiveTypes.Int64)},
		{Name: "episode", Type: arrow.BinaryTypes.String},
		{Name: "step", Type: arrow.PrimitiveTypes.Int32},
		{Name: "last", Type: arrow.FixedWidthTypes.Boolean},
	}, nil)
}

// Goal is one relabeled goal of one step (SPEC §3.3), as the goals stage
// hands it to pack: the goal frame's coordinates, not its vectors, plus the
// goal vector and the reward, which need the goal frame.
type Goal struct {
	Episode     string
	Step        int32
	Strategy    Strategy
	GoalEpisode string
	GoalStep    int32
	GoalOffset  int32
	Goal        []float64
	Reward      float32
}

// Strategy is a goal strategy, in the SPEC's sort order.
type Strategy int8

const (
	Future Strategy = iota
	Geometric
	Final
	Negative
)

// StrategyNames are the strategies' names as written in the pairs table.
func StrategyNames() [4]string { return [4]string{"future", "geometric", "final", "negative"} }

func (s Strategy) String() string { return StrategyNames()[s] }

// GoalArrow is the Arrow schema of the goals intermediate. The goal vector is
// stored only for negatives: pack has the episode in hand and projects the
// goal frame of every other strategy itself.
func GoalArrow() *arrow.Schema {
	return arrow.NewSchema([]arrow.Field{
		{Name: "episode", Type: arrow.BinaryTypes.String},
		{Name: "step", Type: arrow.PrimitiveTypes.Int32},
		{Name: "strategy", Type: arrow.PrimitiveTypes.Int8},
		{Name: "goal_episode", Type: arrow.BinaryTypes.String},
		{Name: "goal_step", Type: arrow.PrimitiveTypes.Int32},
		{Name: "goal_offset", Type: arrow.PrimitiveTypes.Int32},
		{Name: "goal", Type: arrow.ListOf(arrow.PrimitiveTypes.Float64), Nullable: true},
		{Name: "reward", Type: arrow.PrimitiveTypes.Float32},
	}, nil)
}

// Dropped is one dropped line, for the opt-in quarantine (config
// `quarantine: true`): where it was, why it was dropped, and what is known of
// it. Line holds the line as read (at most QuarantineLineBytes; nil for an
// oversize line, whose bytes were never kept, and for lines dropped after
// parsing, which the episodes stage sees as frames).
type Dropped struct {
	Src     string
	SrcLine int64
	Reason  string
	Stage   string
	Unit    string // "" when unknown
	T       int64
	HasT    bool
	Line    []byte
}

// QuarantineLineBytes bounds the bytes of one quarantined line.
const QuarantineLineBytes = 64 << 10

// DroppedArrow is the Arrow schema of quarantine intermediates.
func DroppedArrow() *arrow.Schema {
	return arrow.NewSchema([]arrow.Field{
		{Name: "src", Type: arrow.BinaryTypes.String},
		{Name: "src_line", Type: arrow.PrimitiveTypes.Int64},
		{Name: "reason", Type: arrow.BinaryTypes.String},
		{Name: "stage", Type: arrow.BinaryTypes.String},
		{Name: "unit", Type: arrow.BinaryTypes.String, Nullable: true},
		{Name: "t", Type: arrow.PrimitiveTypes.Int64, Nullable: true},
		{Name: "line", Type: arrow.BinaryTypes.Binary, Nullable: true},
	}, nil)
}
