package schemas

import (
	"fmt"
	"reflect"
	"unsafe"

	"github.com/parquet-go/parquet-go"
)

// Float is the element type of obs, act, next_obs and goal in the shards.
type Float interface{ float32 | float64 }

// PairRow is one row of the pairs table (SPEC §4). Its field order is the
// column order. String columns that repeat row after row are dictionary
// encoded.
type PairRow[F Float] struct {
	Episode     string  `parquet:"episode,dict"`
	Step        int32   `parquet:"step"`
	T           int64   `parquet:"t,timestamp(nanosecond)"`
	Unit        string  `parquet:"unit,dict"`
	Embodiment  string  `parquet:"embodiment,dict"`
	Obs         []F     `parquet:"obs,list"`
	Act         []F     `parquet:"act,optional,list"`
	NextObs     []F     `parquet:"next_obs,list"`
	GoalEpisode string  `parquet:"goal_episode,dict"`
	GoalStep    int32   `parquet:"goal_step"`
	GoalOffset  int32   `parquet:"goal_offset"`
	Goal        []F     `parquet:"goal,list"`
	Reward      float32 `parquet:"reward"`
	Reached     bool    `parquet:"reached"`
	Strategy    string  `parquet:"strategy,dict"`
	Src         string  `parquet:"src,dict"`
	SrcLine     int64   `parquet:"src_line"`
}

// FrameTable is the frames table's schema for one config: its image columns
// (one img_<camera> per declared camera, over all embodiments) are known only
// at run time, so the schema comes from a struct type built by reflection
// (keeping the SPEC's column order), and rows are assembled column by column.
type FrameTable struct {
	Schema  *parquet.Schema
	Cameras []string // image columns, in order
	f32     bool
	col     frameCols
}

type leaf struct{ idx, rep, def int }

type frameCols struct {
	episode, step, t, unit, emb, obs, act, task, success, last, src, srcLine leaf
	img                                                                      []leaf
}

// NewFrameTable builds the frames schema for the given image columns.
func NewFrameTable(cameras []string, f32 bool) (*FrameTable, error) {
	elem := reflect.TypeFor[float64]()
	if f32 {
		elem = reflect.TypeFor[float32]()
	}
	vec := reflect.SliceOf(elem)
	field := func(name string, typ reflect.Type, tag string) reflect.StructField {
		return reflect.StructField{Name: name, Type: typ, Tag: reflect.StructTag(`parquet:"` + tag + `"`)}
	}
	str := reflect.TypeFor[string]()
	fields := []reflect.StructField{
		field("Episode", str, "episode,dict"),
		field("Step", reflect.TypeFor[int32](), "step"),
		field("T", reflect.TypeFor[int64](), "t,timestamp(nanosecond)"),
		field("Unit", str, "unit,dict"),
		field("Embodiment", str, "embodiment,dict"),
		field("Obs", vec, "obs,list"),
		field("Act", vec, "act,optional,list"),
		field("Task", reflect.PointerTo(str), "task,optional,dict"),
		field("Success", reflect.PointerTo(reflect.TypeFor[bool]()), "success,optional"),
		field("Last", reflect.TypeFor[bool](), "last"),
	}
	for i, cam := range cameras {
		fields = append(fields, field(fmt.Sprintf("Img%d", i), reflect.TypeFor[[]byte](), "img_"+cam+",optional"))
	}
	fields = append(fields,
		field("Src", str, "src,dict"),
		field("SrcLine", reflect.TypeFor[int64](), "src_line"))
	// The root is named after the table (SPEC §4), not left to the Go type.
	schema := parquet.NewSchema("frames", parquet.SchemaOf(reflect.New(reflect.StructOf(fields)).Elem().Interface()))
	ft := &FrameTable{Schema: schema, Cameras: cameras, f32: f32}
	look := func(path ...string) (leaf, error) {
		l, ok := schema.Lookup(path...)
		if !ok {
			return leaf{}, fmt.Errorf("frames schema: no column %v", path)
		}
		return leaf{l.ColumnIndex, l.MaxRepetitionLevel, l.MaxDefinitionLevel}, nil
	}
	var err error
	c := &ft.col
	for _, x := range []struct {
		dst  *leaf
		path []string
	}{
		{&c.episode, []string{"episode"}}, {&c.step, []string{"step"}}, {&c.t, []string{"t"}},
		{&c.unit, []string{"unit"}}, {&c.emb, []string{"embodiment"}},
		{&c.obs, []string{"obs", "list", "element"}}, {&c.act, []string{"act", "list", "element"}},
		{&c.task, []string{"task"}}, {&c.success, []string{"success"}}, {&c.last, []string{"last"}},
		{&c.src, []string{"src"}}, {&c.srcLine, []string{"src_line"}},
	} {
		if *x.dst, err = look(x.path...); err != nil {
			return nil, err
		}
	}
	for _, cam := range cameras {
		l, err := look("img_" + cam)
		if err != nil {
			return nil, err
		}
		c.img = append(c.img, l)
	}
	return ft, nil
}

// Row appends f as one row of the frames table to row (reusing its memory).
// cams maps each image column to the frame's camera index, or −1 when the
// frame's embodiment does not declare that camera (the column is null).
// Values follow the column order, with repetition and definition levels per
// the Parquet format's rules for LIST and optional columns.
func (ft *FrameTable) Row(row parquet.Row, f *Frame, cams []int) parquet.Row {
	c := &ft.col
	row = append(row[:0],
		parquet.ByteArrayValue(bytesOf(f.Episode)).Level(0, 0, c.episode.idx),
		parquet.Int32Value(f.Step).Level(0, 0, c.step.idx),
		parquet.Int64Value(f.T).Level(0, 0, c.t.idx),
		parquet.ByteArrayValue(bytesOf(f.Unit)).Level(0, 0, c.unit.idx),
		parquet.ByteArrayValue(bytesOf(f.Embodiment)).Level(0, 0, c.emb.idx))
	row = ft.list(row, f.Obs, true, c.obs)
	row = ft.list(row, f.Act, f.HasAct, c.act)
	if f.HasTask {
		row = append(row, parquet.ByteArrayValue(bytesOf(f.Task)).Level(0, 1, c.task.idx))
	} else {
		row = append(row, parquet.NullValue().Level(0, 0, c.task.idx))
	}
	if f.HasSuccess {
		row = append(row, parquet.BooleanValue(f.Success).Level(0, 1, c.success.idx))
	} else {
		row = append(row, parquet.NullValue().Level(0, 0, c.success.idx))
	}
	row = append(row, parquet.BooleanValue(f.Last).Level(0, 0, c.last.idx))
	for i, l := range c.img {
		if j := cams[i]; j >= 0 && j < len(f.Img) {
			row = append(row, parquet.ByteArrayValue(f.Img[j]).Level(0, 1, l.idx))
		} else {
			row = append(row, parquet.NullValue().Level(0, 0, l.idx))
		}
	}
	return append(row,
		parquet.ByteArrayValue(bytesOf(f.Src)).Level(0, 0, c.src.idx),
		parquet.Int64Value(f.Line).Level(0, 0, c.srcLine.idx))
}

// list appends a LIST column's values: one per element (repetition level 0
// for the first, the column's maximum after), or a single null whose
// definition level says how far the path is defined (list present but empty:
// max−1; optional list absent: max−2).
func (ft *FrameTable) list(row parquet.Row, v []float64, present bool, l leaf) parquet.Row {
	switch {
	case !present:
		return append(row, parquet.NullValue().Level(0, l.def-2, l.idx))
	case len(v) == 0:
		return append(row, parquet.NullValue().Level(0, l.def-1, l.idx))
	}
	for i, x := range v {
		rep := 0
		if i > 0 {
			rep = l.rep
		}
		val := parquet.DoubleValue(x)
		if ft.f32 {
			val = parquet.FloatValue(float32(x))
		}
		row = append(row, val.Level(rep, l.def, l.idx))
	}
	return row
}

// bytesOf views a string's bytes without copying: the writer copies values
// into its column buffers, and strings are never written through.
func bytesOf(s string) []byte { return unsafe.Slice(unsafe.StringData(s), len(s)) }

// QuarantineRow is one row of quarantine/part-00000.parquet.
type QuarantineRow struct {
	Src     string  `parquet:"src,dict"`
	SrcLine int64   `parquet:"src_line"`
	Reason  string  `parquet:"reason,dict"`
	Stage   string  `parquet:"stage,dict"`
	Unit    *string `parquet:"unit,optional,dict"`
	T       *int64  `parquet:"t,optional,timestamp(nanosecond)"`
	Line    []byte  `parquet:"line,optional"`
}
