package fleet

import (
	"bytes"
	"compress/gzip"
	"encoding/base64"
	"fmt"
	"image"
	"image/color"
	"image/jpeg"
	"image/png"
	"math"
	"math/rand/v2"
	"net/url"
	"os"
	"path/filepath"
	"strconv"
	"time"

	"github.com/klauspost/compress/zstd"
)

// demoConfig is the pipeline config Demo writes as dir/hindcast.yaml (SPEC §2).
// max_line_bytes is lowered to 64 KiB so one line of the demo can be oversize
// without writing a megabyte; max_steps 200 makes the longer demo episodes
// show the chunking.
const demoConfig = `# Larkspur Depot (an invented warehouse fleet): aisle-picking arms and floor carts.
# Written by hindcast demo; paths are relative to this file.
dataset: larkspur-aisles
source:
  uri: logs
  include: ["**/*.jsonl", "**/*.jsonl.gz", "**/*.jsonl.zst"]
  exclude: []
  max_line_bytes: 65536
work: work
output: datasets
partitions: 4
seed: 7
embodiments:
  picker6:
    obs: 10                 # joints 0-5, gripper opening 6, gripper x y z 7-9
    act: 7                  # joint velocity commands 0-5, gripper command 6
    obs_low: -10
    obs_high: 10
    act_low: -1
    act_high: 1
    cameras: [wrist]
    goal_dims: [7, 8, 9]
    goal_tolerance: 0.03
  cart2:
    obs: 5                  # x, y, heading, speed, yaw rate
    act: 2                  # throttle, steer
    obs_low: [-10, -10, -3.2, -2, -2]
    obs_high: [10, 10, 3.2, 2, 2]
    act_low: -1
    act_high: 1
    cameras: []
    goal_dims: [0, 1]
    goal_tolerance: 0.25
episodes:
  max_gap: 500ms
  min_steps: 10
  max_steps: 200
goals:
  future: 2
  geometric: 1
  final: 1
  negative: 1
  gamma: 0.99
  horizon: 0
splits: {train: 0.8, val: 0.1, test: 0.1}
split_by: episode
float: float32
parquet:
  compression: zstd
  row_group_rows: 65536
`

// Demo writes the demo fleet under dir: log objects under dir/logs/ (plain
// .jsonl, .jsonl.gz and .jsonl.zst, most in sub-folders), camera frames as PNG
// and JPEG objects under dir/logs/frames/, and dir/hindcast.yaml, a config that
// reads dir/logs and writes under dir (work dir/work, output dir/datasets).
//
// About twenty units log a few hundred to a few thousand frames each, and
// every fault of SPEC §3.1 and §3.2 appears a few times among them (see the
// unit methods below for which unit carries which). The same call writes the
// same bytes; the only bytes that depend on dir are the absolute file:// image
// URIs of unit lark-p6-004, kept in one plain .jsonl object. Existing files of
// the same names are overwritten; nothing else under dir is touched.
func Demo(dir string) error { return DemoWith(dir, DemoOptions{}) }

// DemoWith is Demo with options; with opt.Recordings it also writes the
// recordings of demoRecordings under dir/logs/recordings/ and a config that
// reads them.
func DemoWith(dir string, opt DemoOptions) error {
	abs, err := filepath.Abs(dir)
	if err != nil {
		return fmt.Errorf("fleet: resolving demo folder %s: %w", dir, err)
	}
	enc, err := zstd.NewWriter(nil, zstd.WithEncoderConcurrency(1))
	if err != nil {
		return fmt.Errorf("fleet: creating zstd encoder: %w", err)
	}
	defer enc.Close()
	d := &demo{logs: filepath.Join(abs, "logs"), zenc: enc}
	d.png = png.Encoder{CompressionLevel: png.BestSpeed, BufferPool: &d.pngBufs}
	for _, step := range []func() error{
		d.p6Malformed, d.p6Images, d.p6Dims, d.p6NonFinite, d.p6DataURIs,
		d.p6TimeRegress, d.p6Oversize, d.p6CutStream, d.p6CutLine, d.p6Sessions,
		d.p7Prototype,
		d.c2Blank, d.c2EndShort, d.c2Battery, d.c2Overlap, d.c2Recal,
		d.c2GapShort, d.c2Plain,
	} {
		if err := step(); err != nil {
			return err
		}
	}
	config := demoConfig
	if opt.Recordings {
		if err := writeDemoRecordings(d.logs); err != nil {
			return err
		}
		config = demoRecordingConfig()
	}
	if err := os.WriteFile(filepath.Join(abs, "hindcast.yaml"), []byte(config), 0o644); err != nil {
		return fmt.Errorf("fleet: writing demo config: %w", err)
	}
	return nil
}

// demo holds what the demo's writers share.
type demo struct {
	logs    string // absolute path of dir/logs
	zenc    *zstd.Encoder
	png     png.Encoder
	pngBufs pngBuffers
	line    []byte
}

// pngBuffers lets the PNG encoder reuse its compressor across the demo's
// thousands of tiny frames instead of allocating one per image.
type pngBuffers struct{ b *png.EncoderBuffer }

func (p *pngBuffers) Get() *png.EncoderBuffer  { b := p.b; p.b = nil; return b }
func (p *pngBuffers) Put(b *png.EncoderBuffer) { p.b = b }

// imageMode is how a picker6 unit's log refers to its wrist camera frames,
// one of the three ways of SPEC §1.
type imageMode int

const (
	pngKey  imageMode = iota // object key relative to the source root
	jpegKey                  // likewise, JPEG frames
	pngFile                  // absolute file:// URI
	pngData                  // RFC 2397 data: URI
)

// unitPlan says what genUnit generates.
type unitPlan struct {
	id, emb string
	seed    uint64 // distinct per plan
	start   int64  // nominal t of the first frame
	frames  int
	short   map[int]shortEpisode // episode index → forced short episode
}

// shortEpisode forces an episode shorter than min_steps: the previous episode
// ends with ev: end (afterEnd) or with a gap, and a gap follows it.
type shortEpisode struct {
	steps    int
	afterEnd bool
}

// start returns the nominal start of a session on day (0 = 2026-11-30) for
// the n-th unit of the fleet, staggered so units do not start in lockstep.
func start(day, n int) int64 {
	return day0 + int64(day)*int64(24*time.Hour) + int64(6*time.Hour) + int64(n)*int64(53*time.Second)
}

// episodePlan is one planned episode of a demo unit.
type episodePlan struct {
	steps     int
	evStart   bool
	evEnd     bool
	task      string
	success   int8
	gapBefore int64 // time from the previous episode's last frame; 0 for the first
}

// genUnit generates a unit's frames: episodes of 50–400 steps, some opened and
// closed by ev events and some labelled with a task, separated either by an
// idle gap of 1–6 s or, after an ev: end, by nothing at all.
func genUnit(p unitPlan) []frame {
	rng := rand.New(rand.NewPCG(7, p.seed))
	period, tasks := p6Period, [2]string{"pick-tote", "restock-bin"}
	if p.emb == cart2 {
		period, tasks = c2Period, [2]string{"dock", "deliver-tote"}
	}
	var eps []episodePlan
	for total := 0; total < p.frames; {
		e := episodePlan{steps: 50 + rng.IntN(351)}
		if rng.IntN(2) == 0 {
			e.evStart, e.evEnd = true, true
			e.success = 1
			if rng.IntN(6) == 0 {
				e.success = -1
			}
		}
		if rng.IntN(5) < 3 {
			e.task = tasks[rng.IntN(2)]
		}
		if k := len(eps); k > 0 {
			e.gapBefore = int64(1+rng.IntN(5))*int64(time.Second) + rng.Int64N(int64(time.Second))
			if eps[k-1].evEnd && rng.IntN(2) == 0 {
				e.gapBefore = period // back to back: the ev: end alone splits them
			}
		}
		if s, ok := p.short[len(eps)]; ok {
			e = episodePlan{steps: s.steps, gapBefore: int64(2500 * time.Millisecond)}
			prev := &eps[len(eps)-1]
			if s.afterEnd {
				if !prev.evEnd {
					prev.evEnd, prev.success = true, 1
				}
				e.gapBefore = period
			}
		}
		if k := len(eps); k > 0 && eps[k-1].steps < 10 {
			e.gapBefore = int64(1800 * time.Millisecond) // a gap closes every forced short episode
		}
		e.steps = min(e.steps, p.frames-total)
		total += e.steps
		eps = append(eps, e)
	}

	frames := make([]frame, 0, p.frames)
	t := p.start
	from := [3]float64{0.5, 0, 0.8}
	angle := 2 * math.Pi * rng.Float64()
	for k, e := range eps {
		if k > 0 {
			t += e.gapBefore - period
		}
		var a arm
		var c cart
		if p.emb == cart2 {
			c = newCart(rng, e.steps, angle)
			angle = math.Remainder(angle+c.delta, 2*math.Pi)
		} else {
			a = newArm(rng, e.steps, from)
			from = a.to
		}
		for i := range e.steps {
			f := frame{unit: p.id, emb: p.emb, t: t + jitter(rng), task: e.task}
			if p.emb == cart2 {
				f.obs, f.act = make([]float64, c2Obs), make([]float64, c2Act)
				c.fill(rng, i, f.obs, f.act)
			} else {
				f.obs, f.act = make([]float64, p6Obs), make([]float64, p6Act)
				a.fill(rng, i, f.obs, f.act)
			}
			if i == 0 && e.evStart {
				f.ev = "start"
			}
			if i == e.steps-1 && e.evEnd {
				f.ev, f.success = "end", e.success
			}
			frames = append(frames, f)
			t += period
		}
	}
	return frames
}

// calm returns the first index i >= from such that frames i-1 … i+n are
// consecutive frames of one episode with no ev event: a fault placed there
// changes nothing but the faulty lines themselves.
func calm(fs []frame, from, n int) int {
	for i := max(from, 1); i+n < len(fs); i++ {
		ok := true
		for j := i - 1; j <= i+n && ok; j++ {
			ok = fs[j].ev == "" && (j == i-1 || fs[j].t-fs[j-1].t < 150e6)
		}
		if ok {
			return i
		}
	}
	panic("fleet: no calm stretch in a demo unit") // the unit plans below always have one
}

// attach gives every frame a wrist camera image, written per mode. The
// camera runs at 2.5 Hz, a quarter of the arm's rate, and each log frame
// refers to the camera's latest image, so four frames share one image (a new
// one after every gap).
func (d *demo) attach(fs []frame, mode imageMode) error {
	shot, img := 0, ""
	for i := range fs {
		f := &fs[i]
		if i == 0 || i%4 == 0 || f.t-fs[i-1].t > 150e6 {
			shot++
			var err error
			if img, _, err = d.shoot(f, mode, fmt.Sprintf("%06d", shot)); err != nil {
				return err
			}
		}
		f.img = img
	}
	return nil
}

// own gives frame f an image of its own (named by its t) and returns the
// image file's path, so a fault can damage it without touching other frames.
func (d *demo) own(f *frame, mode imageMode) (string, error) {
	img, path, err := d.shoot(f, mode, strconv.FormatInt(f.t, 10))
	f.img = img
	return path, err
}

// shoot encodes f's camera image, writes it as frames/<unit>/wrist-<name>
// unless mode inlines it, and returns the img value to log and the file path
// ("" for data: URIs).
func (d *demo) shoot(f *frame, mode imageMode, name string) (img, path string, err error) {
	b, err := d.image(f, mode == jpegKey)
	if err != nil {
		return "", "", fmt.Errorf("fleet: encoding frame image of %s at %d: %w", f.unit, f.t, err)
	}
	if mode == pngData {
		return "data:image/png;base64," + base64.StdEncoding.EncodeToString(b), "", nil
	}
	ext := ".png"
	if mode == jpegKey {
		ext = ".jpg"
	}
	key := "frames/" + f.unit + "/wrist-" + name + ext
	path = filepath.Join(d.logs, filepath.FromSlash(key))
	if err := writeFile(path, b); err != nil {
		return "", "", err
	}
	if mode == pngFile {
		return (&url.URL{Scheme: "file", Path: filepath.ToSlash(path)}).String(), path, nil
	}
	return key, path, nil
}

// image draws a 16×16 wrist view: a floor-coloured gradient shifted by the
// gripper position, and the two gripper jaws as dark bars whose spacing
// follows the gripper opening.
func (d *demo) image(f *frame, asJPEG bool) ([]byte, error) {
	img := image.NewRGBA(image.Rect(0, 0, 16, 16))
	x, y, z, open := f.obs[7], f.obs[8], f.obs[9], f.obs[6]
	jaw := 1 + int(math.Round(clamp(open, 1)*5))
	for py := range 16 {
		for px := range 16 {
			c := color.RGBA{
				R: byteOf(90 + 60*x + 4*float64(px)),
				G: byteOf(110 + 50*y + 3*float64(py)),
				B: byteOf(70 + 40*z + 2*float64(px+py)),
				A: 255,
			}
			if (px == 7-jaw || px == 8+jaw) && py >= 4 {
				c = color.RGBA{R: 30, G: 30, B: 35, A: 255}
			}
			img.SetRGBA(px, py, c)
		}
	}
	var buf bytes.Buffer
	var err error
	if asJPEG {
		err = jpeg.Encode(&buf, img, &jpeg.Options{Quality: 85})
	} else {
		err = d.png.Encode(&buf, img)
	}
	return buf.Bytes(), err
}

func byteOf(v float64) uint8 {
	return uint8(math.Max(0, math.Min(255, math.Round(v))))
}

// encode turns frames into lines (without line ends).
func (d *demo) encode(fs []frame) [][]byte {
	lines := make([][]byte, len(fs))
	for i := range fs {
		d.line = appendFrame(d.line[:0], &fs[i])
		lines[i] = bytes.Clone(d.line)
	}
	return lines
}

// object is one demo log object and how it is damaged on the way to storage.
type object struct {
	key     string // relative to dir/logs
	lines   [][]byte
	crlf    bool    // end lines with \r\n
	bom     bool    // start with a UTF-8 byte-order mark
	cutLast int     // > 0: the last line keeps only this many bytes and has no line end
	comp    string  // "", "gz" or "zst"
	keep    float64 // > 0: keep only this fraction of the compressed stream
}

// write writes the object and returns the bytes stored.
func (d *demo) write(o object) ([]byte, error) {
	var buf bytes.Buffer
	if o.bom {
		buf.WriteString("\uFEFF")
	}
	end := "\n"
	if o.crlf {
		end = "\r\n"
	}
	for i, l := range o.lines {
		if i == len(o.lines)-1 && o.cutLast > 0 {
			buf.Write(l[:o.cutLast])
			break
		}
		buf.Write(l)
		buf.WriteString(end)
	}
	data := buf.Bytes()
	switch o.comp {
	case "gz":
		var z bytes.Buffer
		zw := gzip.NewWriter(&z) // zero header: no name, no time, so the bytes are stable
		if _, err := zw.Write(data); err != nil {
			return nil, fmt.Errorf("fleet: compressing %s: %w", o.key, err)
		}
		if err := zw.Close(); err != nil {
			return nil, fmt.Errorf("fleet: compressing %s: %w", o.key, err)
		}
		data = z.Bytes()
	case "zst":
		data = d.zenc.EncodeAll(data, nil)
	}
	if o.keep > 0 {
		data = data[:int(float64(len(data))*o.keep)]
	}
	return data, writeFile(filepath.Join(d.logs, filepath.FromSlash(o.key)), data)
}

func writeFile(path string, b []byte) error {
	if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
		return fmt.Errorf("fleet: creating folder for %s: %w", path, err)
	}
	if err := os.WriteFile(path, b, 0o644); err != nil {
		return fmt.Errorf("fleet: writing %s: %w", path, err)
	}
	return nil
}

// sessionKey is the usual object key of a unit's session.
func sessionKey(day int, unit string, n int, ext string) string {
	date := time.Unix(0, day0+int64(day)*int64(24*time.Hour)).UTC().Format("2006-01-02")
	return fmt.Sprintf("day=%s/unit=%s/session-%04d%s", date, unit, n, ext)
}

// replaceValue replaces the value of the first member called name in a line
// written by appendFrame (a scalar: it ends at the next ',' or '}').
func replaceValue(line []byte, name, value string) []byte {
	k := bytes.Index(line, []byte(`"`+name+`":`))
	if k < 0 {
		panic("fleet: demo line without " + name) // appendFrame always writes it
	}
	v := k + len(name) + 3
	e := v + bytes.IndexAny(line[v:], ",}")
	return append(append(append([]byte(nil), line[:v]...), value...), line[e:]...)
}

// removeMember removes the member called name (not the first one) from a line
// written by appendFrame.
func removeMember(line []byte, name string) []byte {
	k := bytes.Index(line, []byte(`,"`+name+`":`))
	if k < 0 {
		panic("fleet: demo line without " + name)
	}
	e := k + 1 + bytes.IndexAny(line[k+1:], ",}")
	return append(append([]byte(nil), line[:k]...), line[e:]...)
}

// insert returns lines with extra inserted before index i.
func insert(lines [][]byte, i int, extra ...[]byte) [][]byte {
	out := make([][]byte, 0, len(lines)+len(extra))
	out = append(out, lines[:i]...)
	out = append(out, extra...)
	return append(out, lines[i:]...)
}

// The picker6 units. A unit's number in start() is also its generator seed
// (plus 100 for a later session), so units never share a random stream.

// p6Malformed: lark-p6-001, a plain object with malformed lines of every
// kind (a stray controller message, bad JSON, no t, t with a fraction or an
// exponent, a unit with a space, invalid UTF-8), blank lines, and an unknown
// firmware field on every line.
func (d *demo) p6Malformed() error {
	fs := genUnit(unitPlan{id: "lark-p6-001", emb: picker6, seed: 1, start: start(0, 1), frames: 620})
	for i := range fs {
		fs[i].extra = `"fw":"p6-4.2.1"`
	}
	if err := d.attach(fs, pngKey); err != nil {
		return err
	}
	lines := d.encode(fs)
	at := func(from int) int { return calm(fs, from, 1) }
	i := at(60)
	lines[i] = bytes.Replace(lines[i], []byte(`,"embodiment"`), []byte(` "embodiment"`), 1) // missing comma
	i = at(130)
	lines[i] = removeMember(lines[i], "t")
	i = at(190)
	lines[i] = replaceValue(lines[i], "t", strconv.FormatFloat(float64(fs[i].t)/1e9, 'f', 6, 64)) // float seconds
	i = at(250)
	lines[i] = replaceValue(lines[i], "t", strconv.FormatFloat(float64(fs[i].t), 'e', 10, 64)) // through a float64
	i = at(330)
	lines[i] = replaceValue(lines[i], "unit", `"lark-p6 001"`)
	i = at(410)
	lines[i] = append(lines[i][:len(lines[i])-1], `,"note":"aisle 4 blocked, caf`+"\xe9"+`"}`...) // Latin-1, not UTF-8
	// Inserted from the end so earlier indices stay valid.
	lines = insert(lines, at(520), []byte(""))
	lines = insert(lines, at(300), []byte("   \t"))
	lines = insert(lines, at(95), []byte("2026-11-30T06:01:07.112Z WARN arm-ctl: joint 4 torque limit, retrying"))
	lines = insert(lines, at(20), []byte(""))
	_, err := d.write(object{key: sessionKey(0, "lark-p6-001", 1, ".jsonl"), lines: lines})
	return err
}

// p6Images: lark-p6-002, gzip, with image faults: a frame without the wrist
// camera, one with only an undeclared camera, one whose image object does not
// exist, a truncated PNG and an error page saved as .png.
func (d *demo) p6Images() error {
	fs := genUnit(unitPlan{id: "lark-p6-002", emb: picker6, seed: 2, start: start(0, 2), frames: 540})
	if err := d.attach(fs, pngKey); err != nil {
		return err
	}
	i := calm(fs, 70, 1)
	fs[i].img = ""
	i = calm(fs, 150, 1)
	fs[i].extra = `"img":{"overhead":"frames/lark-p6-002/overhead-` + strconv.FormatInt(fs[i].t, 10) + `.png"}`
	fs[i].img = ""
	damage := []func([]byte) []byte{
		nil, // the image object does not exist
		func(b []byte) []byte { return b[:len(b)/2] },
		func([]byte) []byte {
			return []byte("<html><head><title>503 Service Unavailable</title></head><body>upload gateway busy</body></html>\n")
		},
	}
	for k, from := range []int{230, 310, 400} {
		i := calm(fs, from, 1)
		path, err := d.own(&fs[i], pngKey)
		if err != nil {
			return err
		}
		if err := d.damage(path, damage[k]); err != nil {
			return err
		}
	}
	_, err := d.write(object{key: sessionKey(0, "lark-p6-002", 1, ".jsonl.gz"), lines: d.encode(fs), comp: "gz"})
	return err
}

// damage rewrites the image file at path as damage makes it; a nil damage
// removes the file.
func (d *demo) damage(path string, damage func([]byte) []byte) error {
	if damage == nil {
		if err := os.Remove(path); err != nil {
			return fmt.Errorf("fleet: removing demo image: %w", err)
		}
		return nil
	}
	b, err := os.ReadFile(path)
	if err != nil {
		return fmt.Errorf("fleet: reading demo image: %w", err)
	}
	return writeFile(path, damage(b))
}

// p6Dims: lark-p6-003, zstd, JPEG frames: two JPEGs without their end marker,
// an obs one short and an act one short.
func (d *demo) p6Dims() error {
	fs := genUnit(unitPlan{id: "lark-p6-003", emb: picker6, seed: 3, start: start(0, 3), frames: 700})
	if err := d.attach(fs, jpegKey); err != nil {
		return err
	}
	for _, from := range []int{120, 480} {
		path, err := d.own(&fs[calm(fs, from, 1)], jpegKey)
		if err != nil {
			return err
		}
		if err := d.damage(path, func(b []byte) []byte { return b[:len(b)-2] }); err != nil { // drop the EOI marker FF D9
			return err
		}
	}
	i := calm(fs, 260, 1)
	fs[i].obs = fs[i].obs[:9]
	i = calm(fs, 590, 1)
	fs[i].act = fs[i].act[:6]
	_, err := d.write(object{key: sessionKey(0, "lark-p6-003", 1, ".jsonl.zst"), lines: d.encode(fs), comp: "zst"})
	return err
}

// p6NonFinite: lark-p6-004, plain, images by absolute file:// URI, with NaN,
// Infinity and -Infinity written as bare tokens.
func (d *demo) p6NonFinite() error {
	fs := genUnit(unitPlan{id: "lark-p6-004", emb: picker6, seed: 4, start: start(0, 4), frames: 480})
	if err := d.attach(fs, pngFile); err != nil {
		return err
	}
	fs[calm(fs, 90, 1)].obs[3] = math.NaN()
	fs[calm(fs, 210, 1)].obs[8] = math.Inf(1)
	fs[calm(fs, 380, 1)].act[2] = math.Inf(-1)
	_, err := d.write(object{key: sessionKey(0, "lark-p6-004", 1, ".jsonl"), lines: d.encode(fs)})
	return err
}

// p6DataURIs: lark-p6-005, zstd, images inline as data: URIs; two of them
// corrupt (a PNG chunk with a bad CRC, a PNG cut short), and two values out
// of bounds.
func (d *demo) p6DataURIs() error {
	fs := genUnit(unitPlan{id: "lark-p6-005", emb: picker6, seed: 5, start: start(0, 5), frames: 400})
	if err := d.attach(fs, pngData); err != nil {
		return err
	}
	corrupt := func(i int, damage func([]byte) []byte) error {
		b, err := d.image(&fs[i], false)
		if err != nil {
			return fmt.Errorf("fleet: encoding frame image of %s at %d: %w", fs[i].unit, fs[i].t, err)
		}
		fs[i].img = "data:image/png;base64," + base64.StdEncoding.EncodeToString(damage(b))
		return nil
	}
	// PNG layout (W3C PNG spec §5.2–5.3, from memory): 8-byte signature, then chunks of
	// length, type, data, CRC; IHDR comes first (8+25 bytes), then IDAT, whose
	// data starts 8 bytes into it. Flipping a data byte breaks the CRC.
	if err := corrupt(calm(fs, 100, 1), func(b []byte) []byte { b[33+8+4] ^= 0x5a; return b }); err != nil {
		return err
	}
	if err := corrupt(calm(fs, 250, 1), func(b []byte) []byte { return b[:len(b)*3/5] }); err != nil {
		return err
	}
	fs[calm(fs, 170, 1)].obs[0] = 12.5
	fs[calm(fs, 330, 1)].act[1] = -1.4
	_, err := d.write(object{key: sessionKey(0, "lark-p6-005", 1, ".jsonl.zst"), lines: d.encode(fs), comp: "zst"})
	return err
}

// p6TimeRegress: lark-p6-006, plain with CRLF line ends; its clock steps back
// 350 ms for three frames, so those three go back in time.
func (d *demo) p6TimeRegress() error {
	fs := genUnit(unitPlan{id: "lark-p6-006", emb: picker6, seed: 6, start: start(0, 6), frames: 560})
	if err := d.attach(fs, pngKey); err != nil {
		return err
	}
	i := calm(fs, 280, 4)
	for j := i; j < i+3; j++ {
		fs[j].t -= int64(350 * time.Millisecond)
	}
	_, err := d.write(object{key: sessionKey(0, "lark-p6-006", 1, ".jsonl"), lines: d.encode(fs), crlf: true})
	return err
}

// p6Oversize: lark-p6-007, plain, starting with a UTF-8 byte-order mark; one
// line carries a 68 KB diagnostic dump, over the demo's 64 KiB line limit.
func (d *demo) p6Oversize() error {
	fs := genUnit(unitPlan{id: "lark-p6-007", emb: picker6, seed: 7, start: start(0, 7), frames: 500})
	if err := d.attach(fs, pngKey); err != nil {
		return err
	}
	rng := rand.New(rand.NewPCG(7, 1007))
	dump := make([]byte, 51000)
	for i := range dump {
		dump[i] = byte(rng.Uint32())
	}
	fs[calm(fs, 200, 1)].extra = `"diag":"` + base64.StdEncoding.EncodeToString(dump) + `"`
	_, err := d.write(object{key: sessionKey(0, "lark-p6-007", 1, ".jsonl"), lines: d.encode(fs), bom: true})
	return err
}

// p6CutStream: lark-p6-008, a gzip upload cut off 60% into its compressed
// stream: the object is incomplete and its last decoded line is partial.
func (d *demo) p6CutStream() error {
	fs := genUnit(unitPlan{id: "lark-p6-008", emb: picker6, seed: 8, start: start(0, 8), frames: 650})
	if err := d.attach(fs, pngKey); err != nil {
		return err
	}
	_, err := d.write(object{key: sessionKey(0, "lark-p6-008", 1, ".jsonl.gz"), lines: d.encode(fs), comp: "gz", keep: 0.6})
	return err
}

// p6CutLine: lark-p6-009, plain, JPEG frames; the logger died mid-line, so the
// last line stops inside its obs array with no line end.
func (d *demo) p6CutLine() error {
	fs := genUnit(unitPlan{id: "lark-p6-009", emb: picker6, seed: 9, start: start(0, 9), frames: 450})
	if err := d.attach(fs, jpegKey); err != nil {
		return err
	}
	lines := d.encode(fs)
	last := lines[len(lines)-1]
	cut := bytes.Index(last, []byte(`"obs":[`)) + 30
	_, err := d.write(object{key: sessionKey(0, "lark-p6-009", 1, ".jsonl"), lines: lines, cutLast: cut})
	return err
}

// p6Sessions: lark-p6-010, two clean zstd sessions on two days; the first was
// uploaded again, byte for byte, under reupload/ (a duplicate object).
func (d *demo) p6Sessions() error {
	for s, n := range []int{900, 700} {
		fs := genUnit(unitPlan{id: "lark-p6-010", emb: picker6, seed: 10 + uint64(s)*100, start: start(s, 10), frames: n})
		if err := d.attach(fs, pngKey); err != nil {
			return err
		}
		data, err := d.write(object{key: sessionKey(s, "lark-p6-010", s+1, ".jsonl.zst"), lines: d.encode(fs), comp: "zst"})
		if err != nil {
			return err
		}
		if s == 0 {
			if err := writeFile(filepath.Join(d.logs, "reupload", "unit=lark-p6-010", "session-0001.jsonl.zst"), data); err != nil {
				return err
			}
		}
	}
	return nil
}

// p7Prototype: lark-p7-001, a prototype arm whose embodiment picker7 the
// config does not declare.
func (d *demo) p7Prototype() error {
	fs := genUnit(unitPlan{id: "lark-p7-001", emb: picker6, seed: 11, start: start(0, 11), frames: 9})
	for i := range fs {
		fs[i].emb = "picker7"
	}
	_, err := d.write(object{key: sessionKey(0, "lark-p7-001", 1, ".jsonl"), lines: d.encode(fs)})
	return err
}

// The cart2 units.

// c2Blank: lark-c2-001, plain, with two blank lines.
func (d *demo) c2Blank() error {
	fs := genUnit(unitPlan{id: "lark-c2-001", emb: cart2, seed: 21, start: start(0, 21), frames: 2400})
	lines := d.encode(fs)
	lines = insert(lines, calm(fs, 1500, 1), []byte(" "))
	lines = insert(lines, calm(fs, 700, 1), []byte(""))
	_, err := d.write(object{key: sessionKey(0, "lark-c2-001", 1, ".jsonl"), lines: lines})
	return err
}

// c2EndShort: lark-c2-002, zstd: a 6-frame episode left between an ev: end
// and a gap; also an explicit "task": null and an ev value that is neither
// start nor end, both of which the pipeline ignores.
func (d *demo) c2EndShort() error {
	fs := genUnit(unitPlan{id: "lark-c2-002", emb: cart2, seed: 22, start: start(0, 22), frames: 1800,
		short: map[int]shortEpisode{3: {steps: 6, afterEnd: true}}})
	i := calm(fs, 600, 1)
	fs[i].ev = "pause"
	for j := range fs {
		if fs[j].task == "" && fs[j].ev == "" {
			fs[j].extra = `"task":null`
		}
	}
	_, err := d.write(object{key: sessionKey(0, "lark-c2-002", 1, ".jsonl.zst"), lines: d.encode(fs), comp: "zst"})
	return err
}

// c2Battery: lark-c2-003, gzip, with an unknown nested battery field.
func (d *demo) c2Battery() error {
	fs := genUnit(unitPlan{id: "lark-c2-003", emb: cart2, seed: 23, start: start(0, 23), frames: 2200})
	for i := range fs {
		soc := appendFixed6(nil, 0.92-0.00005*float64(i))
		fs[i].extra = `"bat":{"soc":` + string(soc) + `,"temp_c":31.5}`
	}
	_, err := d.write(object{key: sessionKey(0, "lark-c2-003", 1, ".jsonl.gz"), lines: d.encode(fs), comp: "gz"})
	return err
}

// c2Overlap: lark-c2-004, two plain objects from a log rotation that wrote
// the same 8 frames at the end of one and the start of the next (duplicates).
func (d *demo) c2Overlap() error {
	fs := genUnit(unitPlan{id: "lark-c2-004", emb: cart2, seed: 24, start: start(0, 24), frames: 2600})
	lines := d.encode(fs)
	cut := calm(fs, 1300, 8)
	if _, err := d.write(object{key: sessionKey(0, "lark-c2-004", 1, ".jsonl"), lines: lines[:cut+8]}); err != nil {
		return err
	}
	_, err := d.write(object{key: sessionKey(0, "lark-c2-004", 2, ".jsonl"), lines: lines[cut:]})
	return err
}

// c2Recal: lark-c2-005, zstd, plus 5 of its frames uploaded again after an
// odometry recalibration under recal/: same unit and t, other obs (conflicts).
func (d *demo) c2Recal() error {
	fs := genUnit(unitPlan{id: "lark-c2-005", emb: cart2, seed: 25, start: start(0, 25), frames: 2000})
	if _, err := d.write(object{key: sessionKey(0, "lark-c2-005", 1, ".jsonl.zst"), lines: d.encode(fs), comp: "zst"}); err != nil {
		return err
	}
	i := calm(fs, 900, 5)
	re := make([]frame, 5)
	for j := range re {
		re[j] = fs[i+j]
		re[j].obs = append([]float64(nil), fs[i+j].obs...)
		re[j].obs[0] += 0.04
		re[j].obs[1] -= 0.03
	}
	_, err := d.write(object{key: "recal/unit=lark-c2-005/session-0001.jsonl", lines: d.encode(re)})
	return err
}

// c2GapShort: lark-c2-006, plain: a 7-frame episode between two gaps.
func (d *demo) c2GapShort() error {
	fs := genUnit(unitPlan{id: "lark-c2-006", emb: cart2, seed: 26, start: start(0, 26), frames: 1500,
		short: map[int]shortEpisode{4: {steps: 7}}})
	_, err := d.write(object{key: sessionKey(0, "lark-c2-006", 1, ".jsonl"), lines: d.encode(fs)})
	return err
}

// c2Plain: lark-c2-007 … 010, clean sessions in every compression; 008 sits
// at the root of the source rather than in a sub-folder.
func (d *demo) c2Plain() error {
	for _, u := range []struct {
		n, frames int
		key, comp string
	}{
		{7, 3000, sessionKey(0, "lark-c2-007", 1, ".jsonl.zst"), "zst"},
		{8, 1200, "lark-c2-008.jsonl", ""},
		{9, 2800, sessionKey(0, "lark-c2-009", 1, ".jsonl.gz"), "gz"},
		{10, 1600, sessionKey(0, "lark-c2-010", 1, ".jsonl.zst"), "zst"},
	} {
		id := fmt.Sprintf("lark-c2-%03d", u.n)
		fs := genUnit(unitPlan{id: id, emb: cart2, seed: 20 + uint64(u.n), start: start(0, 20+u.n), frames: u.frames})
		if _, err := d.write(object{key: u.key, lines: d.encode(fs), comp: u.comp}); err != nil {
			return err
		}
	}
	return nil
}
