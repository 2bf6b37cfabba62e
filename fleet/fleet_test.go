package fleet

import (
	"bytes"
	"compress/gzip"
	"crypto/sha256"
	"encoding/base64"
	"encoding/binary"
	"encoding/hex"
	"encoding/json"
	"errors"
	"hash/crc32"
	"image"
	_ "image/jpeg" // registers JPEG for image.Decode
	_ "image/png"  // registers PNG for image.Decode
	"io"
	"io/fs"
	"math"
	"math/rand/v2"
	"net/url"
	"os"
	"path/filepath"
	"regexp"
	"slices"
	"sort"
	"strconv"
	"strings"
	"testing"
	"time"
	"unicode/utf8"

	"github.com/klauspost/compress/zstd"
	"gopkg.in/yaml.v3"
)

// ---------------------------------------------------------------------------
// Demo: determinism

// treeHashes returns the SHA-256 of every file under root by slash path; when
// norm is set, the demo folder's absolute file:// prefix is replaced first so
// trees written to different folders can be compared.
func treeHashes(t *testing.T, root string, norm bool) map[string]string {
	t.Helper()
	abs, err := filepath.Abs(root)
	if err != nil {
		t.Fatal(err)
	}
	prefix := []byte((&url.URL{Scheme: "file", Path: filepath.ToSlash(abs)}).String())
	out := map[string]string{}
	err = filepath.WalkDir(root, func(p string, e fs.DirEntry, err error) error {
		if err != nil || e.IsDir() {
			return err
		}
		b, err := os.ReadFile(p)
		if err != nil {
			return err
		}
		if norm {
			b = bytes.ReplaceAll(b, prefix, []byte("file://DEMO"))
		}
		rel, _ := filepath.Rel(root, p)
		sum := sha256.Sum256(b)
		out[filepath.ToSlash(rel)] = hex.EncodeToString(sum[:])
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	return out
}

func TestDemoDeterministic(t *testing.T) {
	a, b := t.TempDir(), t.TempDir()
	if err := Demo(a); err != nil {
		t.Fatal(err)
	}
	if err := Demo(b); err != nil {
		t.Fatal(err)
	}
	ha, hb := treeHashes(t, a, true), treeHashes(t, b, true)
	if len(ha) != len(hb) {
		t.Fatalf("file count: %d vs %d", len(ha), len(hb))
	}
	for p, h := range ha {
		if hb[p] != h {
			t.Errorf("%s differs between two demo folders", p)
		}
	}
	// Without normalisation, only the object with absolute file:// URIs differs.
	ra, rb := treeHashes(t, a, false), treeHashes(t, b, false)
	var differ []string
	for p, h := range ra {
		if rb[p] != h {
			differ = append(differ, p)
		}
	}
	if want := []string{"logs/day=2026-11-30/unit=lark-p6-004/session-0001.jsonl"}; !slices.Equal(differ, want) {
		t.Errorf("raw differences %v, want %v", differ, want)
	}
	// Writing again into the same folder gives the same bytes, file URIs included.
	if err := Demo(a); err != nil {
		t.Fatal(err)
	}
	for p, h := range treeHashes(t, a, false) {
		if ra[p] != h {
			t.Errorf("%s changed on a second Demo into the same folder", p)
		}
	}
}

// ---------------------------------------------------------------------------
// Demo: config

// demoYAML mirrors the SPEC §2 keys, decoded with KnownFields so a misspelt
// key in the demo config fails here.
type demoYAML struct {
	Dataset string `yaml:"dataset"`
	Source  struct {
		URI          string   `yaml:"uri"`
		Include      []string `yaml:"include"`
		Exclude      []string `yaml:"exclude"`
		MaxLineBytes int      `yaml:"max_line_bytes"`
	} `yaml:"source"`
	Work        string `yaml:"work"`
	Output      string `yaml:"output"`
	Partitions  int    `yaml:"partitions"`
	Seed        int64  `yaml:"seed"`
	Embodiments map[string]struct {
		Obs           int       `yaml:"obs"`
		Act           int       `yaml:"act"`
		ObsLow        yaml.Node `yaml:"obs_low"`
		ObsHigh       yaml.Node `yaml:"obs_high"`
		ActLow        yaml.Node `yaml:"act_low"`
		ActHigh       yaml.Node `yaml:"act_high"`
		Cameras       []string  `yaml:"cameras"`
		GoalDims      []int     `yaml:"goal_dims"`
		GoalTolerance float64   `yaml:"goal_tolerance"`
	} `yaml:"embodiments"`
	Episodes struct {
		MaxGap   string `yaml:"max_gap"`
		MinSteps int    `yaml:"min_steps"`
		MaxSteps int    `yaml:"max_steps"`
	} `yaml:"episodes"`
	Goals struct {
		Future    int     `yaml:"future"`
		Geometric int     `yaml:"geometric"`
		Final     int     `yaml:"final"`
		Negative  int     `yaml:"negative"`
		Gamma     float64 `yaml:"gamma"`
		Horizon   int     `yaml:"horizon"`
	} `yaml:"goals"`
	Splits  map[string]float64 `yaml:"splits"`
	SplitBy string             `yaml:"split_by"`
	Float   string             `yaml:"float"`
	Parquet struct {
		Compression  string `yaml:"compression"`
		RowGroupRows int    `yaml:"row_group_rows"`
	} `yaml:"parquet"`
}

// bounds expands a bound that is a number or a list to one value per dim.
func bounds(t *testing.T, n *yaml.Node, dims int) []float64 {
	t.Helper()
	out := make([]float64, dims)
	if n.Kind == yaml.ScalarNode {
		var v float64
		if err := n.Decode(&v); err != nil {
			t.Fatal(err)
		}
		for i := range out {
			out[i] = v
		}
		return out
	}
	var vs []float64
	if err := n.Decode(&vs); err != nil {
		t.Fatal(err)
	}
	if len(vs) != dims {
		t.Fatalf("bound list of %d values for %d dims", len(vs), dims)
	}
	return vs
}

func readDemoConfig(t *testing.T, dir string) demoYAML {
	t.Helper()
	b, err := os.ReadFile(filepath.Join(dir, "hindcast.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	dec := yaml.NewDecoder(bytes.NewReader(b))
	dec.KnownFields(true)
	var c demoYAML
	if err := dec.Decode(&c); err != nil {
		t.Fatalf("demo config: %v", err)
	}
	return c
}

func TestDemoConfig(t *testing.T) {
	dir := t.TempDir()
	if err := Demo(dir); err != nil {
		t.Fatal(err)
	}
	c := readDemoConfig(t, dir)
	check := func(name string, got, want any) {
		t.Helper()
		if !equalAny(got, want) {
			t.Errorf("%s = %v, want %v", name, got, want)
		}
	}
	check("dataset", c.Dataset, "larkspur-aisles")
	check("source.uri", c.Source.URI, "logs")
	check("source.include", c.Source.Include, []string{"**/*.jsonl", "**/*.jsonl.gz", "**/*.jsonl.zst"})
	check("source.max_line_bytes", c.Source.MaxLineBytes, 65536)
	check("work", c.Work, "work")
	check("output", c.Output, "datasets")
	check("partitions", c.Partitions, 4)
	check("seed", c.Seed, int64(7))
	check("embodiments", len(c.Embodiments), 2)
	p6, c2 := c.Embodiments["picker6"], c.Embodiments["cart2"]
	check("picker6.obs", p6.Obs, 10)
	check("picker6.act", p6.Act, 7)
	check("picker6.obs_low", bounds(t, &p6.ObsLow, 10), []float64{-10, -10, -10, -10, -10, -10, -10, -10, -10, -10})
	check("picker6.act_high", bounds(t, &p6.ActHigh, 7), []float64{1, 1, 1, 1, 1, 1, 1})
	check("picker6.cameras", p6.Cameras, []string{"wrist"})
	check("picker6.goal_dims", p6.GoalDims, []int{7, 8, 9})
	check("cart2.obs", c2.Obs, 5)
	check("cart2.act", c2.Act, 2)
	check("cart2.obs_high", bounds(t, &c2.ObsHigh, 5), []float64{10, 10, 3.2, 2, 2})
	check("cart2.cameras", len(c2.Cameras), 0)
	check("cart2.goal_dims", c2.GoalDims, []int{0, 1})
	check("episodes", c.Episodes, struct {
		MaxGap   string `yaml:"max_gap"`
		MinSteps int    `yaml:"min_steps"`
		MaxSteps int    `yaml:"max_steps"`
	}{"500ms", 10, 200})
	check("goals.future", c.Goals.Future, 2)
	check("goals.geometric", c.Goals.Geometric, 1)
	check("goals.final", c.Goals.Final, 1)
	check("goals.negative", c.Goals.Negative, 1)
	check("goals.gamma", c.Goals.Gamma, 0.99)
	check("splits", c.Splits, map[string]float64{"train": 0.8, "val": 0.1, "test": 0.1})
	check("float", c.Float, "float32")
	check("parquet.compression", c.Parquet.Compression, "zstd")
}

func equalAny(a, b any) bool {
	ja, _ := json.Marshal(a)
	jb, _ := json.Marshal(b)
	return bytes.Equal(ja, jb)
}

// ---------------------------------------------------------------------------
// Demo: faults, checked by an independent reading of SPEC §3.1 and §3.2

type demoObject struct {
	key     string
	raw     []byte
	data    []byte // decompressed
	comp    string // "", "gz", "zst"
	readErr error  // from decompression
}

// readObjects lists the log objects under logs as the default include globs
// do and reads them back, detecting compression by magic bytes: gzip is
// 1F 8B (RFC 1952 §2.3.1), zstd is 28 B5 2F FD (RFC 8878 §3.1.1; section
// numbers from memory).
func readObjects(t *testing.T, logs string) []demoObject {
	t.Helper()
	var objs []demoObject
	zd, err := zstd.NewReader(nil)
	if err != nil {
		t.Fatal(err)
	}
	defer zd.Close()
	err = filepath.WalkDir(logs, func(p string, e fs.DirEntry, err error) error {
		if err != nil || e.IsDir() {
			return err
		}
		name := e.Name()
		if !strings.HasSuffix(name, ".jsonl") && !strings.HasSuffix(name, ".jsonl.gz") && !strings.HasSuffix(name, ".jsonl.zst") {
			return nil
		}
		raw, err := os.ReadFile(p)
		if err != nil {
			return err
		}
		rel, _ := filepath.Rel(logs, p)
		o := demoObject{key: filepath.ToSlash(rel), raw: raw, data: raw}
		switch {
		case bytes.HasPrefix(raw, []byte{0x1f, 0x8b}):
			o.comp = "gz"
			zr, err := gzip.NewReader(bytes.NewReader(raw))
			if err != nil {
				return err
			}
			o.data, o.readErr = io.ReadAll(zr)
		case bytes.HasPrefix(raw, []byte{0x28, 0xb5, 0x2f, 0xfd}):
			o.comp = "zst"
			o.data, o.readErr = zd.DecodeAll(raw, nil)
		}
		objs = append(objs, o)
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	sort.Slice(objs, func(i, j int) bool { return objs[i].key < objs[j].key }) // SPEC §3.1: byte order of keys
	return objs
}

// refFrame is an accepted frame of the reference reading.
type refFrame struct {
	unit, key string
	t         int64
	line      int
	ev        string
	content   string // embodiment, obs, act, ev, task, success and img as written
}

type refFunnel struct {
	objects, dupObjects, lines, blank, frames, episodes int
	dropped                                             map[string]int
	bySource                                            map[string]map[string]int // key → reason → count
	incomplete                                          []string
	dupOf                                               map[string]string
	imgKinds                                            map[string]map[string]bool // key / file / data / jpeg → units; missing → keys
}

var unitRE = regexp.MustCompile(`^[A-Za-z0-9._-]{1,64}$`)

// sanitize replaces the bare tokens NaN, Infinity and -Infinity outside
// strings with the string "\u0000nf", so encoding/json can read the rest.
func sanitize(line []byte) ([]byte, bool) {
	var out []byte
	found, inStr := false, false
	for i := 0; i < len(line); i++ {
		c := line[i]
		if inStr {
			out = append(out, c)
			if c == '\\' && i+1 < len(line) {
				i++
				out = append(out, line[i])
			} else if c == '"' {
				inStr = false
			}
			continue
		}
		if c == '"' {
			inStr = true
		}
		matched := false
		for _, tok := range []string{"NaN", "-Infinity", "Infinity"} {
			if bytes.HasPrefix(line[i:], []byte(tok)) {
				out = append(out, `"\u0000nf"`...)
				i += len(tok) - 1
				found, matched = true, true
				break
			}
		}
		if !matched {
			out = append(out, c)
		}
	}
	return out, found
}

// vector reads a JSON array of numbers; ok is false when it is not one.
func vector(raw json.RawMessage) (v []float64, nonFinite, ok bool) {
	var elems []json.RawMessage
	if json.Unmarshal(raw, &elems) != nil || elems == nil {
		return nil, false, false
	}
	for _, e := range elems {
		if string(e) == `"\u0000nf"` {
			nonFinite = true
			v = append(v, math.NaN())
			continue
		}
		f, err := strconv.ParseFloat(string(e), 64)
		if err != nil || e[0] == '"' {
			return nil, false, false
		}
		v = append(v, f)
	}
	return v, nonFinite, true
}

// pngComplete checks a PNG datastream: the 8-byte signature (W3C PNG spec /
// ISO/IEC 15948 §5.2), chunks of length, type, data and a CRC-32 over type
// and data (§5.3), ending with IEND (§11.2.5) at the end of the bytes
// (section numbers from memory).
func pngComplete(b []byte) bool {
	if !bytes.HasPrefix(b, []byte("\x89PNG\r\n\x1a\n")) {
		return false
	}
	for p := 8; p+12 <= len(b); {
		n := int(binary.BigEndian.Uint32(b[p:]))
		if p+12+n > len(b) {
			return false
		}
		if crc32.ChecksumIEEE(b[p+4:p+8+n]) != binary.BigEndian.Uint32(b[p+8+n:]) {
			return false
		}
		typ := string(b[p+4 : p+8])
		p += 12 + n
		if typ == "IEND" {
			return p == len(b)
		}
	}
	return false
}

// jpegComplete checks for the SOI marker FF D8 first and the EOI marker FF D9
// last (ITU-T T.81 Table B.1, marker codes; from memory).
func jpegComplete(b []byte) bool {
	return len(b) >= 4 && b[0] == 0xff && b[1] == 0xd8 && b[len(b)-2] == 0xff && b[len(b)-1] == 0xd9
}

// demoBounds holds the bounds of the demo config, per embodiment.
type demoBounds struct {
	obs, act                       int
	obsLow, obsHigh, actLow, actHi []float64
	cameras                        []string
}

// reference reads the demo's objects by the rules of SPEC §3.1 and §3.2, with
// the demo config's values, and returns the funnel a pipeline run must report.
// It compares duplicate content as written, which is exact for the demo: its
// duplicates are byte copies and its conflicts differ by centimetres.
func reference(t *testing.T, dir string, objs []demoObject) refFunnel {
	t.Helper()
	cfg := readDemoConfig(t, dir)
	embs := map[string]demoBounds{}
	for name, e := range cfg.Embodiments {
		embs[name] = demoBounds{
			obs: e.Obs, act: e.Act,
			obsLow: bounds(t, &e.ObsLow, e.Obs), obsHigh: bounds(t, &e.ObsHigh, e.Obs),
			actLow: bounds(t, &e.ActLow, e.Act), actHi: bounds(t, &e.ActHigh, e.Act),
			cameras: e.Cameras,
		}
	}
	maxGap, err := time.ParseDuration(cfg.Episodes.MaxGap)
	if err != nil {
		t.Fatal(err)
	}
	logs := filepath.Join(dir, cfg.Source.URI)

	f := refFunnel{
		dropped: map[string]int{}, bySource: map[string]map[string]int{}, dupOf: map[string]string{},
		imgKinds: map[string]map[string]bool{"key": {}, "file": {}, "data": {}, "jpeg": {}, "missing": {}},
	}
	drop := func(key, reason string) {
		f.dropped[reason]++
		if f.bySource[key] == nil {
			f.bySource[key] = map[string]int{}
		}
		f.bySource[key][reason]++
	}
	var accepted []refFrame
	seen := map[[32]byte]string{}
	for _, o := range objs {
		f.objects++
		sum := sha256.Sum256(o.raw)
		if first, ok := seen[sum]; ok {
			f.dupObjects++
			f.dupOf[o.key] = first
			continue
		}
		seen[sum] = o.key
		incomplete := o.readErr != nil
		if incomplete {
			f.incomplete = append(f.incomplete, o.key)
		}
		data := bytes.TrimPrefix(o.data, []byte("\xef\xbb\xbf"))
		terminated := len(data) == 0 || data[len(data)-1] == '\n'
		parts := bytes.Split(data, []byte("\n"))
		if terminated {
			parts = parts[:len(parts)-1]
		}
		lastT := map[string]int64{}
		for i, line := range parts {
			last := i == len(parts)-1 && !terminated
			line = bytes.TrimSuffix(line, []byte("\r"))
			if len(bytes.Trim(line, " \t\r")) == 0 {
				f.blank++
				continue
			}
			f.lines++
			reason, fr := classify(line, last, incomplete, cfg.Source.MaxLineBytes, embs, logs, f.imgKinds)
			if reason == "" {
				if prev, ok := lastT[fr.unit]; ok && fr.t <= prev {
					reason = "time_regress"
				}
			}
			if reason != "" {
				drop(o.key, reason)
				continue
			}
			lastT[fr.unit] = fr.t
			fr.key, fr.line = o.key, i+1
			accepted = append(accepted, fr)
		}
	}

	// SPEC §3.2.
	sort.SliceStable(accepted, func(i, j int) bool {
		a, b := accepted[i], accepted[j]
		if a.unit != b.unit {
			return a.unit < b.unit
		}
		if a.t != b.t {
			return a.t < b.t
		}
		if a.key != b.key {
			return a.key < b.key
		}
		return a.line < b.line
	})
	var kept []refFrame
	for _, fr := range accepted {
		if n := len(kept); n > 0 && kept[n-1].unit == fr.unit && kept[n-1].t == fr.t {
			if kept[n-1].content == fr.content {
				drop(fr.key, "duplicate")
			} else {
				drop(fr.key, "conflict")
			}
			continue
		}
		kept = append(kept, fr)
	}
	var episode []refFrame
	flush := func() {
		for len(episode) > 0 {
			n := min(len(episode), cfg.Episodes.MaxSteps)
			if n < cfg.Episodes.MinSteps {
				for _, fr := range episode[:n] {
					drop(fr.key, "short_episode")
				}
			} else {
				f.episodes++
				f.frames += n
			}
			episode = episode[n:]
		}
	}
	for i, fr := range kept {
		if i > 0 {
			p := kept[i-1]
			if p.unit != fr.unit || fr.ev == "start" || p.ev == "end" || time.Duration(fr.t-p.t) > maxGap {
				flush()
			}
		}
		episode = append(episode, fr)
	}
	flush()
	return f
}

// classify returns the first drop reason of SPEC §3.1 that applies to one
// line, up to image_corrupt (time_regress needs the object's state), or "" and
// the accepted frame.
func classify(line []byte, last, incomplete bool, maxLine int, embs map[string]demoBounds, logs string, kinds map[string]map[string]bool) (string, refFrame) {
	var fr refFrame
	if len(line) > maxLine {
		return "oversize", fr
	}
	clean, nonFinite := sanitize(line)
	if last && (incomplete || !json.Valid(clean)) {
		return "truncated", fr
	}
	if !utf8.Valid(line) {
		return "malformed", fr
	}
	var m map[string]json.RawMessage
	if json.Unmarshal(clean, &m) != nil || m == nil {
		return "malformed", fr
	}
	var emb string
	if json.Unmarshal(m["unit"], &fr.unit) != nil || !unitRE.MatchString(fr.unit) || json.Unmarshal(m["embodiment"], &emb) != nil {
		return "malformed", fr
	}
	tRaw := string(m["t"])
	tv, err := strconv.ParseInt(tRaw, 10, 64)
	if err != nil { // no fraction, no exponent (SPEC §1)
		return "malformed", fr
	}
	fr.t = tv
	obs, nfObs, ok := vector(m["obs"])
	if !ok {
		return "malformed", fr
	}
	var act []float64
	nfAct := false
	if raw, present := m["act"]; present && string(raw) != "null" {
		if act, nfAct, ok = vector(raw); !ok {
			return "malformed", fr
		}
	}
	b, declared := embs[emb]
	if !declared {
		return "unknown_embodiment", fr
	}
	if len(obs) != b.obs || (act != nil && len(act) != b.act) {
		return "dim_mismatch", fr
	}
	if nonFinite && (nfObs || nfAct) {
		return "non_finite", fr
	}
	for i, v := range obs {
		if v < b.obsLow[i] || v > b.obsHigh[i] {
			return "out_of_range", fr
		}
	}
	for i, v := range act {
		if v < b.actLow[i] || v > b.actHi[i] {
			return "out_of_range", fr
		}
	}
	var imgs map[string]*string
	if raw, ok := m["img"]; ok && json.Unmarshal(raw, &imgs) != nil {
		return "malformed", fr
	}
	for _, cam := range b.cameras {
		ref := imgs[cam]
		if ref == nil {
			return "image_missing", fr
		}
		var data []byte
		switch {
		case strings.HasPrefix(*ref, "data:"):
			kinds["data"][fr.unit] = true
			if data, err = base64.StdEncoding.DecodeString((*ref)[strings.IndexByte(*ref, ',')+1:]); err != nil {
				return "image_corrupt", fr
			}
		case strings.HasPrefix(*ref, "file://"):
			kinds["file"][fr.unit] = true
			u, err := url.Parse(*ref)
			if err != nil {
				return "malformed", fr
			}
			if data, err = os.ReadFile(filepath.FromSlash(u.Path)); err != nil {
				return "image_missing", fr
			}
		default:
			kinds["key"][fr.unit] = true
			if strings.HasSuffix(*ref, ".jpg") {
				kinds["jpeg"][fr.unit] = true
			}
			if data, err = os.ReadFile(filepath.Join(logs, filepath.FromSlash(*ref))); err != nil {
				kinds["missing"][*ref] = true
				return "image_missing", fr
			}
		}
		if !pngComplete(data) && !jpegComplete(data) {
			return "image_corrupt", fr
		}
		im, _, err := image.Decode(bytes.NewReader(data))
		if err != nil || im.Bounds() != image.Rect(0, 0, 16, 16) {
			return "image_corrupt", fr // a complete but undecodable image would be a demo bug
		}
	}
	var ev string
	_ = json.Unmarshal(m["ev"], &ev)
	fr.ev = ev
	var content strings.Builder
	for _, k := range []string{"embodiment", "obs", "act", "ev", "task", "success", "img"} {
		if v := m[k]; string(v) != "null" {
			content.Write(v)
		}
		content.WriteByte(0)
	}
	fr.content = content.String()
	return "", fr
}

func TestDemoFaults(t *testing.T) {
	dir := t.TempDir()
	start := time.Now()
	if err := Demo(dir); err != nil {
		t.Fatal(err)
	}
	t.Logf("demo written in %v", time.Since(start))
	logs := filepath.Join(dir, "logs")
	objs := readObjects(t, logs)
	byKey := map[string]demoObject{}
	comps := map[string]int{}
	for _, o := range objs {
		byKey[o.key] = o
		comps[o.comp]++
	}
	if len(objs) != 25 || comps[""] != 12 || comps["gz"] != 4 || comps["zst"] != 9 {
		t.Errorf("objects %d (plain %d, gz %d, zst %d), want 25 (12, 4, 9)", len(objs), comps[""], comps["gz"], comps["zst"])
	}
	if _, ok := byKey["lark-c2-008.jsonl"]; !ok {
		t.Error("no object at the root of the source")
	}

	// Byte-level faults.
	const (
		p6 = "day=2026-11-30/unit=lark-p6-"
		c2 = "day=2026-11-30/unit=lark-c2-"
	)
	var withBOM, withCR, unterminated, cutStreams []string
	for _, o := range objs {
		if bytes.HasPrefix(o.data, []byte{0xef, 0xbb, 0xbf}) { // UTF-8 BOM, RFC 3629 §6 (from memory)
			withBOM = append(withBOM, o.key)
		}
		if bytes.Contains(o.data, []byte("\r")) {
			withCR = append(withCR, o.key)
		}
		if len(o.data) > 0 && o.data[len(o.data)-1] != '\n' {
			unterminated = append(unterminated, o.key)
		}
		if errors.Is(o.readErr, io.ErrUnexpectedEOF) {
			cutStreams = append(cutStreams, o.key)
		} else if o.readErr != nil {
			t.Errorf("%s: %v", o.key, o.readErr)
		}
	}
	wantKeys := func(name string, got []string, want ...string) {
		t.Helper()
		if !slices.Equal(got, want) {
			t.Errorf("%s: %v, want %v", name, got, want)
		}
	}
	wantKeys("objects with a BOM", withBOM, p6+"007/session-0001.jsonl")
	wantKeys("objects with CR", withCR, p6+"006/session-0001.jsonl")
	wantKeys("unterminated objects", unterminated, p6+"008/session-0001.jsonl.gz", p6+"009/session-0001.jsonl")
	wantKeys("cut compressed streams", cutStreams, p6+"008/session-0001.jsonl.gz")
	crlf := byKey[p6+"006/session-0001.jsonl"].data
	if n, m := bytes.Count(crlf, []byte("\r\n")), bytes.Count(crlf, []byte("\n")); n != 560 || m != 560 {
		t.Errorf("CRLF object: %d CRLF of %d line ends, want 560 of 560", n, m)
	}
	if last := byKey[p6+"009/session-0001.jsonl"].data; json.Valid(last[bytes.LastIndexByte(last, '\n')+1:]) {
		t.Error("the cut last line still parses")
	}

	tokens := map[string]int{}
	for _, o := range objs {
		for _, tok := range []string{",NaN,", ",Infinity,", ",-Infinity,", `"ev":"start"`, `"ev":"end"`, `"ev":"pause"`, `"success":true`, `"success":false`, `"task":"pick-tote"`, `"task":"dock"`, `"task":null`, `"fw":`, `"bat":{`, `"diag":`, `"overhead":`} {
			tokens[tok] += bytes.Count(o.data, []byte(tok))
		}
	}
	for tok, want := range map[string]int{",NaN,": 1, ",Infinity,": 1, ",-Infinity,": 1, `"ev":"pause"`: 1, `"diag":`: 1, `"overhead":`: 1} {
		if tokens[tok] != want {
			t.Errorf("%s appears %d times, want %d", tok, tokens[tok], want)
		}
	}
	for _, tok := range []string{`"ev":"start"`, `"ev":"end"`, `"success":true`, `"success":false`, `"task":"pick-tote"`, `"task":"dock"`, `"task":null`, `"fw":`, `"bat":{`} {
		if tokens[tok] == 0 {
			t.Errorf("%s never appears", tok)
		}
	}

	// Duplicate objects.
	var pairs [][2]string
	for i, a := range objs {
		for _, b := range objs[i+1:] {
			if sha256.Sum256(a.raw) == sha256.Sum256(b.raw) {
				pairs = append(pairs, [2]string{a.key, b.key})
			}
		}
	}
	if want := [][2]string{{p6 + "010/session-0001.jsonl.zst", "reupload/unit=lark-p6-010/session-0001.jsonl.zst"}}; !slices.Equal(pairs, want) {
		t.Errorf("identical objects %v, want %v", pairs, want)
	}

	// The funnel by the rules, with the demo config's values.
	f := reference(t, dir, objs)
	wantDropped := map[string]int{
		"oversize": 1, "truncated": 2, "malformed": 7, "unknown_embodiment": 9, "dim_mismatch": 2,
		"non_finite": 3, "out_of_range": 2, "image_missing": 3, "image_corrupt": 6, "time_regress": 3,
		"duplicate": 8, "conflict": 5, "short_episode": 0,
	}
	// short_episode: the two forced episodes (6 frames in lark-c2-002, 7 in
	// lark-c2-006) plus the chunks under min_steps that max_steps: 200 and the
	// ends of sessions leave, as this reading counts them (a golden value: a
	// pipeline run on the demo must report the same).
	wantShort := map[string]int{
		c2 + "002/session-0001.jsonl.zst": 6,
		c2 + "003/session-0001.jsonl.gz":  16,
		c2 + "006/session-0001.jsonl":     7 + 5,
		"lark-c2-008.jsonl":               1,
		p6 + "005/session-0001.jsonl.zst": 4,
	}
	wantDropped["short_episode"] = 0
	for key, n := range wantShort {
		wantDropped["short_episode"] += n
		if got := f.bySource[key]["short_episode"]; got != n {
			t.Errorf("short_episode of %s: %d, want %d", key, got, n)
		}
	}
	for reason, want := range wantDropped {
		if f.dropped[reason] != want {
			t.Errorf("dropped[%s] = %d, want %d", reason, f.dropped[reason], want)
		}
	}
	if len(f.dropped) != len(wantDropped) {
		t.Errorf("drop reasons %v, want exactly %v", f.dropped, wantDropped)
	}
	sumDropped := 0
	for _, n := range f.dropped {
		sumDropped += n
	}
	t.Logf("funnel: objects %d, duplicate objects %d, lines %d, blank %d, frames %d, episodes %d, dropped %v",
		f.objects, f.dupObjects, f.lines, f.blank, f.frames, f.episodes, f.dropped)
	if f.lines != f.frames+sumDropped {
		t.Errorf("lines %d != frames %d + dropped %d", f.lines, f.frames, sumDropped)
	}
	if f.objects != 25 || f.dupObjects != 1 || f.blank != 5 {
		t.Errorf("objects %d, duplicate objects %d, blank lines %d; want 25, 1, 5", f.objects, f.dupObjects, f.blank)
	}
	if f.dupOf["reupload/unit=lark-p6-010/session-0001.jsonl.zst"] != p6+"010/session-0001.jsonl.zst" {
		t.Errorf("duplicate_of: %v", f.dupOf)
	}
	wantKeys("incomplete objects", f.incomplete, p6+"008/session-0001.jsonl.gz")
	if got := f.bySource[c2+"004/session-0002.jsonl"]["duplicate"]; got != 8 {
		t.Errorf("duplicates charged to the second overlapping object: %d, want 8", got)
	}
	if got := f.bySource["recal/unit=lark-c2-005/session-0001.jsonl"]["conflict"]; got != 5 {
		t.Errorf("conflicts charged to the recal object: %d, want 5", got)
	}
	if f.lines != 27362 || f.frames != 27272 || f.episodes != 198 {
		t.Errorf("lines %d, frames %d, episodes %d; want 27362, 27272, 198 (golden)", f.lines, f.frames, f.episodes)
	}

	// Images, three ways.
	units := func(kind string) []string {
		var us []string
		for u := range f.imgKinds[kind] {
			us = append(us, u)
		}
		sort.Strings(us)
		return us
	}
	wantKeys("units with file:// images", units("file"), "lark-p6-004")
	wantKeys("units with data: images", units("data"), "lark-p6-005")
	wantKeys("units with JPEG images", units("jpeg"), "lark-p6-003", "lark-p6-009")
	if missing := units("missing"); len(missing) != 1 || !regexp.MustCompile(`^frames/lark-p6-002/wrist-\d{19}\.png$`).MatchString(missing[0]) {
		t.Errorf("image keys referenced but absent: %v, want one of lark-p6-002", missing)
	}
	wantKeys("units with image keys", units("key"), "lark-p6-001", "lark-p6-002", "lark-p6-003", "lark-p6-006",
		"lark-p6-007", "lark-p6-008", "lark-p6-009", "lark-p6-010")

	// Size.
	var total int64
	_ = filepath.WalkDir(dir, func(p string, e fs.DirEntry, err error) error {
		if err == nil && !e.IsDir() {
			if info, err := e.Info(); err == nil {
				total += info.Size()
			}
		}
		return err
	})
	if total > 30<<20 {
		t.Errorf("demo writes %d bytes, want at most 30 MiB", total)
	}
}

// ---------------------------------------------------------------------------
// Bench

type benchLine struct {
	Unit       string    `json:"unit"`
	Embodiment string    `json:"embodiment"`
	T          int64     `json:"t"`
	Obs        []float64 `json:"obs"`
	Act        []float64 `json:"act"`
	Ev         string    `json:"ev"`
	Task       string    `json:"task"`
	Success    *bool     `json:"success"`
}

var benchKeyRE = regexp.MustCompile(`^day=\d{4}-\d{2}-\d{2}/unit=(lark-(p6|c2)-\d{3})/session-\d{4}\.jsonl(\.zst)?$`)

// checkBench reads every object Bench wrote and checks it against the rules
// of SPEC §3 and the shape of the benchmark fleet; it returns the frames per
// embodiment and the bytes on disk.
func checkBench(t *testing.T, dir string, compressed bool) (map[string]int, int64) {
	t.Helper()
	zd, err := zstd.NewReader(nil)
	if err != nil {
		t.Fatal(err)
	}
	defer zd.Close()
	frames := map[string]int{}
	var size int64
	lastOfUnit := map[string]int64{}
	err = filepath.WalkDir(dir, func(p string, e fs.DirEntry, err error) error {
		if err != nil || e.IsDir() {
			return err
		}
		rel, _ := filepath.Rel(dir, p)
		key := filepath.ToSlash(rel)
		m := benchKeyRE.FindStringSubmatch(key)
		if m == nil || (m[3] != "") != compressed {
			t.Errorf("unexpected object %s", key)
			return nil
		}
		raw, err := os.ReadFile(p)
		if err != nil {
			return err
		}
		size += int64(len(raw))
		data := raw
		if compressed {
			if data, err = zd.DecodeAll(raw, nil); err != nil {
				t.Errorf("%s: %v", key, err)
				return nil
			}
		}
		if len(data) == 0 || data[len(data)-1] != '\n' {
			t.Errorf("%s: does not end with a line end", key)
		}
		lines := bytes.Split(data[:len(data)-1], []byte("\n"))
		if len(lines) < 10 || len(lines) > benchMaxSession {
			t.Errorf("%s: %d frames", key, len(lines))
		}
		var prev benchLine
		steps := 0
		for i, l := range lines {
			var fr benchLine
			if err := json.Unmarshal(l, &fr); err != nil {
				t.Fatalf("%s:%d: %v", key, i+1, err)
			}
			wantObs, wantAct, period := 10, 7, p6Period
			if fr.Embodiment == "cart2" {
				wantObs, wantAct, period = 5, 2, c2Period
			} else if fr.Embodiment != "picker6" {
				t.Fatalf("%s:%d: embodiment %q", key, i+1, fr.Embodiment)
			}
			if fr.Unit != m[1] || len(fr.Obs) != wantObs || len(fr.Act) != wantAct {
				t.Fatalf("%s:%d: unit %s, obs %d, act %d", key, i+1, fr.Unit, len(fr.Obs), len(fr.Act))
			}
			for _, v := range fr.Obs {
				if !(v >= -10 && v <= 10) {
					t.Fatalf("%s:%d: obs value %v outside -10..10", key, i+1, v)
				}
			}
			for _, v := range fr.Act {
				if !(v >= -1 && v <= 1) {
					t.Fatalf("%s:%d: act value %v outside -1..1", key, i+1, v)
				}
			}
			if i > 0 {
				gap := fr.T - prev.T
				inEpisode := gap > period-5e6 && gap < period+5e6
				between := gap > benchGap-5e6 && gap < benchGap+5e6
				if !inEpisode && !between {
					t.Fatalf("%s:%d: gap %d ns", key, i+1, gap)
				}
				if between != (fr.Ev == "start") || between != (prev.Ev == "end") {
					t.Fatalf("%s:%d: gap %d ns with ev %q after %q", key, i+1, gap, fr.Ev, prev.Ev)
				}
				if between {
					if steps < benchMinEpisode || steps > benchMaxEpisode || !chunksOK(steps) {
						t.Fatalf("%s:%d: episode of %d steps", key, i, steps)
					}
					steps = 0
				}
			}
			if last, ok := lastOfUnit[fr.Unit]; ok && i == 0 && fr.T <= last+int64(500*time.Millisecond) {
				t.Fatalf("%s: starts %d ns after the unit's previous session", key, fr.T-last)
			}
			steps++
			prev = fr
		}
		if !chunksOK(steps) {
			t.Errorf("%s: last episode of %d steps", key, steps)
		}
		lastOfUnit[prev.Unit] = prev.T
		frames[prev.Embodiment] += len(lines)
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	return frames, size
}

func TestBench(t *testing.T) {
	dir := t.TempDir()
	n, size, err := Bench(dir, BenchOptions{Frames: 20000, Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	frames, onDisk := checkBench(t, dir, false)
	if n != 20000 || frames["picker6"] != 10000 || frames["cart2"] != 10000 {
		t.Errorf("frames %d (%v), want 20000 split 10000/10000", n, frames)
	}
	if size != onDisk {
		t.Errorf("reported %d bytes, %d on disk", size, onDisk)
	}
	perFrame := float64(size) / float64(n)
	t.Logf("%.1f bytes per frame", perFrame)
	if math.Abs(perFrame-215) > 21.5 {
		t.Errorf("%.1f bytes per frame, want 215 ± 10%%", perFrame)
	}
	// Same options, same bytes; another seed, other bytes.
	again := t.TempDir()
	if _, _, err := Bench(again, BenchOptions{Frames: 20000, Seed: 1}); err != nil {
		t.Fatal(err)
	}
	h1, h2 := treeHashes(t, dir, false), treeHashes(t, again, false)
	if !equalAny(h1, h2) {
		t.Error("two Bench runs with the same options differ")
	}
	other := t.TempDir()
	if _, _, err := Bench(other, BenchOptions{Frames: 20000, Seed: 2}); err != nil {
		t.Fatal(err)
	}
	if equalAny(h1, treeHashes(t, other, false)) {
		t.Error("seeds 1 and 2 wrote the same fleet")
	}
}

func TestBenchCompressed(t *testing.T) {
	dir := t.TempDir()
	n, size, err := Bench(dir, BenchOptions{Frames: 9001, Seed: 3, Compress: true})
	if err != nil {
		t.Fatal(err)
	}
	frames, onDisk := checkBench(t, dir, true)
	if n != 9001 || frames["picker6"] != 4500 || frames["cart2"] != 4501 || size != onDisk {
		t.Errorf("frames %d (%v), bytes %d (on disk %d); want 9001 split 4500/4501", n, frames, size, onDisk)
	}
}

func TestBenchNegative(t *testing.T) {
	if _, _, err := Bench(t.TempDir(), BenchOptions{Frames: -1}); err == nil {
		t.Error("negative frame count accepted")
	}
}

func TestSessionAndEpisodeSizes(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 2))
	for budget := 0; budget <= 100000; budget += 997 {
		sum := 0
		for _, n := range sessionSizes(rng, budget) {
			if budget >= benchMinSession && (n < benchMinSession || n > benchMaxSession) {
				t.Fatalf("budget %d: session of %d", budget, n)
			}
			sum += n
		}
		if sum != budget {
			t.Fatalf("budget %d: sessions sum to %d", budget, sum)
		}
	}
	for total := benchMinEpisode; total <= 21000; total += 7 {
		sum := 0
		for _, n := range episodeLengths(rng, total) {
			if n < benchMinEpisode || n > benchMaxEpisode || !chunksOK(n) {
				t.Fatalf("total %d: episode of %d", total, n)
			}
			sum += n
		}
		if sum != total {
			t.Fatalf("total %d: episodes sum to %d", total, sum)
		}
	}
	for n, want := range map[int]bool{9: false, 10: true, 500: true, 501: false, 509: false, 510: true, 1000: true} {
		if chunksOK(n) != want {
			t.Errorf("chunksOK(%d) = %v, want %v", n, !want, want)
		}
	}
}

// ---------------------------------------------------------------------------
// Number formatting

func TestAppendFixed6(t *testing.T) {
	for _, c := range []struct {
		v    float64
		want string
	}{
		{0, "0.000000"},
		{math.Copysign(0, -1), "0.000000"},
		{-0.0000001, "0.000000"},
		{1, "1.000000"},
		{-1.5, "-1.500000"},
		{0.0000005, "0.000001"}, // math.Round rounds half away from zero
		{-9.9999996, "-10.000000"},
		{12.5, "12.500000"},
		{3.14159265, "3.141593"},
		{123456.789, "123456.789000"},
		{2e9, "2000000000.000000"},
		{math.NaN(), "NaN"},
		{math.Inf(1), "Infinity"},
		{math.Inf(-1), "-Infinity"},
	} {
		if got := string(appendFixed6(nil, c.v)); got != c.want {
			t.Errorf("appendFixed6(%v) = %q, want %q", c.v, got, c.want)
		}
	}
	// Against strconv on the value rounded to six decimals, which 'f' with
	// precision 6 then prints exactly.
	rng := rand.New(rand.NewPCG(3, 4))
	for range 100000 {
		v := 20 * (rng.Float64() - 0.5)
		want := strconv.FormatFloat(math.Round(v*1e6)/1e6, 'f', 6, 64)
		if want == "-0.000000" {
			want = "0.000000"
		}
		if got := string(appendFixed6(nil, v)); got != want {
			t.Fatalf("appendFixed6(%v) = %q, want %q", v, got, want)
		}
	}
}

func TestAppendFrame(t *testing.T) {
	f := frame{unit: "lark-c2-011", emb: "cart2", t: 1796018400000000000, obs: []float64{1, -2.25, 0, 0.5, 3},
		act: []float64{0.1, -0.1}, ev: "end", task: "dock", success: 1, extra: `"x":1`}
	want := `{"unit":"lark-c2-011","embodiment":"cart2","t":1796018400000000000,"obs":[1.000000,-2.250000,0.000000,0.500000,3.000000],"act":[0.100000,-0.100000],"ev":"end","task":"dock","success":true,"x":1}`
	if got := string(appendFrame(nil, &f)); got != want {
		t.Errorf("appendFrame:\n got %s\nwant %s", got, want)
	}
	f = frame{unit: "u", emb: "e", t: -1, obs: []float64{}, success: -1, img: `a"b\c` + "\n"}
	want = `{"unit":"u","embodiment":"e","t":-1,"obs":[],"success":false,"img":{"wrist":"a\"b\\c\u000a"}}`
	if got := string(appendFrame(nil, &f)); got != want {
		t.Errorf("appendFrame:\n got %s\nwant %s", got, want)
	}
	// The fleet's epoch constant, printed as RFC 3339.
	if got := time.Unix(0, day0).UTC().Format(time.RFC3339); got != "2026-11-30T00:00:00Z" {
		t.Errorf("day0 = %s", got)
	}
}

// ---------------------------------------------------------------------------
// Benchmarks

// BenchmarkBench writes the 100k-frame fleet; MB/s is output bytes per second.
func BenchmarkBench(b *testing.B) {
	dir := b.TempDir()
	var size int64
	for b.Loop() {
		_, n, err := Bench(dir, BenchOptions{Frames: 100000, Seed: 1})
		if err != nil {
			b.Fatal(err)
		}
		size = n
	}
	b.SetBytes(size)
}

func BenchmarkDemo(b *testing.B) {
	dir := b.TempDir()
	for b.Loop() {
		if err := Demo(dir); err != nil {
			b.Fatal(err)
		}
	}
}
