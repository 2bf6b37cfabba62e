package main

// End-to-end tests of the whole job through Main: a small fleet written here
// with known values, its shards read back with arrow-go (an independent
// Parquet reader: the shards are written with parquet-go), determinism across
// folders and worker counts, and the demo's manifest checked against the
// files on disk with independent code.

import (
	"bytes"
	"compress/gzip"
	"context"
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"image"
	"image/color"
	"image/png"
	"io/fs"
	"math"
	"math/big"
	"os"
	"path/filepath"
	"regexp"
	"slices"
	"sort"
	"strconv"
	"strings"
	"testing"

	"github.com/apache/arrow-go/v18/arrow"
	"github.com/apache/arrow-go/v18/arrow/array"
	"github.com/apache/arrow-go/v18/arrow/memory"
	"github.com/apache/arrow-go/v18/parquet"
	"github.com/apache/arrow-go/v18/parquet/file"
	"github.com/apache/arrow-go/v18/parquet/pqarrow"
	pqschema "github.com/apache/arrow-go/v18/parquet/schema"
	"github.com/santhosh-tekuri/jsonschema/v6"

	"hindcast/pipeline"
	"hindcast/schemas"
)

// ---------------------------------------------------------------------------
// Running the CLI

// runMain runs one command line through Main and returns its exit code and
// what it wrote.
func runMain(t *testing.T, args ...string) (int, string, string) {
	t.Helper()
	var stdout, stderr bytes.Buffer
	code := Main(context.Background(), args, &stdout, &stderr)
	return code, stdout.String(), stderr.String()
}

// mustRun runs a command line that must succeed.
func mustRun(t *testing.T, args ...string) string {
	t.Helper()
	code, out, errOut := runMain(t, args...)
	if code != exitOK {
		t.Fatalf("hindcast %s: exit %d\nstdout:\n%s\nstderr:\n%s", strings.Join(args, " "), code, out, tail(errOut, 4000))
	}
	return out
}

func tail(s string, n int) string {
	if len(s) > n {
		return "…" + s[len(s)-n:]
	}
	return s
}

// ---------------------------------------------------------------------------
// The fixture fleet

// fixT0 is the first frame's t: 2025-11-30T08:00:00.123456789Z, a value that
// a float64 detour would round (it has 19 significant digits), so the t
// column shows whether the int64 survived intact.
const fixT0 = int64(1764489600123456789)

// inFrame is one fixture line as written, with where it was written.
type inFrame struct {
	unit, emb string
	t         int64
	obs, act  []float64 // act nil: absent from the line
	ev, task  string
	success   *bool
	img       string // the wrist camera's object key; "" writes no img
	extra     string // raw JSON members (unknown fields, ignored by SPEC §1)
	src       string
	line      int64
}

func (f *inFrame) json() string {
	var b strings.Builder
	fmt.Fprintf(&b, `{"unit":%q,"embodiment":%q,"t":%d,"obs":%s`, f.unit, f.emb, f.t, numList(f.obs))
	if f.act != nil {
		fmt.Fprintf(&b, `,"act":%s`, numList(f.act))
	}
	if f.ev != "" {
		fmt.Fprintf(&b, `,"ev":%q`, f.ev)
	}
	if f.task != "" {
		fmt.Fprintf(&b, `,"task":%q`, f.task)
	}
	if f.success != nil {
		fmt.Fprintf(&b, `,"success":%t`, *f.success)
	}
	if f.img != "" {
		fmt.Fprintf(&b, `,"img":{"wrist":%q}`, f.img)
	}
	b.WriteString(f.extra)
	b.WriteString("}")
	return b.String()
}

// numList writes each number with the shortest decimal that parses back to
// the same float64 (strconv 'g', -1), so the input value is exactly known.
func numList(v []float64) string {
	parts := make([]string, len(v))
	for i, x := range v {
		parts[i] = strconv.FormatFloat(x, 'g', -1, 64)
	}
	return "[" + strings.Join(parts, ",") + "]"
}

// fixture is a written fleet and everything the tests expect of it.
type fixture struct {
	logs     string                // absolute path of the source root
	frames   []*inFrame            // every frame line, in write order
	episodes map[string][]*inFrame // episode id → its frames, in step order
	images   map[string][]byte     // image key → bytes
}

// The fixture config's embodiments (SPEC §2), repeated here for the checks.
var (
	fixGoalDims = map[string][]int{"arm": {1, 2}, "cart": {0, 1}}
	fixTol      = map[string]float64{"arm": 0.05, "cart": 0.05}
)

const (
	fixPartitions = 2
	fixTrain      = 0.5
	fixVal        = 0.25
	fixRowGroup   = 4
	fixDataset    = "fixture"
)

func fixConfig(sourceURI, float string) string {
	return `dataset: ` + fixDataset + `
source:
  uri: ` + sourceURI + `
work: work
output: out
partitions: 2
seed: 11
embodiments:
  arm:
    obs: 3
    act: 2
    cameras: [wrist]
    goal_dims: [1, 2]
    goal_tolerance: 0.05
  cart:
    obs: 2
    act: 1
    goal_tolerance: 0.05
episodes:
  max_gap: 1s
  min_steps: 3
  max_steps: 100
goals:
  future: 2
  geometric: 1
  final: 1
  negative: 1
  gamma: 0.5
  horizon: 0
splits: {train: 0.5, val: 0.25, test: 0.25}
split_by: episode
float: ` + float + `
parquet:
  compression: zstd
  row_group_rows: 4
`
}

func tinyPNG(t *testing.T, c color.RGBA) []byte {
	t.Helper()
	img := image.NewRGBA(image.Rect(0, 0, 2, 2))
	for x := range 2 {
		for y := range 2 {
			img.Set(x, y, c)
		}
	}
	var buf bytes.Buffer
	if err := png.Encode(&buf, img); err != nil {
		t.Fatalf("encoding a PNG: %v", err)
	}
	return buf.Bytes()
}

// writeFixture writes the fixture fleet under dir/logs: two embodiments, arm
// with a wrist camera and cart with none; one arm unit with two episodes
// (the second observation-only), two cart units (one in the other partition),
// one object gzip-compressed, one starting with a byte-order mark; blank lines, a
// CRLF line end, unknown fields, nulls and an undeclared camera along the
// way. Nothing in it is dropped, so every non-blank line becomes a frame.
func writeFixture(t *testing.T, dir string) *fixture {
	t.Helper()
	fx := &fixture{logs: filepath.Join(dir, "logs"), episodes: map[string][]*inFrame{}, images: map[string][]byte{}}
	yes, no := true, false
	fx.images["img/w0.png"] = tinyPNG(t, color.RGBA{200, 10, 10, 255})
	fx.images["img/w1.png"] = tinyPNG(t, color.RGBA{10, 10, 200, 255})

	// An object is a list of lines; a nil frame is a blank line of the text given.
	type line struct {
		f     *inFrame
		blank string
		crlf  bool
	}
	var arm, cart7, cart5 []line
	var epA, epB, epC, epD []*inFrame
	for k := range 6 {
		kf := float64(k)
		f := &inFrame{unit: "arm-01", emb: "arm", t: fixT0 + int64(k)*100_000_000,
			obs: []float64{0.1 * (kf + 1), 1.5 + 0.25*kf, 0.3 - 0.75*kf}, act: []float64{0.5 - 0.1*kf, -0.5},
			img: "img/w0.png"}
		switch k {
		case 0:
			f.ev, f.task = "start", "pick"
		case 1:
			f.extra = `,"note":"operator comment","ev":"pause"`
		case 5:
			f.ev, f.success = "end", &yes
		}
		epA = append(epA, f)
		arm = append(arm, line{f: f, crlf: k == 2})
		if k == 0 {
			arm = append(arm, line{blank: "   "})
		}
	}
	arm = append(arm, line{blank: ""})
	for k := range 5 {
		kf := float64(k)
		f := &inFrame{unit: "arm-01", emb: "arm", t: fixT0 + 10_000_000_000 + int64(k)*100_000_000,
			obs: []float64{2 + 0.1*kf, -1 - 0.3*kf, 0.7 + 0.2*kf}, img: "img/w1.png"}
		switch k { // SPEC §1: null in an optional field means absent
		case 2:
			f.extra = `,"task":null,"success":null`
		case 3:
			f.extra = `,"act":null`
		}
		epB = append(epB, f)
		arm = append(arm, line{f: f})
	}
	cart7 = append(cart7, line{blank: ""}, line{blank: "\t"})
	for k := range 6 {
		kf := float64(k)
		f := &inFrame{unit: "cart-07", emb: "cart", t: fixT0 + 1 + int64(k)*50_000_000,
			obs: []float64{0.3 * kf, -0.1*kf - 0.05}, act: []float64{0.25 - 0.125*kf}}
		switch k {
		case 3: // SPEC §1: a camera the embodiment does not declare is ignored
			f.extra = `,"img":{"rear":"img/none.png"}`
		case 5:
			f.success = &no
		}
		epC = append(epC, f)
		cart7 = append(cart7, line{f: f})
	}
	for k := range 4 {
		kf := float64(k)
		f := &inFrame{unit: "cart-05", emb: "cart", t: fixT0 + 2_000_000_000 + int64(k)*50_000_000,
			obs: []float64{1.05 + 0.1*kf, 2 - 0.2*kf}, act: []float64{-0.5}, task: "tow"}
		epD = append(epD, f)
		cart5 = append(cart5, line{f: f})
	}

	write := func(key string, lines []line, gz, bom bool) {
		var text bytes.Buffer
		if bom { // SPEC §1: a UTF-8 byte-order mark at the start is ignored
			text.WriteString("\uFEFF")
		}
		for i, l := range lines {
			if l.f != nil {
				l.f.src, l.f.line = key, int64(i+1)
				text.WriteString(l.f.json())
				fx.frames = append(fx.frames, l.f)
			} else {
				text.WriteString(l.blank)
			}
			if l.crlf {
				text.WriteString("\r")
			}
			text.WriteString("\n")
		}
		data := text.Bytes()
		if gz {
			var zb bytes.Buffer
			zw := gzip.NewWriter(&zb)
			if _, err := zw.Write(data); err != nil {
				t.Fatal(err)
			}
			if err := zw.Close(); err != nil {
				t.Fatal(err)
			}
			data = zb.Bytes()
		}
		writeFile(t, filepath.Join(fx.logs, filepath.FromSlash(key)), data)
	}
	write("arm/arm-01.jsonl", arm, false, false)
	write("cart/cart-07.jsonl.gz", cart7, true, false)
	write("cart/cart-05.jsonl", cart5, false, true)
	for key, b := range fx.images {
		writeFile(t, filepath.Join(fx.logs, filepath.FromSlash(key)), b)
	}
	for _, ep := range [][]*inFrame{epA, epB, epC, epD} {
		// SPEC §3.2: the id is <unit>-<t of its first frame>.
		fx.episodes[fmt.Sprintf("%s-%d", ep[0].unit, ep[0].t)] = ep
	}
	return fx
}

func writeFile(t *testing.T, path string, data []byte) {
	t.Helper()
	if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(path, data, 0o644); err != nil {
		t.Fatal(err)
	}
}

// ---------------------------------------------------------------------------
// SPEC §3.4, written again here

func beUint64SHA(s string) uint64 {
	h := sha256.Sum256([]byte(s))
	return binary.BigEndian.Uint64(h[:8])
}

// partitionOf is SPEC §3.4: BE_uint64(sha256(unit)[0:8]) mod partitions.
func partitionOf(unit string, partitions int) int {
	return int(beUint64SHA(unit) % uint64(partitions))
}

// splitOf is SPEC §3.4 with exact arithmetic: u = h / 2^64 < train is
// h < train·2^64, compared as big rationals.
func splitOf(key string, train, val float64) string {
	u := new(big.Rat).SetFrac(new(big.Int).SetUint64(beUint64SHA(key)), new(big.Int).Lsh(big.NewInt(1), 64))
	tr := new(big.Rat).SetFloat64(train)
	tv := new(big.Rat).SetFloat64(train + val)
	switch {
	case u.Cmp(tr) < 0:
		return "train"
	case u.Cmp(tv) < 0:
		return "val"
	}
	return "test"
}

// ---------------------------------------------------------------------------
// Reading shards back with arrow-go

// pqFile is one Parquet file as arrow-go reads it.
type pqFile struct {
	kv        map[string]string
	kvOrder   []string
	root      string   // the schema's root name
	cols      []string // top-level column names, in order
	kinds     []string // their types, as colKind describes them
	rowGroups []int64  // rows per row group
	arrow     *arrow.Schema
	rows      int
	data      map[string][]any // column → one value per row (nil for null)
}

// colKind describes a top-level Parquet field from its schema node: the
// physical and logical types (Parquet format, LogicalTypes.md), "?" for an
// optional field, and lists by their element, following the three-level LIST
// structure (annotated group → repeated group → element).
func colKind(n pqschema.Node) string {
	opt := ""
	if n.RepetitionType() == parquet.Repetitions.Optional {
		opt = "?"
	}
	switch n := n.(type) {
	case *pqschema.GroupNode:
		if _, ok := n.LogicalType().(pqschema.ListLogicalType); !ok || n.NumFields() != 1 {
			return "group" + opt
		}
		rep, ok := n.Field(0).(*pqschema.GroupNode)
		if !ok || rep.RepetitionType() != parquet.Repetitions.Repeated || rep.NumFields() != 1 {
			return "bad-list" + opt
		}
		return "list<" + colKind(rep.Field(0)) + ">" + opt
	case *pqschema.PrimitiveNode:
		lt := n.LogicalType()
		none := lt == nil || lt.Equals(pqschema.NoLogicalType{})
		switch n.PhysicalType() {
		case parquet.Types.ByteArray:
			if _, ok := lt.(pqschema.StringLogicalType); ok {
				return "string" + opt
			}
			if none {
				return "binary" + opt
			}
		case parquet.Types.Int32:
			if none || lt.Equals(pqschema.NewIntLogicalType(32, true)) {
				return "int32" + opt
			}
		case parquet.Types.Int64:
			if ts, ok := lt.(pqschema.TimestampLogicalType); ok {
				unit := map[pqschema.TimeUnitType]string{pqschema.TimeUnitMillis: "MILLIS",
					pqschema.TimeUnitMicros: "MICROS", pqschema.TimeUnitNanos: "NANOS"}[ts.TimeUnit()]
				return fmt.Sprintf("timestamp(%s,utc=%t)", unit, ts.IsAdjustedToUTC()) + opt
			}
			if none || lt.Equals(pqschema.NewIntLogicalType(64, true)) {
				return "int64" + opt
			}
		case parquet.Types.Float:
			if none {
				return "float32" + opt
			}
		case parquet.Types.Double:
			if none {
				return "float64" + opt
			}
		case parquet.Types.Boolean:
			if none {
				return "bool" + opt
			}
		}
		return fmt.Sprintf("%s/%v%s", n.PhysicalType(), lt, opt)
	}
	return fmt.Sprintf("%T", n)
}

// cell turns one arrow value into a plain Go value: nil for null, int64 for
// timestamps, []float32 or []float64 for lists, a copy for binary.
func cell(t *testing.T, a arrow.Array, i int) any {
	if a.IsNull(i) {
		return nil
	}
	switch a := a.(type) {
	case *array.String:
		return a.Value(i)
	case *array.Binary:
		return bytes.Clone(a.Value(i))
	case *array.Int32:
		return a.Value(i)
	case *array.Int64:
		return a.Value(i)
	case *array.Timestamp:
		return int64(a.Value(i))
	case *array.Boolean:
		return a.Value(i)
	case *array.Float32:
		return a.Value(i)
	case *array.Float64:
		return a.Value(i)
	case *array.List:
		start, end := a.ValueOffsets(i)
		switch v := a.ListValues().(type) {
		case *array.Float32:
			return slices.Clone(v.Float32Values()[start:end])
		case *array.Float64:
			return slices.Clone(v.Float64Values()[start:end])
		}
		t.Fatalf("list of %s", a.ListValues().DataType())
	}
	t.Fatalf("unexpected arrow array %T (%s)", a, a.DataType())
	return nil
}

func readParquet(t *testing.T, path string) *pqFile {
	t.Helper()
	rdr, err := file.OpenParquetFile(path, false)
	if err != nil {
		t.Fatalf("arrow-go cannot open %s: %v", path, err)
	}
	defer rdr.Close()
	md := rdr.MetaData()
	p := &pqFile{kv: map[string]string{}, data: map[string][]any{}}
	kv := md.KeyValueMetadata()
	keys, vals := kv.Keys(), kv.Values()
	for i, k := range keys {
		p.kv[k] = vals[i]
		p.kvOrder = append(p.kvOrder, k)
	}
	root := md.Schema.Root()
	p.root = root.Name()
	for i := range root.NumFields() {
		p.cols = append(p.cols, root.Field(i).Name())
		p.kinds = append(p.kinds, colKind(root.Field(i)))
	}
	for g := range rdr.NumRowGroups() {
		p.rowGroups = append(p.rowGroups, md.RowGroup(g).NumRows())
	}
	fr, err := pqarrow.NewFileReader(rdr, pqarrow.ArrowReadProperties{BatchSize: 4096}, memory.DefaultAllocator)
	if err != nil {
		t.Fatalf("pqarrow reader for %s: %v", path, err)
	}
	tbl, err := fr.ReadTable(context.Background())
	if err != nil {
		t.Fatalf("arrow-go cannot read %s: %v", path, err)
	}
	defer tbl.Release()
	p.arrow = tbl.Schema()
	p.rows = int(tbl.NumRows())
	for c := range int(tbl.NumCols()) {
		col := tbl.Column(c)
		vals := make([]any, 0, p.rows)
		for _, chunk := range col.Data().Chunks() {
			for i := range chunk.Len() {
				vals = append(vals, cell(t, chunk, i))
			}
		}
		p.data[col.Name()] = vals
	}
	return p
}

// ---------------------------------------------------------------------------
// The expected layout (SPEC §4)

// expectedFrameKinds is the frames table of SPEC §4 for the fixture: one
// img_<camera> column per declared camera, nullable, before src.
func expectedFrameKinds(float string, cameras []string) ([]string, []string) {
	cols := []string{"episode", "step", "t", "unit", "embodiment", "obs", "act", "task", "success", "last"}
	kinds := []string{"string", "int32", "timestamp(NANOS,utc=true)", "string", "string",
		"list<" + float + ">", "list<" + float + ">?", "string?", "bool?", "bool"}
	for _, c := range cameras {
		cols = append(cols, "img_"+c)
		kinds = append(kinds, "binary?")
	}
	return append(cols, "src", "src_line"), append(kinds, "string", "int64")
}

// expectedPairKinds is the pairs table of SPEC §4.
func expectedPairKinds(float string) ([]string, []string) {
	l := "list<" + float + ">"
	return []string{"episode", "step", "t", "unit", "embodiment", "obs", "act", "next_obs",
			"goal_episode", "goal_step", "goal_offset", "goal", "reward", "reached", "strategy", "src", "src_line"},
		[]string{"string", "int32", "timestamp(NANOS,utc=true)", "string", "string", l, l + "?", l,
			"string", "int32", "int32", l, "float32", "bool", "string", "string", "int64"}
}

// strategyRank is the pairs sort order of SPEC §4.
var strategyRank = map[string]int{"future": 0, "geometric": 1, "final": 2, "negative": 3}

// asFloats widens a read list to float64 and reports its element type.
func asFloats(t *testing.T, v any) ([]float64, string) {
	t.Helper()
	switch v := v.(type) {
	case []float32:
		out := make([]float64, len(v))
		for i, x := range v {
			out[i] = float64(x)
		}
		return out, "float32"
	case []float64:
		return slices.Clone(v), "float64"
	}
	t.Fatalf("not a float list: %T", v)
	return nil, ""
}

// rounded is the input vector as the output type stores it (SPEC §2 float).
func rounded(v []float64, float string) []float64 {
	out := make([]float64, len(v))
	for i, x := range v {
		if float == "float32" {
			out[i] = float64(float32(x))
		} else {
			out[i] = x
		}
	}
	return out
}

func pick(v []float64, dims []int) []float64 {
	out := make([]float64, len(dims))
	for i, d := range dims {
		out[i] = v[d]
	}
	return out
}

// shardKey is (table, split, partition).
type shardKey struct {
	table, split string
	part         int
}

func (k shardKey) path() string {
	return fmt.Sprintf("%s/split=%s/part-%05d.parquet", k.table, k.split, k.part)
}

// versionFiles lists every file under a version folder, by slash path.
func versionFiles(t *testing.T, dir string) map[string][]byte {
	t.Helper()
	out := map[string][]byte{}
	err := filepath.WalkDir(dir, func(p string, d fs.DirEntry, err error) error {
		if err != nil {
			return err
		}
		if d.IsDir() {
			return nil
		}
		b, err := os.ReadFile(p)
		if err != nil {
			return err
		}
		rel, _ := filepath.Rel(dir, p)
		out[filepath.ToSlash(rel)] = b
		return nil
	})
	if err != nil {
		t.Fatalf("listing %s: %v", dir, err)
	}
	return out
}

// manifestDoc is the part of manifest.json the tests read, decoded here
// rather than through package pipeline's types.
type manifestDoc struct {
	Dataset      string          `json:"dataset"`
	Version      string          `json:"version"`
	Config       json.RawMessage `json:"config"`
	ConfigSHA256 string          `json:"config_sha256"`
	SourceRoot   string          `json:"source_root"`
	Sources      []struct {
		Key         string           `json:"key"`
		URI         string           `json:"uri"`
		Bytes       int64            `json:"bytes"`
		SHA256      string           `json:"sha256"`
		Lines       int64            `json:"lines"`
		Kept        int64            `json:"kept"`
		Dropped     map[string]int64 `json:"dropped"`
		DuplicateOf *string          `json:"duplicate_of"`
		Incomplete  bool             `json:"incomplete"`
	} `json:"sources"`
	Funnel struct {
		Objects          int64            `json:"objects"`
		DuplicateObjects int64            `json:"duplicate_objects"`
		SkippedObjects   map[string]int64 `json:"skipped_objects"`
		Lines            int64            `json:"lines"`
		Frames           int64            `json:"frames"`
		Episodes         int64            `json:"episodes"`
		Pairs            int64            `json:"pairs"`
		Dropped          map[string]int64 `json:"dropped"`
	} `json:"funnel"`
	Counts []struct {
		Embodiment string `json:"embodiment"`
		Split      string `json:"split"`
		Episodes   int64  `json:"episodes"`
		Frames     int64  `json:"frames"`
		Pairs      int64  `json:"pairs"`
	} `json:"counts"`
	Files []struct {
		Path      string `json:"path"`
		Table     string `json:"table"`
		Split     string `json:"split"`
		Partition int    `json:"partition"`
		Rows      int64  `json:"rows"`
		Episodes  int64  `json:"episodes"`
		Bytes     int64  `json:"bytes"`
		SHA256    string `json:"sha256"`
	} `json:"files"`
	Stats map[string]struct {
		Obs vecStats `json:"obs"`
		Act vecStats `json:"act"`
	} `json:"stats"`
	Digest string `json:"digest"`
}

type vecStats struct {
	Count int64     `json:"count"`
	Mean  []float64 `json:"mean"`
	Std   []float64 `json:"std"`
	Min   []float64 `json:"min"`
	Max   []float64 `json:"max"`
}

func readManifest(t *testing.T, versionDir string) (*manifestDoc, []byte) {
	t.Helper()
	raw, err := os.ReadFile(filepath.Join(versionDir, "manifest.json"))
	if err != nil {
		t.Fatalf("reading the manifest: %v", err)
	}
	var m manifestDoc
	if err := json.Unmarshal(raw, &m); err != nil {
		t.Fatalf("decoding the manifest: %v", err)
	}
	return &m, raw
}

// validateManifest checks raw against schemas/manifest.schema.json.
func validateManifest(t *testing.T, raw []byte) {
	t.Helper()
	doc, err := jsonschema.UnmarshalJSON(bytes.NewReader(schemas.ManifestSchema()))
	if err != nil {
		t.Fatalf("reading the manifest schema: %v", err)
	}
	c := jsonschema.NewCompiler()
	c.AssertFormat()
	if err := c.AddResource("manifest.schema.json", doc); err != nil {
		t.Fatal(err)
	}
	sch, err := c.Compile("manifest.schema.json")
	if err != nil {
		t.Fatalf("compiling the manifest schema: %v", err)
	}
	inst, err := jsonschema.UnmarshalJSON(bytes.NewReader(raw))
	if err != nil {
		t.Fatal(err)
	}
	if err := sch.Validate(inst); err != nil {
		t.Errorf("manifest does not match schemas/manifest.schema.json: %v", err)
	}
}

// ---------------------------------------------------------------------------
// Shards read back

// runFixture writes the fixture and its config under a fresh folder, runs
// the job through Main and returns the fixture and the version folder.
func runFixture(t *testing.T, float string) (*fixture, string) {
	t.Helper()
	dir := t.TempDir()
	fx := writeFixture(t, dir)
	cfg := filepath.Join(dir, "job", "hindcast.yaml")
	writeFile(t, cfg, []byte(fixConfig(fx.logs, float)))
	mustRun(t, "run", "--config", cfg, "--version", "v1", "--parallel", "2")
	return fx, filepath.Join(dir, "job", "out", fixDataset, "v1")
}

func TestShardsReadBackFloat32(t *testing.T) { checkShards(t, "float32") }

func TestShardsReadBackFloat64(t *testing.T) { checkShards(t, "float64") }

// checkShards runs the fixture and reads every shard back with arrow-go:
// layout, types, footers, row groups, sort order, and every value against
// the lines written.
func checkShards(t *testing.T, float string) {
	fx, vdir := runFixture(t, float)
	m, raw := readManifest(t, vdir)
	validateManifest(t, raw)
	onDisk := versionFiles(t, vdir)

	// Which shard each episode lands in (SPEC §3.4), from the fixture alone.
	ids := make([]string, 0, len(fx.episodes))
	for id := range fx.episodes {
		ids = append(ids, id)
	}
	sort.Strings(ids) // byte order: the frames sort key (SPEC §4)
	epShard := map[string]shardKey{}
	wantFrames := map[shardKey][]string{} // episode ids per frames shard, in order
	for _, id := range ids {
		ep := fx.episodes[id]
		k := shardKey{"frames", splitOf(id, fixTrain, fixVal), partitionOf(ep[0].unit, fixPartitions)}
		epShard[id] = k
		wantFrames[k] = append(wantFrames[k], id)
	}
	// The other episodes of the same embodiment, partition and split: the
	// pool negative goals are drawn from (SPEC §3.3).
	negPool := func(id string) []string {
		var pool []string
		for _, o := range ids {
			if o != id && fx.episodes[o][0].emb == fx.episodes[id][0].emb &&
				epShard[o].part == epShard[id].part && epShard[o].split == epShard[id].split {
				pool = append(pool, o)
			}
		}
		return pool
	}
	// The fixture covers two partitions. Its four episodes share no
	// (partition, split), so none gets a negative: every episode must then
	// have none (checkPairs); negatives drawn from a pool are covered by
	// stages.TestGoalsNegativesStayInTheirSplit and TestGoalsPipeline.
	withNeg, parts := 0, map[int]bool{}
	for _, id := range ids {
		if len(negPool(id)) > 0 {
			withNeg++
		}
		parts[epShard[id].part] = true
	}
	if withNeg == len(ids) || len(parts) != fixPartitions {
		t.Fatalf("fixture covers less than meant: %d of %d episodes with negatives, partitions %v", withNeg, len(ids), parts)
	}

	wantPaths := []string{"manifest.json"}
	for k := range wantFrames {
		wantPaths = append(wantPaths, k.path(), shardKey{"pairs", k.split, k.part}.path())
	}
	sort.Strings(wantPaths)
	gotPaths := slices.Sorted(func(yield func(string) bool) {
		for p := range onDisk {
			if !yield(p) {
				return
			}
		}
	})
	if !slices.Equal(gotPaths, wantPaths) {
		t.Fatalf("version files %v, want %v (no empty file, SPEC §4)", gotPaths, wantPaths)
	}

	frameCols, frameKinds := expectedFrameKinds(float, []string{"wrist"})
	pairCols, pairKinds := expectedPairKinds(float)
	framesSeen, pairsSeen := 0, 0
	for _, p := range wantPaths {
		if p == "manifest.json" {
			continue
		}
		pf := readParquet(t, filepath.Join(vdir, filepath.FromSlash(p)))
		var k shardKey
		if _, err := fmt.Sscanf(strings.ReplaceAll(strings.ReplaceAll(p, "/split=", " "), "/part-", " "), "%s %s %d.parquet", &k.table, &k.split, &k.part); err != nil {
			t.Fatalf("path %s: %v", p, err)
		}

		// The schema's root is named after its table, not a Go type.
		if pf.root != k.table {
			t.Errorf("%s: schema root %q, want %q", p, pf.root, k.table)
		}
		// Footer key-value metadata (SPEC §4): exactly these keys, nothing
		// that changes between runs.
		wantKV := map[string]string{"dataset": fixDataset, "table": k.table, "split": k.split,
			"partition": strconv.Itoa(k.part), "config_sha256": m.ConfigSHA256}
		if len(pf.kv) != len(wantKV) {
			t.Errorf("%s: footer keys %v, want exactly %v", p, pf.kvOrder, slices.Sorted(mapKeys(wantKV)))
		}
		for key, v := range wantKV {
			if pf.kv[key] != v {
				t.Errorf("%s: footer %s = %q, want %q", p, key, pf.kv[key], v)
			}
		}

		// Row groups of at most row_group_rows; a file with more rows has several.
		var total int64
		for _, n := range pf.rowGroups {
			total += n
			if n > fixRowGroup || n == 0 {
				t.Errorf("%s: row groups %v, want 1..%d rows each", p, pf.rowGroups, fixRowGroup)
			}
		}
		if int(total) != pf.rows || pf.rows == 0 {
			t.Errorf("%s: %d rows in row groups %v, %d read", p, total, pf.rowGroups, pf.rows)
		}
		if want := (pf.rows + fixRowGroup - 1) / fixRowGroup; pf.rows > fixRowGroup && len(pf.rowGroups) < 2 {
			t.Errorf("%s: %d rows in %d row group(s), want at least %d", p, pf.rows, len(pf.rowGroups), want)
		}

		if k.table == "frames" {
			checkTypes(t, p, pf, frameCols, frameKinds)
			framesSeen += checkFrames(t, p, pf, fx, wantFrames[k], float)
		} else {
			checkTypes(t, p, pf, pairCols, pairKinds)
			fk := shardKey{"frames", k.split, k.part}
			pairsSeen += checkPairs(t, p, pf, fx, wantFrames[fk], negPool, float)
		}
	}
	// SPEC §5 stats: every declared embodiment, over the train frames only
	// (an embodiment with none has count 0), recomputed from the inputs.
	trainObs, trainAct := map[string][][]float64{}, map[string][][]float64{}
	for _, id := range ids {
		if epShard[id].split != "train" {
			continue
		}
		for _, f := range fx.episodes[id] {
			trainObs[f.emb] = append(trainObs[f.emb], rounded(f.obs, float))
			if f.act != nil {
				trainAct[f.emb] = append(trainAct[f.emb], rounded(f.act, float))
			}
		}
	}
	if got := slices.Sorted(mapKeys(m.Stats)); !slices.Equal(got, []string{"arm", "cart"}) {
		t.Errorf("stats for %v, want arm and cart", got)
	}
	for _, emb := range []string{"arm", "cart"} {
		for _, c := range []struct {
			what string
			xs   [][]float64
			got  vecStats
		}{{"obs", trainObs[emb], m.Stats[emb].Obs}, {"act", trainAct[emb], m.Stats[emb].Act}} {
			if len(c.xs) == 0 {
				if c.got.Count != 0 || len(c.got.Mean)+len(c.got.Std)+len(c.got.Min)+len(c.got.Max) != 0 {
					t.Errorf("%s %s: no train frames, stats %+v", emb, c.what, c.got)
				}
				continue
			}
			compareStats(t, emb+" "+c.what, c.xs, c.got)
		}
	}
	if len(trainObs) == 0 || len(trainObs) == 2 {
		t.Errorf("fixture meant to have train frames of one embodiment only, has %d", len(trainObs))
	}

	if framesSeen != len(fx.frames) {
		t.Errorf("%d frame rows in all shards, want %d (every fixture line)", framesSeen, len(fx.frames))
	}
	if m.Funnel.Frames != int64(framesSeen) || m.Funnel.Pairs != int64(pairsSeen) || m.Funnel.Episodes != int64(len(ids)) {
		t.Errorf("manifest funnel frames %d pairs %d episodes %d, shards hold %d, %d, %d",
			m.Funnel.Frames, m.Funnel.Pairs, m.Funnel.Episodes, framesSeen, pairsSeen, len(ids))
	}
}

func mapKeys[V any](m map[string]V) func(func(string) bool) {
	return func(yield func(string) bool) {
		for k := range m {
			if !yield(k) {
				return
			}
		}
	}
}

// checkTypes compares the column names, their order and their Parquet types
// with SPEC §4, and the arrow types arrow-go derives from them.
func checkTypes(t *testing.T, p string, pf *pqFile, cols, kinds []string) {
	t.Helper()
	if !slices.Equal(pf.cols, cols) {
		t.Errorf("%s: columns %v, want %v", p, pf.cols, cols)
		return
	}
	for i := range cols {
		if pf.kinds[i] != kinds[i] {
			t.Errorf("%s: column %s is %s, want %s", p, cols[i], pf.kinds[i], kinds[i])
		}
	}
	// The same through arrow: t is timestamp[ns, tz=UTC] (isAdjustedToUTC
	// maps to a UTC time zone in arrow-go's schema conversion).
	f, ok := pf.arrow.FieldsByName("t")
	if !ok {
		t.Fatalf("%s: no arrow field t", p)
	}
	ts, ok := f[0].Type.(*arrow.TimestampType)
	if !ok || ts.Unit != arrow.Nanosecond || ts.TimeZone != "UTC" {
		t.Errorf("%s: arrow type of t is %s, want timestamp[ns, tz=UTC]", p, f[0].Type)
	}
}

// checkFrames compares a frames shard with the fixture: the rows are the
// frames of the expected episodes in (episode, step) order, with every
// value as written. It returns the rows seen.
func checkFrames(t *testing.T, p string, pf *pqFile, fx *fixture, eps []string, float string) int {
	t.Helper()
	var want []*inFrame
	var wantEp []string
	var wantStep []int
	for _, id := range eps {
		for s, f := range fx.episodes[id] {
			want = append(want, f)
			wantEp = append(wantEp, id)
			wantStep = append(wantStep, s)
		}
	}
	if pf.rows != len(want) {
		t.Errorf("%s: %d rows, want %d (episodes %v)", p, pf.rows, len(want), eps)
		return pf.rows
	}
	d := pf.data
	for i, f := range want {
		where := fmt.Sprintf("%s row %d (%s step %d)", p, i, wantEp[i], wantStep[i])
		n := len(fx.episodes[wantEp[i]])
		if d["episode"][i] != wantEp[i] || d["step"][i] != int32(wantStep[i]) {
			t.Errorf("%s: episode %v step %v: not in (episode, step) order", where, d["episode"][i], d["step"][i])
			continue
		}
		if d["t"][i] != f.t {
			t.Errorf("%s: t %v, want %d exactly", where, d["t"][i], f.t)
		}
		if d["unit"][i] != f.unit || d["embodiment"][i] != f.emb {
			t.Errorf("%s: unit %v embodiment %v, want %s %s", where, d["unit"][i], d["embodiment"][i], f.unit, f.emb)
		}
		obs, typ := asFloats(t, d["obs"][i])
		if typ != float || !slices.Equal(obs, rounded(f.obs, float)) {
			t.Errorf("%s: obs %v (%s), want %v as %s", where, obs, typ, f.obs, float)
		}
		if f.act == nil {
			if d["act"][i] != nil {
				t.Errorf("%s: act %v, want null (absent from the line)", where, d["act"][i])
			}
		} else if d["act"][i] == nil {
			t.Errorf("%s: act null, want %v", where, f.act)
		} else if act, typ := asFloats(t, d["act"][i]); typ != float || !slices.Equal(act, rounded(f.act, float)) {
			t.Errorf("%s: act %v (%s), want %v as %s", where, act, typ, f.act, float)
		}
		if f.task == "" {
			if d["task"][i] != nil {
				t.Errorf("%s: task %v, want null", where, d["task"][i])
			}
		} else if d["task"][i] != f.task {
			t.Errorf("%s: task %v, want %q", where, d["task"][i], f.task)
		}
		if f.success == nil {
			if d["success"][i] != nil {
				t.Errorf("%s: success %v, want null", where, d["success"][i])
			}
		} else if d["success"][i] != *f.success {
			t.Errorf("%s: success %v, want %t", where, d["success"][i], *f.success)
		}
		if d["last"][i] != (wantStep[i] == n-1) {
			t.Errorf("%s: last %v, want %t", where, d["last"][i], wantStep[i] == n-1)
		}
		if f.img == "" {
			if d["img_wrist"][i] != nil {
				t.Errorf("%s: img_wrist holds %d bytes, want null (%s declares no wrist camera)", where, len(d["img_wrist"][i].([]byte)), f.emb)
			}
		} else if b, _ := d["img_wrist"][i].([]byte); !bytes.Equal(b, fx.images[f.img]) {
			t.Errorf("%s: img_wrist holds %d bytes, want the %d bytes of %s", where, len(b), len(fx.images[f.img]), f.img)
		}
		if d["src"][i] != f.src || d["src_line"][i] != f.line {
			t.Errorf("%s: src %v line %v, want %s line %d (blank lines counted)", where, d["src"][i], d["src_line"][i], f.src, f.line)
		}
	}
	return pf.rows
}

// checkPairs compares a pairs shard with the fixture: per step of each
// episode, the configured goals in strategy order (SPEC §4 sort order, §3.3
// counts), each goal's step and offset within the rules, goal and next_obs
// taken from the right frames, reward recomputed from the L2 distance.
func checkPairs(t *testing.T, p string, pf *pqFile, fx *fixture, eps []string, negPool func(string) []string, float string) int {
	t.Helper()
	// future 2, geometric 1, final 1, negative 1 per step (fixConfig).
	type key struct {
		ep       string
		step     int
		strategy string
	}
	var want []key
	for _, id := range eps {
		strats := []string{"future", "future", "geometric", "final"}
		if len(negPool(id)) > 0 {
			strats = append(strats, "negative")
		}
		for s := range len(fx.episodes[id]) - 1 { // step T−1 gets none
			for _, st := range strats {
				want = append(want, key{id, s, st})
			}
		}
	}
	if pf.rows != len(want) {
		t.Errorf("%s: %d pairs, want %d", p, pf.rows, len(want))
		return pf.rows
	}
	d := pf.data
	for i, w := range want {
		where := fmt.Sprintf("%s row %d (%s step %d %s)", p, i, w.ep, w.step, w.strategy)
		if d["episode"][i] != w.ep || d["step"][i] != int32(w.step) || d["strategy"][i] != w.strategy {
			t.Errorf("%s: got episode %v step %v strategy %v: out of (episode, step, strategy) order",
				where, d["episode"][i], d["step"][i], d["strategy"][i])
			continue
		}
		ep := fx.episodes[w.ep]
		f, next := ep[w.step], ep[w.step+1]
		if d["t"][i] != f.t || d["unit"][i] != f.unit || d["embodiment"][i] != f.emb ||
			d["src"][i] != f.src || d["src_line"][i] != f.line {
			t.Errorf("%s: t %v unit %v embodiment %v src %v:%v, want %d %s %s %s:%d", where,
				d["t"][i], d["unit"][i], d["embodiment"][i], d["src"][i], d["src_line"][i], f.t, f.unit, f.emb, f.src, f.line)
		}
		obs, typ := asFloats(t, d["obs"][i])
		nobs, _ := asFloats(t, d["next_obs"][i])
		goal, gtyp := asFloats(t, d["goal"][i])
		if typ != float || gtyp != float || !slices.Equal(obs, rounded(f.obs, float)) || !slices.Equal(nobs, rounded(next.obs, float)) {
			t.Errorf("%s: obs %v next_obs %v (%s), want %v and %v as %s", where, obs, nobs, typ, f.obs, next.obs, float)
		}
		if f.act == nil {
			if d["act"][i] != nil {
				t.Errorf("%s: act %v, want null", where, d["act"][i])
			}
		} else if act, _ := asFloats(t, d["act"][i]); !slices.Equal(act, rounded(f.act, float)) {
			t.Errorf("%s: act %v, want %v", where, act, f.act)
		}
		gep, _ := d["goal_episode"][i].(string)
		gstep, _ := d["goal_step"][i].(int32)
		goff, _ := d["goal_offset"][i].(int32)
		T := len(ep)
		n := T - 1 - w.step // horizon 0: no limit (SPEC §3.3)
		switch w.strategy {
		case "future", "geometric":
			if gep != w.ep || goff < 1 || int(goff) > n || int(gstep) != w.step+int(goff) {
				t.Errorf("%s: goal %s step %d offset %d, want the same episode, offset 1..%d, step = step+offset", where, gep, gstep, goff, n)
				continue
			}
		case "final":
			if gep != w.ep || int(gstep) != T-1 || int(goff) != T-1-w.step {
				t.Errorf("%s: goal %s step %d offset %d, want the last step %d, offset %d", where, gep, gstep, goff, T-1, T-1-w.step)
				continue
			}
		case "negative":
			if !slices.Contains(negPool(w.ep), gep) || goff != -1 || gstep < 0 || int(gstep) >= len(fx.episodes[gep]) {
				t.Errorf("%s: goal %s step %d offset %d, want another episode of %v, offset -1", where, gep, gstep, goff, negPool(w.ep))
				continue
			}
		}
		dims := fixGoalDims[f.emb]
		wantGoal := pick(rounded(fx.episodes[gep][gstep].obs, float), dims)
		if !slices.Equal(goal, wantGoal) {
			t.Errorf("%s: goal %v, want obs[%v] of %s step %d = %v", where, goal, dims, gep, gstep, wantGoal)
		}
		// SPEC §3.3: reward 1 when ‖next_obs[goal_dims] − goal‖₂ ≤ tolerance.
		var ss float64
		for j, v := range pick(nobs, dims) {
			ss += (v - goal[j]) * (v - goal[j])
		}
		wantReward := float32(0)
		if math.Sqrt(ss) <= fixTol[f.emb] {
			wantReward = 1
		}
		if d["reward"][i] != wantReward || d["reached"][i] != (wantReward == 1) {
			t.Errorf("%s: reward %v reached %v, want %v (distance %g)", where, d["reward"][i], d["reached"][i], wantReward, math.Sqrt(ss))
		}
	}
	return pf.rows
}

// ---------------------------------------------------------------------------
// Determinism (SPEC §6)

// TestDeterminism runs the same config over the same objects three times:
// into separate work and output folders, with one and two workers, and once
// over a copy of the logs in another folder. Every Parquet file must be
// byte-identical and the digest the same.
func TestDeterminism(t *testing.T) {
	dir := t.TempDir()
	fx := writeFixture(t, dir)
	copyLogs := filepath.Join(dir, "moved", "logs")
	if err := os.CopyFS(copyLogs, os.DirFS(fx.logs)); err != nil {
		t.Fatalf("copying the logs: %v", err)
	}
	runs := []struct {
		name, logs, parallel string
	}{
		{"a", fx.logs, "1"},
		{"b", fx.logs, "2"},
		{"c", copyLogs, "1"},
	}
	var first map[string][]byte
	var firstDigest string
	for i, r := range runs {
		cfg := filepath.Join(dir, r.name, "hindcast.yaml")
		writeFile(t, cfg, []byte(fixConfig(r.logs, "float32")))
		mustRun(t, "run", "--config", cfg, "--version", "v-"+r.name, "--parallel", r.parallel)
		vdir := filepath.Join(dir, r.name, "out", fixDataset, "v-"+r.name)
		m, _ := readManifest(t, vdir)
		files := versionFiles(t, vdir)
		delete(files, "manifest.json") // holds version, created and timings
		if len(files) == 0 {
			t.Fatalf("run %s wrote no shard", r.name)
		}
		if i == 0 {
			first, firstDigest = files, m.Digest
			continue
		}
		if m.Digest != firstDigest {
			t.Errorf("run %s (parallel %s, logs %s): digest %s, run a: %s", r.name, r.parallel, r.logs, m.Digest, firstDigest)
		}
		if !slices.Equal(slices.Sorted(mapKeys(files)), slices.Sorted(mapKeys(first))) {
			t.Errorf("run %s files %v, run a: %v", r.name, slices.Sorted(mapKeys(files)), slices.Sorted(mapKeys(first)))
		}
		for p, b := range files {
			if !bytes.Equal(b, first[p]) {
				t.Errorf("run %s: %s differs from run a's (%d vs %d bytes)", r.name, p, len(b), len(first[p]))
			}
		}
	}
}

// ---------------------------------------------------------------------------
// The demo

// findVersion returns the only version folder under out/<dataset>/.
func findVersion(t *testing.T, datasetDir string) string {
	t.Helper()
	ents, err := os.ReadDir(datasetDir)
	if err != nil || len(ents) != 1 {
		t.Fatalf("want exactly one version under %s, got %v (%v)", datasetDir, ents, err)
	}
	return filepath.Join(datasetDir, ents[0].Name())
}

func TestDemo(t *testing.T) {
	dir := t.TempDir()
	out := mustRun(t, "demo", "--dir", dir)

	// The demo promises every fault class: each reason is in the summary
	// with a non-zero count.
	t.Run("summary names every reason", func(t *testing.T) {
		re := regexp.MustCompile(`(?m)^\s+([a-z_]+)\s+(\d+)\s+[0-9.]+%$`)
		got := map[string]int{}
		for _, mm := range re.FindAllStringSubmatch(out, -1) {
			n, _ := strconv.Atoi(mm[2])
			got[mm[1]] = n
		}
		// With its recordings (on by default) the demo holds every reason,
		// stale included, and every skip reason.
		for _, r := range pipeline.Reasons() {
			if got[r] == 0 {
				t.Errorf("summary shows %s with count %d, want > 0\n%s", r, got[r], out)
			}
		}
		if !strings.Contains(out, "digest") {
			t.Errorf("summary has no digest line:\n%s", out)
		}
	})

	vdir := findVersion(t, filepath.Join(dir, "datasets", "larkspur-aisles"))
	m, raw := readManifest(t, vdir)

	t.Run("manifest matches the schema", func(t *testing.T) { validateManifest(t, raw) })

	t.Run("every skip reason", func(t *testing.T) {
		// The demo's recordings hold one of each skip of SPEC §7.1.
		for _, r := range pipeline.SkipReasons() {
			if m.Funnel.SkippedObjects[r] != 1 {
				t.Errorf("skipped_objects[%s] = %d, want 1", r, m.Funnel.SkippedObjects[r])
			}
		}
	})

	t.Run("funnel and sources add up", func(t *testing.T) {
		// SPEC §5: lines = frames + Σ dropped; per source lines = kept + Σ dropped.
		var dropped, kept, lines int64
		perReason := map[string]int64{}
		allReasons := pipeline.Reasons()
		for _, r := range allReasons {
			dropped += m.Funnel.Dropped[r]
		}
		if len(m.Funnel.Dropped) != len(allReasons) {
			t.Errorf("funnel reasons %v, want exactly %v", slices.Sorted(mapKeys(m.Funnel.Dropped)), allReasons)
		}
		if m.Funnel.Lines != m.Funnel.Frames+dropped {
			t.Errorf("funnel lines %d != frames %d + dropped %d", m.Funnel.Lines, m.Funnel.Frames, dropped)
		}
		for _, s := range m.Sources {
			var sd int64
			for r, n := range s.Dropped {
				if !slices.Contains(allReasons, r) {
					t.Errorf("source %s: unknown reason %s", s.Key, r)
				}
				sd += n
				perReason[r] += n
			}
			if s.Lines != s.Kept+sd {
				t.Errorf("source %s: lines %d != kept %d + dropped %d", s.Key, s.Lines, s.Kept, sd)
			}
			kept += s.Kept
			lines += s.Lines
		}
		if kept != m.Funnel.Frames || lines != m.Funnel.Lines {
			t.Errorf("sources keep %d of %d lines, funnel says %d of %d", kept, lines, m.Funnel.Frames, m.Funnel.Lines)
		}
		for _, r := range allReasons {
			if perReason[r] != m.Funnel.Dropped[r] {
				t.Errorf("%s: sources drop %d, funnel %d", r, perReason[r], m.Funnel.Dropped[r])
			}
		}
	})

	t.Run("sources match the objects on disk", func(t *testing.T) {
		// The demo config takes the default include patterns and excludes
		// nothing; objects are in byte order of their keys (SPEC §3.1).
		logs := filepath.Join(dir, "logs")
		type obj struct {
			key  string
			data []byte
		}
		var objs []obj
		err := filepath.WalkDir(logs, func(p string, d fs.DirEntry, err error) error {
			if err != nil || d.IsDir() {
				return err
			}
			rel, _ := filepath.Rel(logs, p)
			key := filepath.ToSlash(rel)
			if strings.HasSuffix(key, ".jsonl") || strings.HasSuffix(key, ".jsonl.gz") || strings.HasSuffix(key, ".jsonl.zst") || strings.HasSuffix(key, ".mcap") {
				b, err := os.ReadFile(p)
				if err != nil {
					return err
				}
				objs = append(objs, obj{key, b})
			}
			return nil
		})
		if err != nil {
			t.Fatal(err)
		}
		sort.Slice(objs, func(i, j int) bool { return objs[i].key < objs[j].key })
		if len(objs) != len(m.Sources) || int64(len(objs)) != m.Funnel.Objects {
			t.Fatalf("%d objects on disk, manifest lists %d (funnel %d)", len(objs), len(m.Sources), m.Funnel.Objects)
		}
		first := map[string]string{}
		var dups int64
		for i, o := range objs {
			s := m.Sources[i]
			sum := sha256.Sum256(o.data)
			sha := hex.EncodeToString(sum[:])
			if s.Key != o.key || s.Bytes != int64(len(o.data)) || s.SHA256 != sha {
				t.Errorf("source %d: %s %d bytes %s, disk: %s %d bytes %s", i, s.Key, s.Bytes, s.SHA256, o.key, len(o.data), sha)
			}
			if want := "file://" + filepath.ToSlash(filepath.Join(logs, filepath.FromSlash(o.key))); s.URI != want {
				t.Errorf("source %s: uri %s, want %s", s.Key, s.URI, want)
			}
			earlier, isDup := first[sha]
			switch {
			case isDup && (s.DuplicateOf == nil || *s.DuplicateOf != earlier):
				t.Errorf("source %s: duplicate_of %v, want %s (same SHA-256)", s.Key, s.DuplicateOf, earlier)
			case !isDup && s.DuplicateOf != nil:
				t.Errorf("source %s: duplicate_of %s, want null", s.Key, *s.DuplicateOf)
			}
			if isDup {
				dups++
				if s.Lines != 0 || s.Kept != 0 {
					t.Errorf("duplicate %s contributes %d lines, %d kept; want none", s.Key, s.Lines, s.Kept)
				}
			} else {
				first[sha] = o.key
			}
		}
		if dups == 0 || dups != m.Funnel.DuplicateObjects {
			t.Errorf("%d duplicate objects on disk, funnel says %d (the demo promises at least one)", dups, m.Funnel.DuplicateObjects)
		}
	})

	t.Run("files match the files on disk", func(t *testing.T) {
		onDisk := versionFiles(t, vdir)
		delete(onDisk, "manifest.json")
		if len(onDisk) != len(m.Files) {
			t.Errorf("%d shard files on disk, manifest lists %d", len(onDisk), len(m.Files))
		}
		var frames, pairs int64
		for i, f := range m.Files {
			if i > 0 && m.Files[i-1].Path >= f.Path {
				t.Errorf("files not sorted by path: %s before %s", m.Files[i-1].Path, f.Path)
			}
			b, ok := onDisk[f.Path]
			if !ok {
				t.Errorf("manifest lists %s, not on disk", f.Path)
				continue
			}
			sum := sha256.Sum256(b)
			if f.Bytes != int64(len(b)) || f.SHA256 != hex.EncodeToString(sum[:]) {
				t.Errorf("%s: manifest %d bytes %s, disk %d bytes %x", f.Path, f.Bytes, f.SHA256, len(b), sum)
			}
			if want := (shardKey{f.Table, f.Split, f.Partition}).path(); want != f.Path {
				t.Errorf("%s: table %s split %s partition %d say %s", f.Path, f.Table, f.Split, f.Partition, want)
			}
			rdr, err := file.OpenParquetFile(filepath.Join(vdir, filepath.FromSlash(f.Path)), false)
			if err != nil {
				t.Errorf("arrow-go cannot open %s: %v", f.Path, err)
				continue
			}
			if rdr.NumRows() != f.Rows || f.Rows == 0 {
				t.Errorf("%s: %d rows in the footer, manifest %d (no empty file)", f.Path, rdr.NumRows(), f.Rows)
			}
			rdr.Close()
			if f.Table == "frames" {
				frames += f.Rows
			} else {
				pairs += f.Rows
			}
		}
		if frames != m.Funnel.Frames || pairs != m.Funnel.Pairs {
			t.Errorf("files hold %d frames and %d pairs, funnel %d and %d", frames, pairs, m.Funnel.Frames, m.Funnel.Pairs)
		}
	})

	t.Run("digest recomputed", func(t *testing.T) {
		// pipeline/manifest.go (Digest): hex SHA-256 of the JSON text
		// {"config_sha256":C,"files":[[path,sha256],…],"sources":[[key,sha256],…]},
		// sources sorted by key, files by path, built here by hand.
		type pair struct{ a, b string }
		var srcs, files []pair
		for _, s := range m.Sources {
			srcs = append(srcs, pair{s.Key, s.SHA256})
		}
		for _, f := range m.Files {
			files = append(files, pair{f.Path, f.SHA256})
		}
		sort.Slice(srcs, func(i, j int) bool { return srcs[i].a < srcs[j].a })
		sort.Slice(files, func(i, j int) bool { return files[i].a < files[j].a })
		str := func(s string) string {
			if !regexp.MustCompile(`^[A-Za-z0-9._=/-]*$`).MatchString(s) {
				t.Fatalf("%q needs JSON escapes this test does not write", s)
			}
			return `"` + s + `"`
		}
		list := func(ps []pair) string {
			var parts []string
			for _, p := range ps {
				parts = append(parts, "["+str(p.a)+","+str(p.b)+"]")
			}
			return "[" + strings.Join(parts, ",") + "]"
		}
		text := `{"config_sha256":` + str(m.ConfigSHA256) + `,"files":` + list(files) + `,"sources":` + list(srcs) + `}`
		sum := sha256.Sum256([]byte(text))
		if got := hex.EncodeToString(sum[:]); got != m.Digest {
			t.Errorf("digest %s, recomputed %s", m.Digest, got)
		}
	})

	t.Run("config_sha256 recomputed", func(t *testing.T) {
		// SPEC §5: SHA-256 of the resolved config's canonical JSON (keys
		// sorted, no insignificant white space: pipeline/configload.go
		// CanonicalJSON) without source.uri, work and output.
		dec := json.NewDecoder(bytes.NewReader(m.Config))
		dec.UseNumber()
		var c map[string]any
		if err := dec.Decode(&c); err != nil {
			t.Fatal(err)
		}
		for _, k := range []string{"work", "output", "storage"} {
			delete(c, k)
		}
		src, ok := c["source"].(map[string]any)
		if !ok {
			t.Fatalf("config.source is %T", c["source"])
		}
		delete(src, "uri")
		var buf bytes.Buffer
		enc := json.NewEncoder(&buf)
		enc.SetEscapeHTML(false)
		if err := enc.Encode(c); err != nil {
			t.Fatal(err)
		}
		sum := sha256.Sum256(bytes.TrimSuffix(buf.Bytes(), []byte("\n")))
		if got := hex.EncodeToString(sum[:]); got != m.ConfigSHA256 {
			t.Errorf("config_sha256 %s, recomputed %s", m.ConfigSHA256, got)
		}
	})

	t.Run("stats over the train frames", func(t *testing.T) {
		// SPEC §5: per embodiment over the train split of frames; std is the
		// population std. Two-pass mean and variance here (Welford and Chan
		// in the program), so the tolerance is relative: 1e-9 of the larger
		// value, and for means of the data's magnitude (a mean near zero
		// carries the rounding of the values summed; common practice).
		obs, act := map[string][][]float64{}, map[string][][]float64{}
		for _, f := range m.Files {
			if f.Table != "frames" || f.Split != "train" {
				continue
			}
			pf := readParquet(t, filepath.Join(vdir, filepath.FromSlash(f.Path)))
			for i := range pf.rows {
				emb, _ := pf.data["embodiment"][i].(string)
				v, _ := asFloats(t, pf.data["obs"][i])
				obs[emb] = append(obs[emb], v)
				if pf.data["act"][i] != nil {
					a, _ := asFloats(t, pf.data["act"][i])
					act[emb] = append(act[emb], a)
				}
			}
		}
		for _, emb := range []string{"picker6", "cart2"} {
			if len(obs[emb]) == 0 {
				t.Fatalf("no %s train frames in the demo", emb)
			}
			st := m.Stats[emb]
			compareStats(t, emb+" obs", obs[emb], st.Obs)
			compareStats(t, emb+" act", act[emb], st.Act)
			for _, c := range m.Counts {
				if c.Embodiment == emb && c.Split == "train" && c.Frames != int64(len(obs[emb])) {
					t.Errorf("counts say %d %s train frames, shards hold %d", c.Frames, emb, len(obs[emb]))
				}
			}
		}
	})

	t.Run("second run elsewhere gives the same bytes and digest", func(t *testing.T) {
		// The same demo logs and config with another work area and output
		// folder. (Demo in another folder would not do: one object holds
		// absolute file:// image URIs, so its SHA-256 depends on the folder.)
		yaml, err := os.ReadFile(filepath.Join(dir, "hindcast.yaml"))
		if err != nil {
			t.Fatal(err)
		}
		text := string(yaml)
		for _, r := range [][2]string{{"\nwork: work\n", "\nwork: work2\n"}, {"\noutput: datasets\n", "\noutput: datasets2\n"}} {
			if strings.Count(text, r[0]) != 1 {
				t.Fatalf("demo config has no single %q line", strings.TrimSpace(r[0]))
			}
			text = strings.Replace(text, r[0], r[1], 1)
		}
		cfg2 := filepath.Join(dir, "hindcast2.yaml")
		writeFile(t, cfg2, []byte(text))
		mustRun(t, "run", "--config", cfg2, "--version", "again", "--parallel", "1")
		v2 := filepath.Join(dir, "datasets2", "larkspur-aisles", "again")
		m2, _ := readManifest(t, v2)
		if m2.Digest != m.Digest {
			t.Errorf("second run digest %s, first %s", m2.Digest, m.Digest)
		}
		a, b := versionFiles(t, vdir), versionFiles(t, v2)
		delete(a, "manifest.json")
		delete(b, "manifest.json")
		if !slices.Equal(slices.Sorted(mapKeys(a)), slices.Sorted(mapKeys(b))) {
			t.Fatalf("second run files %v, first %v", slices.Sorted(mapKeys(b)), slices.Sorted(mapKeys(a)))
		}
		for p := range a {
			if !bytes.Equal(a[p], b[p]) {
				t.Errorf("%s differs between the runs", p)
			}
		}
	})
}

// compareStats checks manifest stats against vectors read back.
func compareStats(t *testing.T, what string, xs [][]float64, got vecStats) {
	t.Helper()
	if got.Count != int64(len(xs)) {
		t.Errorf("%s: count %d, read back %d", what, got.Count, len(xs))
		return
	}
	dims := len(xs[0])
	if len(got.Mean) != dims || len(got.Std) != dims || len(got.Min) != dims || len(got.Max) != dims {
		t.Fatalf("%s: stats of %d/%d/%d/%d dims, want %d", what, len(got.Mean), len(got.Std), len(got.Min), len(got.Max), dims)
	}
	close := func(a, b, scale float64) bool {
		return math.Abs(a-b) <= 1e-9*max(math.Abs(a), math.Abs(b), scale)
	}
	n := float64(len(xs))
	for d := range dims {
		var sum, lo, hi, mag float64
		lo, hi = math.Inf(1), math.Inf(-1)
		for _, x := range xs {
			sum += x[d]
			lo, hi = min(lo, x[d]), max(hi, x[d])
			mag = max(mag, math.Abs(x[d]))
		}
		mean := sum / n
		var ss float64
		for _, x := range xs {
			ss += (x[d] - mean) * (x[d] - mean)
		}
		std := math.Sqrt(ss / n)
		if !close(got.Mean[d], mean, mag) {
			t.Errorf("%s dim %d: mean %v, read back %v", what, d, got.Mean[d], mean)
		}
		if !close(got.Std[d], std, 0) {
			t.Errorf("%s dim %d: std %v, read back %v", what, d, got.Std[d], std)
		}
		if got.Min[d] != lo || got.Max[d] != hi {
			t.Errorf("%s dim %d: min %v max %v, read back %v %v", what, d, got.Min[d], got.Max[d], lo, hi)
		}
	}
}
