package stages

import (
	"bytes"
	"compress/gzip"
	"context"
	"crypto/sha256"
	"encoding/base64"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"image/jpeg"
	"image/png"
	"io"
	"io/fs"
	"maps"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"unicode/utf8"

	"github.com/klauspost/compress/zstd"

	"hindcast/pipeline"
)

// Tests of SPEC §3.1 (ingest) and of the input format of SPEC §1. Every
// expected count is worked out by hand from the fixture (testdata/ingest,
// whose lines are listed with their expected reason below) or from the way a
// test builds its objects, never taken from a run. The configs use
// min_steps 2 and a max_gap of 1h, and every fixture keeps at least two
// frames per unit, so no short_episode drop mixes into the ingest counts:
// each test says how many episodes that gives.

// fixtureConfig is the config of the fixture tests. arm has per-dimension
// obs bounds (a list) and scalar act bounds; cam has two cameras, so a line
// can be both image_missing (one camera) and image_corrupt (the other).
// goals: one future goal per step, so pairs = Σ over episodes (steps − 1).
func fixtureConfig(maxLineBytes int) string {
	return fmt.Sprintf(`
dataset: ingest-fixtures
partitions: 1
source:
  max_line_bytes: %d
embodiments:
  arm:
    obs: 3
    act: 2
    obs_low: [-10, -1, 0]
    obs_high: [10, 1, 5]
    act_low: -1
    act_high: 1
    goal_tolerance: 0.1
  cam:
    obs: 3
    act: 2
    obs_low: -10
    obs_high: 10
    cameras: [front, wrist]
    goal_tolerance: 0.1
episodes: {max_gap: 1h, min_steps: 2, max_steps: 500}
goals: {future: 1, geometric: 0, final: 0, negative: 0}
splits: {train: 1}
`, maxLineBytes)
}

// fixture reads one file of testdata/ingest.
func ingestFixture(t *testing.T, name string) []byte {
	t.Helper()
	b, err := os.ReadFile(filepath.Join("..", "testdata", "ingest", filepath.FromSlash(name)))
	if err != nil {
		t.Fatalf("fixture: %v", err)
	}
	return b
}

// fixtureImages are the committed camera frames, under the source key
// frames/<name> the image fixtures refer to.
func fixtureImages(t *testing.T) map[string][]byte {
	t.Helper()
	out := map[string][]byte{}
	for _, n := range []string{"ok.png", "ok.jpg", "bad-crc.png", "cut.png", "noeoi.jpg", "notimage.png"} {
		out["frames/"+n] = ingestFixture(t, "frames/"+n)
	}
	return out
}

// armLine is a line of embodiment arm that every check accepts, plus extra
// members (each starting with a comma).
func armLine(unit string, t int64, extra string) string {
	return fmt.Sprintf(`{"unit":%q,"embodiment":"arm","t":%d,"obs":[0.5,0.5,0.5],"act":[0.1,-0.1]%s}`, unit, t, extra)
}

// padTo pads an object line with an unknown member to exactly n bytes.
func padTo(t *testing.T, line string, n int) string {
	t.Helper()
	base := strings.TrimSuffix(line, "}") + `,"pad":"`
	k := n - len(base) - len(`"}`)
	if k < 0 {
		t.Fatalf("padTo: line of %d bytes is already longer than %d", len(line), n)
	}
	out := base + strings.Repeat("x", k) + `"}`
	if len(out) != n {
		t.Fatalf("padTo: made %d bytes, want %d", len(out), n)
	}
	return out
}

// srcWant is what the manifest must say of one source object.
type srcWant struct {
	key         string
	lines, kept int64
	dropped     map[string]int64
}

// funnelOf adds up the per-source expectations: the funnel's lines and
// drops are the sums over the sources (SPEC §5).
func funnelOf(objects, dupObjects int64, srcs []srcWant, frames, episodes, pairs int64) pipeline.Funnel {
	f := pipeline.Funnel{Objects: objects, DuplicateObjects: dupObjects, Frames: frames, Episodes: episodes, Pairs: pairs, Dropped: map[string]int64{}}
	for _, s := range srcs {
		f.Lines += s.lines
		for r, n := range s.dropped {
			f.Dropped[r] += n
		}
	}
	return f
}

// TestIngestFixtureImages checks that the committed camera frames are what
// the fixtures say they are, with the standard library's decoders as the
// independent judge: ok.png and ok.jpg decode; bad-crc.png is ok.png with
// one byte of the IDAT CRC changed (PNG spec §5.3: the CRC covers type and
// data) and image/png rejects it; cut.png is a prefix of ok.png; noeoi.jpg
// is ok.jpg without its EOI marker FF D9 (ITU T.81 §B.2.1).
func TestIngestFixtureImages(t *testing.T) {
	imgs := fixtureImages(t)
	okPNG, okJPG := imgs["frames/ok.png"], imgs["frames/ok.jpg"]
	if _, err := png.Decode(bytes.NewReader(okPNG)); err != nil {
		t.Errorf("ok.png does not decode: %v", err)
	}
	if _, err := jpeg.Decode(bytes.NewReader(okJPG)); err != nil {
		t.Errorf("ok.jpg does not decode: %v", err)
	}
	bad := imgs["frames/bad-crc.png"]
	var diff []int
	for i := range min(len(bad), len(okPNG)) {
		if bad[i] != okPNG[i] {
			diff = append(diff, i)
		}
	}
	// IDAT starts at offset 33 (8 signature + 25 IHDR); its length is 22, so
	// its CRC is bytes 33+8+22 … +3 = 63 … 66.
	if len(bad) != len(okPNG) || !slices.Equal(diff, []int{66}) || string(okPNG[37:41]) != "IDAT" {
		t.Errorf("bad-crc.png differs from ok.png at %v, want only at 66 (the last IDAT CRC byte)", diff)
	}
	if _, err := png.Decode(bytes.NewReader(bad)); err == nil {
		t.Errorf("image/png accepts bad-crc.png")
	}
	if cut := imgs["frames/cut.png"]; len(cut) != 50 || !bytes.HasPrefix(okPNG, cut) {
		t.Errorf("cut.png is not the first 50 bytes of ok.png")
	}
	if n := imgs["frames/noeoi.jpg"]; !bytes.Equal(append(slices.Clone(n), 0xFF, 0xD9), okJPG) {
		t.Errorf("noeoi.jpg + FF D9 is not ok.jpg")
	}
	if !bytes.HasSuffix(okJPG, []byte{0xFF, 0xD9}) {
		t.Errorf("ok.jpg does not end with EOI")
	}
}

// TestIngestReasonFixtures runs one fixture per reason of SPEC §3.1 and
// checks the exact per-source lines, kept and drops. Each fixture also
// holds lines that fail two checks, to pin the order of the table: the
// earlier reason is the one counted. The expected reason of every line is
// listed beside the case (line numbers are physical lines).
func TestIngestReasonFixtures(t *testing.T) {
	longLines := []byte(armLine("u9", 1000, "") + "\n" + padTo(t, armLine("u9", 2000, ""), 300000) + "\n" +
		armLine("u9", 3000, "") + "\n" + padTo(t, armLine("u9", 4000, ""), 200))
	cases := []struct {
		name     string
		maxLine  int
		fixtures []string
		extra    map[string][]byte
		sources  []srcWant
		// frames, episodes and pairs of the whole run.
		frames, episodes, pairs int64
	}{
		{
			// max_line_bytes 100. oversize.jsonl: 1 kept (78 bytes),
			// 2 kept (exactly 100), 3 oversize (101), 4 kept (100 + CRLF:
			// the line end does not count), 5 oversize (150 bytes, also not
			// JSON: oversize comes first), 6 kept.
			// oversize-long.jsonl(.gz) (built here): 1 kept, 2 oversize
			// (300,000 bytes, longer than the read buffers, so it is read in
			// pieces), 3 kept, 4 oversize (the last line, 200 bytes, no line
			// end: oversize before truncated). Plain and gzip, as the
			// buffering differs.
			name: "oversize", maxLine: 100, fixtures: []string{"oversize.jsonl"},
			extra: map[string][]byte{"oversize-long.jsonl": longLines, "oversize-long.jsonl.gz": gzipBytes(t, longLines)},
			sources: []srcWant{
				{"oversize-long.jsonl", 4, 2, map[string]int64{pipeline.Oversize: 2}},
				// Same unit and times as the plain copy: its 2 frames are
				// duplicates in the episodes stage.
				{"oversize-long.jsonl.gz", 4, 0, map[string]int64{pipeline.Oversize: 2, pipeline.Duplicate: 2}},
				{"oversize.jsonl", 6, 4, map[string]int64{pipeline.Oversize: 2}},
			},
			frames: 6, episodes: 2, pairs: 3 + 1,
		},
		{
			// truncated.jsonl: 1, 2 kept; 3 a cut object but with a line end:
			// malformed; 4 kept; 5 the last line, no line end, does not
			// parse: truncated.
			// last-ok.jsonl: the last line has no line end but parses: kept.
			// last-oversize.jsonl: the last line is 150 bytes with no line
			// end: oversize, not truncated.
			// last-blank.jsonl: a last line of blanks without a line end is
			// not a line at all.
			name: "truncated", maxLine: 100, fixtures: []string{"truncated.jsonl"},
			extra: map[string][]byte{
				"last-ok.jsonl":       []byte(armLine("u3", 1000, "") + "\n" + armLine("u3", 2000, "")),
				"last-oversize.jsonl": []byte(armLine("u4", 1000, "") + "\n" + armLine("u4", 2000, "") + "\n{" + strings.Repeat("z", 149)),
				"last-blank.jsonl":    []byte(armLine("u5", 1000, "") + "\n" + armLine("u5", 2000, "") + "\n \t "),
			},
			sources: []srcWant{
				{"truncated.jsonl", 5, 3, map[string]int64{pipeline.Malformed: 1, pipeline.Truncated: 1}},
				{"last-ok.jsonl", 2, 2, nil},
				{"last-oversize.jsonl", 3, 2, map[string]int64{pipeline.Oversize: 1}},
				{"last-blank.jsonl", 2, 2, nil},
			},
			frames: 9, episodes: 4, pairs: 2 + 1 + 1 + 1,
		},
		{
			// 1 kept; 2 "hello"; 3 an array; 4 unit missing; 5 t missing;
			// 6 t a string; 7 t 4000.5; 8 t 4000.0; 9 t 4e3 (SPEC §1: no
			// fraction, no exponent, even when the value is whole); 10 t 2^63
			// (beyond int64); 11 t 05000 (a leading zero is not a JSON
			// number, RFC 8259 §6); 12 obs a string; 13 obs with a string
			// element; 14 unit "u 1"; 15 unit of 65 bytes; 16 unit "";
			// 17 unit "u!" with embodiment "nope" and obs [NaN] (malformed
			// comes before unknown_embodiment, dim_mismatch, non_finite);
			// 18 obs [nan,…] (only NaN, Infinity, -Infinity are logger
			// tokens, SPEC §1); 19 text after the object; 20 embodiment a
			// number; 21 unit null (null is absent only for optional
			// fields); 22 kept; 23 a byte 0xFF in a string (invalid UTF-8);
			// 24 kept.
			name: "malformed", maxLine: 100000, fixtures: []string{"malformed.jsonl"},
			sources: []srcWant{{"malformed.jsonl", 24, 3, map[string]int64{pipeline.Malformed: 21}}},
			frames:  3, episodes: 1, pairs: 2,
		},
		{
			// 1 kept; 2 "nope"; 3 "Arm" (names are case-sensitive); 4 "nope"
			// with NaN (not non_finite); 5 "nope" with one obs (not
			// dim_mismatch); 6 "nope" with an earlier t (not time_regress);
			// 7 kept.
			name: "unknown_embodiment", maxLine: 100000, fixtures: []string{"unknown_embodiment.jsonl"},
			sources: []srcWant{{"unknown_embodiment.jsonl", 7, 2, map[string]int64{pipeline.UnknownEmbodiment: 5}}},
			frames:  2, episodes: 1, pairs: 1,
		},
		{
			// arm: obs 3, act 2. 1 kept; 2 obs 2; 3 obs 4; 4 obs 0; 5 act 3;
			// 6 act 1; 7 act 0; 8 obs [100,100] (not out_of_range); 9 obs
			// [NaN,0.5] (not non_finite); 10 act [Infinity,0,0] (not
			// non_finite); 11 kept: no act (observation-only); 12 kept: act
			// null is absent, so its length is not checked.
			name: "dim_mismatch", maxLine: 100000, fixtures: []string{"dim_mismatch.jsonl"},
			sources: []srcWant{{"dim_mismatch.jsonl", 12, 3, map[string]int64{pipeline.DimMismatch: 9}}},
			frames:  3, episodes: 1, pairs: 2,
		},
		{
			// 1 kept; 2 obs NaN; 3 obs Infinity; 4 obs -Infinity; 5 act NaN;
			// 6 act Infinity; 7 NaN with out-of-range values and an earlier
			// t (not out_of_range, not time_regress); 8 cam with NaN and no
			// images (not image_missing); 9 kept.
			name: "non_finite", maxLine: 100000, fixtures: []string{"non_finite.jsonl"},
			sources: []srcWant{{"non_finite.jsonl", 9, 2, map[string]int64{pipeline.NonFinite: 7}}},
			frames:  2, episodes: 1, pairs: 1,
		},
		{
			// arm obs bounds [-10,10], [-1,1], [0,5]; act [-1,1].
			// 1 kept; 2 and 3 kept: values on the bounds are inside;
			// 4 dim 0 above 10; 5 dim 0 below -10; 6 dim 1 at 1.5 (inside
			// dim 0's bound: the list is per dimension); 7 dim 2 below 0;
			// 8 dim 2 above 5; 9 act above 1; 10 act below -1; 11 cam obs 20
			// with no images (not image_missing); 12 obs 11 with an earlier t
			// (not time_regress); 13 kept.
			name: "out_of_range", maxLine: 100000, fixtures: []string{"out_of_range.jsonl"},
			sources: []srcWant{{"out_of_range.jsonl", 13, 4, map[string]int64{pipeline.OutOfRange: 9}}},
			frames:  4, episodes: 1, pairs: 3,
		},
		{
			// cam: cameras front, wrist. 1 kept (keys relative to the source
			// root); 2 no img; 3 img null; 4 img {}; 5 wrist absent; 6 front
			// names a key that does not exist; 7 only undeclared cameras;
			// 8 front corrupt and wrist not found: image_missing comes first
			// (whatever the camera order); 9 kept: the undeclared camera
			// "back" names no object and is ignored; 10 kept: front is a
			// data: URI (RFC 2397) of ok.png; 11 wrist null is absent;
			// 12 "Frames/ok.png": keys are case-sensitive; 13 kept.
			name: "image_missing", maxLine: 100000, fixtures: []string{"image_missing.jsonl"},
			sources: []srcWant{{"image_missing.jsonl", 13, 4, map[string]int64{pipeline.ImageMissing: 9}}},
			frames:  4, episodes: 1, pairs: 3,
		},
		{
			// 1 kept; 2 bad IDAT CRC; 3 PNG cut at 50 bytes; 4 not an image
			// (bad signature); 5 wrist JPEG without EOI; 6 data: URI of the
			// cut PNG; 7 data: URI of "hello"; 8 kept (data: URI of ok.png);
			// 9 bad CRC with an earlier t (not time_regress); 10 kept: a JPEG
			// under a .png key and a PNG under a .jpg key (the bytes decide);
			// 11 kept.
			name: "image_corrupt", maxLine: 100000, fixtures: []string{"image_corrupt.jsonl"},
			sources: []srcWant{{"image_corrupt.jsonl", 11, 4, map[string]int64{pipeline.ImageCorrupt: 7}}},
			frames:  4, episodes: 1, pairs: 3,
		},
		{
			// u1: 1 t=1000 kept; 2 t=2000 kept; 3 t=2000 (equal is not
			// greater); 4 t=1500; 5 u2 t=1500 kept (per unit); 6 t=3000 kept;
			// 7 t=9000 with NaN: non_finite, and its t is not accepted;
			// 8 t=4000 kept (greater than 3000, the last accepted t); 9 u2
			// t=1000; 10 u2 t=2500 kept; 11 t=4000 out of range (not
			// time_regress); 12 t=5000 kept; 13 t=4500.
			// u1 keeps 5 frames, u2 keeps 2: two episodes.
			name: "time_regress", maxLine: 100000, fixtures: []string{"time_regress.jsonl"},
			sources: []srcWant{{"time_regress.jsonl", 13, 7, map[string]int64{
				pipeline.TimeRegress: 4, pipeline.NonFinite: 1, pipeline.OutOfRange: 1}}},
			frames: 7, episodes: 2, pairs: 4 + 1,
		},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			files := fixtureImages(t)
			for _, f := range c.fixtures {
				files[f] = ingestFixture(t, f)
			}
			maps.Copy(files, c.extra)
			m := runPipeline(t, fixtureConfig(c.maxLine), files)
			for _, s := range c.sources {
				wantSource(t, m, s.key, s.lines, s.kept, s.dropped)
				if src := sourceByKey(t, m, s.key); src.Incomplete || src.DuplicateOf != nil {
					t.Errorf("%s: incomplete %v, duplicate_of %v; want false, null", s.key, src.Incomplete, src.DuplicateOf)
				}
			}
			// The images under frames/ are not selected by the default
			// include globs (SPEC §2), so they are not objects.
			wantFunnel(t, m, funnelOf(int64(len(c.sources)), 0, c.sources, c.frames, c.episodes, c.pairs))
			if len(m.Sources) != len(c.sources) {
				t.Errorf("%d sources, want %d", len(m.Sources), len(c.sources))
			}
		})
	}
}

// TestIngestImageURIs covers the reference forms of SPEC §1 `img` not in
// the fixtures: absolute file:// URIs (here to a folder outside the source
// root, named in source.image_roots), a JPEG data: URI, a relative key
// mixed with an absolute URI, and a data: URI whose payload is not base64.
func TestIngestImageURIs(t *testing.T) {
	imgs := fixtureImages(t)
	outside := t.TempDir()
	writeTree(t, outside, map[string][]byte{
		"ok.png": imgs["frames/ok.png"], "ok.jpg": imgs["frames/ok.jpg"], "bad-crc.png": imgs["frames/bad-crc.png"]})
	abs := func(name string) string { return "file://" + filepath.ToSlash(outside) + "/" + name }
	jpgURI := "data:image/jpeg;base64," + base64.StdEncoding.EncodeToString(imgs["frames/ok.jpg"])
	// '@' is outside the base64 alphabet (RFC 4648 §4): no image bytes.
	badB64 := "data:image/png;base64,@@@@"
	line := func(t int64, front, wrist string) string {
		return fmt.Sprintf(`{"unit":"c2","embodiment":"cam","t":%d,"obs":[1,2,3],"img":{"front":%q,"wrist":%q}}`, t, front, wrist)
	}
	files := map[string][]byte{
		"frames/ok.png": imgs["frames/ok.png"],
		"abs.jsonl": jsonLines(
			line(1000, abs("ok.png"), abs("ok.jpg")),      // 1 kept
			line(2000, abs("nope.png"), abs("ok.jpg")),    // 2 image_missing: no such object
			line(3000, abs("bad-crc.png"), abs("ok.jpg")), // 3 image_corrupt
			line(4000, abs("ok.png"), jpgURI),             // 4 kept
			line(5000, "frames/ok.png", abs("ok.jpg")),    // 5 kept
			line(6000, badB64, abs("ok.jpg")),             // 6 image_corrupt: the data does not decode
			line(7000, badB64, "frames/nope.jpg"),         // 7 image_missing: wrist, before front's corruption
			// 8 kept: URI schemes are case-insensitive (RFC 3986 §3.1).
			line(8000, "FILE://"+strings.TrimPrefix(abs("ok.png"), "file://"), abs("ok.jpg")),
			// 9–12 image_missing: references that name no object hindcast
			// can read (a scheme with no store, an impossible bucket name)
			// are data faults, not run failures.
			line(9000, "http://cams.example/ok.png", abs("ok.jpg")),
			line(10000, "cam://front/ok.png", abs("ok.jpg")),
			line(11000, "s3://Not_A_Bucket/ok.png", abs("ok.jpg")),
			line(12000, "s3://ab/ok.png", abs("ok.jpg")),
		),
	}
	m := runPipeline(t, withImageRoots(t, fixtureConfig(100000), "file://"+filepath.ToSlash(outside)), files)
	srcs := []srcWant{{"abs.jsonl", 12, 4, map[string]int64{pipeline.ImageMissing: 6, pipeline.ImageCorrupt: 2}}}
	wantSource(t, m, "abs.jsonl", 12, 4, srcs[0].dropped)
	wantFunnel(t, m, funnelOf(1, 0, srcs, 4, 1, 3))
}

// TestIngestInputFormat covers the input rules of SPEC §1: compression by
// magic bytes whatever the name, CRLF, the byte-order mark, blank lines,
// exact int64 times, ignored fields and values, null as absent, and the
// include/exclude selection of SPEC §3.1. Each object has its own unit, so
// no object's frames meet another's in the episodes stage; every unit makes
// one episode.
func TestIngestInputFormat(t *testing.T) {
	const bigT = int64(1764489600123456789)
	// The point of the exact-t check: through float64 this t would change
	// (IEEE 754 binary64 has a 53-bit significand, so between 2^60 and 2^61,
	// where this t lies, doubles are 2^8 = 256 apart).
	if int64(float64(bigT)) == bigT {
		t.Fatalf("test premise: %d survives float64", bigT)
	}
	lines3 := func(unit string) []byte {
		return jsonLines(armLine(unit, 1000, ""), armLine(unit, 2000, ""), armLine(unit, 3000, ""))
	}
	bom := "\xef\xbb\xbf"
	unit64 := "A-Za-z0-9._" + strings.Repeat("x", 64-len("A-Za-z0-9._"))
	fields := jsonLines(
		armLine("fj", 1000, `,"extra":{"a":[1,{"b":null}],"c":"d"},"x":-1.5e3`), // 1 unknown fields
		// 2 null in every optional field: all absent.
		`{"unit":"fj","embodiment":"arm","t":2000,"obs":[0.5,0.5,0.5],"act":null,"task":null,"success":null,"img":null,"ev":null}`,
		armLine("fj", 3000, `,"ev":"pause"`),                      // 3 other ev values are ignored
		armLine("fj", 4000, `,"ev":"START"`),                      // 4 (case matters)
		armLine("fj", 5000, `,"img":{"front":"frames/nope.png"}`), // 5 arm declares no camera
		armLine("fj", 6000, `,"task":"pick","success":true`),      // 6
	)
	files := map[string][]byte{
		"fmt/gz-named-plain.jsonl":  gzipBytes(t, lines3("fa")),
		"fmt/plain-named.jsonl.gz":  lines3("fb"),
		"fmt/zst-named-plain.jsonl": zstdBytes(t, lines3("fc")),
		"fmt/zst-named-gz.jsonl.gz": zstdBytes(t, lines3("fd")),
		// RFC 1952 §2.2: a gzip file is a series of members.
		"fmt/multi.jsonl.gz": append(gzipBytes(t, jsonLines(armLine("fm", 1000, ""), armLine("fm", 2000, ""))),
			gzipBytes(t, jsonLines(armLine("fm", 3000, ""), armLine("fm", 4000, "")))...),
		// max_line_bytes 200. 1 kept; 2 blank ("\r\n"); 3 exactly 200 bytes
		// before CRLF: kept; 4 201 bytes: oversize; 5 kept.
		"fmt/crlf.jsonl": []byte(armLine("fe", 1000, "") + "\r\n\r\n" + padTo(t, armLine("fe", 2000, ""), 200) + "\r\n" +
			padTo(t, armLine("fe", 3000, ""), 201) + "\r\n" + armLine("fe", 4000, "") + "\r\n"),
		// 1 BOM at the object's start: ignored; 2 a BOM elsewhere is not
		// JSON white space (RFC 8259 §2): malformed; 3 kept.
		"fmt/bom.jsonl": []byte(bom + armLine("ff", 1000, "") + "\n" + bom + armLine("ff", 2000, "") + "\n" + armLine("ff", 3000, "") + "\n"),
		// The BOM is at the start of the decompressed object.
		"fmt/bom.jsonl.zst": zstdBytes(t, []byte(bom+armLine("fg", 1000, "")+"\n"+armLine("fg", 2000, "")+"\n")),
		// A BOM then an empty first line: the line is blank.
		"fmt/bom-blank.jsonl": []byte(bom + "\n" + armLine("fl", 1000, "") + "\n" + armLine("fl", 2000, "") + "\n"),
		// Lines 1, 3, 4, 6 and the unended 8 are blank; 2, 5, 7 kept.
		"fmt/blank.jsonl": []byte("\n" + armLine("fh", 1000, "") + "\n   \n\t \n" + armLine("fh", 2000, "") + "\n\r\n" +
			armLine("fh", 3000, "") + "\n  \t"),
		"fmt/bigt.jsonl":   jsonLines(armLine("fi", bigT, ""), armLine("fi", bigT+1, ""), armLine("fi", bigT+2, "")),
		"fmt/fields.jsonl": fields,
		// A unit of 64 bytes, every allowed kind of character: the
		// longest valid unit (SPEC §1).
		"fmt/unit64.jsonl": jsonLines(armLine(unit64, 1000, ""), armLine(unit64, 2000, "")),
		// Not selected: not a .jsonl name, and excluded by the config.
		"fmt/notes.txt":    lines3("fk"),
		"fmt/skip/x.jsonl": lines3("fk"),
	}
	cfg := strings.Replace(fixtureConfig(200), "source:\n", "source:\n  exclude: [\"**/skip/**\"]\n", 1)
	r := runPipelineAt(t, cfg, files)
	m := r.Manifest
	srcs := []srcWant{
		{"fmt/bigt.jsonl", 3, 3, nil},
		{"fmt/blank.jsonl", 3, 3, nil},
		{"fmt/bom-blank.jsonl", 2, 2, nil},
		{"fmt/bom.jsonl", 3, 2, map[string]int64{pipeline.Malformed: 1}},
		{"fmt/bom.jsonl.zst", 2, 2, nil},
		{"fmt/crlf.jsonl", 4, 3, map[string]int64{pipeline.Oversize: 1}},
		{"fmt/fields.jsonl", 6, 6, nil},
		{"fmt/gz-named-plain.jsonl", 3, 3, nil},
		{"fmt/multi.jsonl.gz", 4, 4, nil},
		{"fmt/plain-named.jsonl.gz", 3, 3, nil},
		{"fmt/unit64.jsonl", 2, 2, nil},
		{"fmt/zst-named-gz.jsonl.gz", 3, 3, nil},
		{"fmt/zst-named-plain.jsonl", 3, 3, nil},
	}
	var keys []string
	for _, s := range m.Sources {
		keys = append(keys, s.Key)
	}
	var wantKeys []string
	for _, s := range srcs {
		wantKeys = append(wantKeys, s.key)
		wantSource(t, m, s.key, s.lines, s.kept, s.dropped)
	}
	if !slices.Equal(keys, wantKeys) {
		t.Errorf("sources %v, want %v (sorted by key, notes.txt and skip/ left out)", keys, wantKeys)
	}
	// 13 units, one episode each; 39 frames; pairs = 39 − 13.
	wantFunnel(t, m, funnelOf(13, 0, srcs, 39, 13, 39-13))

	type at struct {
		src  string
		line int64
		t    int64
	}
	byUnit := map[string][]at{}
	episodes := map[string]map[string]bool{}
	tasks := map[string][]string{}
	for _, f := range readShardFrames[float32](t, r) {
		byUnit[f.Unit] = append(byUnit[f.Unit], at{f.Src, f.SrcLine, f.T})
		if episodes[f.Unit] == nil {
			episodes[f.Unit] = map[string]bool{}
		}
		episodes[f.Unit][f.Episode] = true
		task := "<null>"
		if f.Task != nil {
			task = *f.Task
		}
		if f.Success != nil {
			task += fmt.Sprintf("/%v", *f.Success)
		}
		tasks[f.Unit] = append(tasks[f.Unit], task)
	}
	want := map[string][]at{
		"fe": {{"fmt/crlf.jsonl", 1, 1000}, {"fmt/crlf.jsonl", 3, 2000}, {"fmt/crlf.jsonl", 5, 4000}},
		"fh": {{"fmt/blank.jsonl", 2, 1000}, {"fmt/blank.jsonl", 5, 2000}, {"fmt/blank.jsonl", 7, 3000}},
		"fl": {{"fmt/bom-blank.jsonl", 2, 1000}, {"fmt/bom-blank.jsonl", 3, 2000}},
		"ff": {{"fmt/bom.jsonl", 1, 1000}, {"fmt/bom.jsonl", 3, 3000}},
		"fi": {{"fmt/bigt.jsonl", 1, bigT}, {"fmt/bigt.jsonl", 2, bigT + 1}, {"fmt/bigt.jsonl", 3, bigT + 2}},
		"fm": {{"fmt/multi.jsonl.gz", 1, 1000}, {"fmt/multi.jsonl.gz", 2, 2000}, {"fmt/multi.jsonl.gz", 3, 3000}, {"fmt/multi.jsonl.gz", 4, 4000}},
	}
	for unit, w := range want {
		if !slices.Equal(byUnit[unit], w) {
			t.Errorf("unit %s frames (src, src_line, t) %v, want %v", unit, byUnit[unit], w)
		}
	}
	if w := []at{{"fmt/unit64.jsonl", 1, 1000}, {"fmt/unit64.jsonl", 2, 2000}}; len(unit64) != 64 || !slices.Equal(byUnit[unit64], w) {
		t.Errorf("unit %s (%d bytes) frames %v, want %v", unit64, len(unit64), byUnit[unit64], w)
	}
	if _, ok := byUnit["fk"]; ok {
		t.Errorf("frames of unit fk, from objects that are not selected")
	}
	for unit, eps := range episodes {
		if len(eps) != 1 {
			t.Errorf("unit %s: episodes %v, want one (ev values other than start/end are ignored)", unit, slices.Sorted(maps.Keys(eps)))
		}
	}
	if !episodes["fi"][fmt.Sprintf("fi-%d", bigT)] {
		t.Errorf("unit fi: episodes %v, want fi-%d", slices.Sorted(maps.Keys(episodes["fi"])), bigT)
	}
	if w := []string{"<null>", "<null>", "<null>", "<null>", "<null>", "pick/true"}; !slices.Equal(tasks["fj"], w) {
		t.Errorf("unit fj task/success %v, want %v", tasks["fj"], w)
	}
}

// TestIngestDuplicateObjects checks SPEC §3.1's object dedupe: a
// byte-identical copy under another key is recorded with duplicate_of, the
// earlier key in byte order, and contributes no lines. "a-b.jsonl" sorts
// before "a/b.jsonl" ('-' is 0x2d, '/' 0x2f) although a folder walk visits
// a/ first. A gzip of the same lines is a different object: its frames are
// dropped one by one in the episodes stage as duplicate, and charged to it
// (SPEC §5).
func TestIngestDuplicateObjects(t *testing.T) {
	x := jsonLines(armLine("d1", 1000, ""), armLine("d1", 2000, ""), armLine("d1", 3000, `,"task":"pick"`))
	// Same t, the third frame's task differs: 2 duplicates, 1 conflict.
	y := jsonLines(armLine("d1", 1000, ""), armLine("d1", 2000, ""), armLine("d1", 3000, `,"task":"place"`))
	files := map[string][]byte{
		"a/b.jsonl":  x,
		"a-b.jsonl":  x,
		"c.jsonl":    x,
		"d.jsonl.gz": gzipBytes(t, x),
		"e.jsonl":    y,
	}
	m := runPipeline(t, fixtureConfig(100000), files)
	srcs := []srcWant{
		{"a-b.jsonl", 3, 3, nil},
		{"a/b.jsonl", 0, 0, nil},
		{"c.jsonl", 0, 0, nil},
		{"d.jsonl.gz", 3, 0, map[string]int64{pipeline.Duplicate: 3}},
		{"e.jsonl", 3, 0, map[string]int64{pipeline.Duplicate: 2, pipeline.Conflict: 1}},
	}
	for _, s := range srcs {
		wantSource(t, m, s.key, s.lines, s.kept, s.dropped)
	}
	sum := sha256.Sum256(x)
	for _, key := range []string{"a-b.jsonl", "a/b.jsonl", "c.jsonl"} {
		s := sourceByKey(t, m, key)
		if s.SHA256 != hex.EncodeToString(sum[:]) || s.Bytes != int64(len(x)) {
			t.Errorf("%s: sha256 %s bytes %d, want %x %d", key, s.SHA256, s.Bytes, sum, len(x))
		}
		var want *string
		if key != "a-b.jsonl" {
			// With three copies, both later ones name the earliest.
			k := "a-b.jsonl"
			want = &k
		}
		if (s.DuplicateOf == nil) != (want == nil) || (want != nil && *s.DuplicateOf != *want) {
			t.Errorf("%s: duplicate_of %v, want %v", key, keyOrNull(s.DuplicateOf), keyOrNull(want))
		}
		if w := pipeline.JoinURI(m.SourceRoot, key); s.URI != w {
			t.Errorf("%s: uri %s, want %s", key, s.URI, w)
		}
	}
	for _, key := range []string{"d.jsonl.gz", "e.jsonl"} {
		if s := sourceByKey(t, m, key); s.DuplicateOf != nil {
			t.Errorf("%s: duplicate_of %q, want null", key, *s.DuplicateOf)
		}
	}
	var keys []string
	for _, s := range m.Sources {
		keys = append(keys, s.Key)
	}
	if w := []string{"a-b.jsonl", "a/b.jsonl", "c.jsonl", "d.jsonl.gz", "e.jsonl"}; !slices.Equal(keys, w) {
		t.Errorf("sources in order %v, want %v (SPEC §5: sorted by key)", keys, w)
	}
	wantFunnel(t, m, funnelOf(5, 2, srcs, 3, 1, 2))
}

func keyOrNull(s *string) string {
	if s == nil {
		return "null"
	}
	return *s
}

// cutStream describes what a decoder gets from a compressed stream cut
// short: the complete lines and whether a partial line is left.
type cutStream struct {
	data     []byte // the stored (cut) bytes
	complete int64  // complete lines decoded before the cut
	partial  bool   // a non-blank partial line after the last line end
}

// measureCut decodes a cut stream with a decoder independent of the
// ingest's reading code and counts what it yields. The lines it is given
// are never blank, so every complete line counts.
func measureCut(t *testing.T, data []byte, open func(io.Reader) (io.Reader, error)) cutStream {
	t.Helper()
	r, err := open(bytes.NewReader(data))
	if err != nil {
		t.Fatalf("open cut stream: %v", err)
	}
	dec, err := io.ReadAll(r)
	if c, ok := r.(io.Closer); ok {
		c.Close()
	}
	if err == nil {
		t.Fatalf("the cut stream decodes without error: not cut")
	}
	c := cutStream{data: data, complete: int64(bytes.Count(dec, []byte("\n")))}
	rest := dec[bytes.LastIndexByte(dec, '\n')+1:]
	c.partial = len(bytes.TrimSpace(rest)) > 0
	return c
}

// TestIngestIncomplete checks SPEC §3.1's incomplete objects: a compressed
// stream cut in the middle keeps the lines decoded before the cut, counts
// the partial line as truncated, and is marked incomplete. The expected
// numbers come from decoding the cut stream here (compress/gzip, and the
// zstd package's own decoder) and counting complete lines.
func TestIngestIncomplete(t *testing.T) {
	// Varied lines, long enough that the compressors emit several blocks,
	// so a cut in the middle leaves decoded lines behind.
	var b bytes.Buffer
	const n = 3000
	for i := range n {
		fmt.Fprintf(&b, `{"unit":"g1","embodiment":"arm","t":%d,"obs":[%d.%03d,0.%03d,%d.5],"act":[0.%02d,-0.%02d],"task":"t%d"}`+"\n",
			1000*(i+1), i%10, (i*7919)%1000, (i*104729)%1000, i%5, i%97, (i*31)%97, i%13)
	}
	plain := b.Bytes()
	gz := gzipBytes(t, plain)
	zs := zstdBytes(t, plain)

	// Look for cut points, from the middle on, that leave a partial line:
	// the case the truncated rule is about.
	find := func(full []byte, open func(io.Reader) (io.Reader, error)) cutStream {
		for cut := len(full) / 2; cut < len(full)-8; cut++ {
			c := measureCut(t, full[:cut], open)
			if c.partial && c.complete > 0 {
				return c
			}
		}
		t.Fatalf("no cut point leaves a partial line")
		return cutStream{}
	}
	gzCut := find(gz, func(r io.Reader) (io.Reader, error) { return gzip.NewReader(r) })
	zsCut := find(zs, func(r io.Reader) (io.Reader, error) {
		d, err := zstd.NewReader(r, zstd.WithDecoderConcurrency(1))
		if err != nil {
			return nil, err
		}
		return d.IOReadCloser(), nil
	})
	// A gzip stream cut inside its 10-byte header (RFC 1952 §2.3) yields
	// nothing at all.
	header := gz[:5]

	files := map[string][]byte{
		"cut.jsonl.gz":        gzCut.data,
		"cut.jsonl.zst":       zsCut.data,
		"cut-header.jsonl.gz": header,
		"whole.jsonl.gz":      gzipBytes(t, jsonLines(armLine("w1", 1000, ""), armLine("w1", 2000, ""))),
	}
	cfg := strings.Replace(fixtureConfig(100000), "max_steps: 500", "max_steps: 100000", 1)
	m := runPipeline(t, cfg, files)
	srcs := []srcWant{
		{"cut-header.jsonl.gz", 0, 0, nil},
		// The gzip and zstd copies hold the same unit and times: the zstd
		// one's frames at times the gzip one also kept are duplicates
		// ("cut.jsonl.gz" < "cut.jsonl.zst").
		{"cut.jsonl.gz", gzCut.complete + 1, gzCut.complete, map[string]int64{pipeline.Truncated: 1}},
		{"cut.jsonl.zst", zsCut.complete + 1, zsCut.complete - min(zsCut.complete, gzCut.complete),
			map[string]int64{pipeline.Truncated: 1, pipeline.Duplicate: min(zsCut.complete, gzCut.complete)}},
		{"whole.jsonl.gz", 2, 2, nil},
	}
	for _, s := range srcs {
		wantSource(t, m, s.key, s.lines, s.kept, s.dropped)
		src := sourceByKey(t, m, s.key)
		if want := s.key != "whole.jsonl.gz"; src.Incomplete != want {
			t.Errorf("%s: incomplete %v, want %v", s.key, src.Incomplete, want)
		}
		// Every stored byte is hashed, also those after the cut.
		sum := sha256.Sum256(files[s.key])
		if src.SHA256 != hex.EncodeToString(sum[:]) || src.Bytes != int64(len(files[s.key])) {
			t.Errorf("%s: sha256 %s bytes %d, want %x %d", s.key, src.SHA256, src.Bytes, sum, len(files[s.key]))
		}
	}
	frames := max(gzCut.complete, zsCut.complete) + 2
	wantFunnel(t, m, funnelOf(4, 0, srcs, frames, 2, frames-2))
	t.Logf("gzip cut at %d of %d bytes: %d lines; zstd cut at %d of %d bytes: %d lines",
		len(gzCut.data), len(gz), gzCut.complete, len(zsCut.data), len(zs), zsCut.complete)
}

// line is one line of a built object and the reason it must be dropped
// with at ingest ("" when accepted).
type builtLine struct {
	text, reason string
}

// TestIngestConservation runs a corpus with every reason of SPEC §3.1 and
// §3.2 spread over several objects, a duplicate object, short episodes and
// cross-object duplicates and conflicts, and checks the whole funnel and
// every source against counts derived from how the corpus is built.
func TestIngestConservation(t *testing.T) {
	png := ingestFixture(t, "frames/ok.png")
	okURI := "data:image/png;base64," + base64.StdEncoding.EncodeToString(png)
	good := func(unit string, ms int64, extra string) string { return armLine(unit, ms*1_000_000, extra) }
	camLine := func(ms int64, front, wrist string) string {
		return fmt.Sprintf(`{"unit":"m2","embodiment":"cam","t":%d,"obs":[1,2,3],"img":{"front":%q,"wrist":%q}}`, ms*1_000_000, front, wrist)
	}
	// m/1.jsonl: unit m1, 25 accepted frames at 1…25 ms, with one line of
	// each per-line reason between them.
	var obj1 []builtLine
	bad := []builtLine{
		{`{"unit":"m1","oversize":"` + strings.Repeat("o", 500) + `"}`, pipeline.Oversize},
		{`{"unit":"m1",`, pipeline.Malformed},
		{strings.Replace(good("m1", 100, ""), `"arm"`, `"nope"`, 1), pipeline.UnknownEmbodiment},
		{strings.Replace(good("m1", 101, ""), "[0.5,0.5,0.5]", "[0.5]", 1), pipeline.DimMismatch},
		{strings.Replace(good("m1", 102, ""), "[0.5,0.5,0.5]", "[NaN,0.5,0.5]", 1), pipeline.NonFinite},
		{strings.Replace(good("m1", 103, ""), "[0.5,0.5,0.5]", "[0.5,0.5,50]", 1), pipeline.OutOfRange},
		{good("m1", 1, ""), pipeline.TimeRegress}, // after frame 3 ms
	}
	for ms := int64(1); ms <= 25; ms++ {
		obj1 = append(obj1, builtLine{good("m1", ms, ""), ""})
		if ms >= 3 && ms-3 < int64(len(bad)) {
			obj1 = append(obj1, bad[ms-3])
		}
	}
	// m/2.jsonl.gz: m1 at 1…5 ms again, identical (duplicates), m1 at
	// 6 ms with a task (a conflict), and unit m3 with 3 frames (shorter than
	// min_steps 4).
	var obj2 []builtLine
	for ms := int64(1); ms <= 5; ms++ {
		obj2 = append(obj2, builtLine{good("m1", ms, ""), ""})
	}
	obj2 = append(obj2, builtLine{good("m1", 6, `,"task":"other"`), ""})
	for ms := int64(1); ms <= 3; ms++ {
		obj2 = append(obj2, builtLine{good("m3", ms, ""), ""})
	}
	// m/3.jsonl: unit m2 (cam) with 6 frames at 1…6 ms, then a gap of more
	// than max_gap (1s) and 2 frames (a short episode), an image_missing and
	// an image_corrupt line, and a last line cut without a line end.
	var obj3 []builtLine
	for ms := int64(1); ms <= 6; ms++ {
		obj3 = append(obj3, builtLine{camLine(ms, okURI, okURI), ""})
	}
	obj3 = append(obj3,
		builtLine{camLine(7, okURI, "frames/nope.png"), pipeline.ImageMissing},
		builtLine{camLine(8, okURI, "data:image/png;base64,aGVsbG8="), pipeline.ImageCorrupt},
		builtLine{camLine(5000, okURI, okURI), ""},
		builtLine{camLine(5001, okURI, okURI), ""},
		builtLine{camLine(5002, okURI, okURI)[:40], pipeline.Truncated},
	)
	render := func(ls []builtLine, lastUnended bool) []byte {
		var b bytes.Buffer
		for i, l := range ls {
			b.WriteString(l.text)
			if !lastUnended || i < len(ls)-1 {
				b.WriteString("\n")
			}
		}
		return b.Bytes()
	}
	one := render(obj1, false)
	files := map[string][]byte{
		"m/0-empty.jsonl": []byte("\n  \n\t\n"),
		"m/1.jsonl":       one,
		"m/2.jsonl.gz":    gzipBytes(t, render(obj2, false)),
		"m/3.jsonl":       render(obj3, true),
		"m/4.jsonl":       one, // a byte-identical copy
	}
	// The ingest counts of each object, from the reasons its lines were
	// built with.
	count := func(ls []builtLine) (lines, kept int64, dropped map[string]int64) {
		dropped = map[string]int64{}
		for _, l := range ls {
			lines++
			if l.reason == "" {
				kept++
			} else {
				dropped[l.reason]++
			}
		}
		return lines, kept, dropped
	}
	l1, k1, d1 := count(obj1)
	l2, k2, d2 := count(obj2)
	l3, k3, d3 := count(obj3)
	if l1 != 32 || k1 != 25 || l2 != 9 || k2 != 9 || l3 != 11 || k3 != 8 {
		t.Fatalf("corpus built wrong: %d/%d %d/%d %d/%d", l1, k1, l2, k2, l3, k3)
	}
	// Episodes stage (SPEC §3.2), min_steps 4, max_steps 10: m1's 25 frames
	// → chunks 10, 10, 5; m/2's m1 frames: 5 duplicate, 1 conflict; m3's 3
	// frames: short; m2: 6 frames, then 2 after the gap: short.
	d2[pipeline.Duplicate], d2[pipeline.Conflict], d2[pipeline.ShortEpisode] = 5, 1, 3
	k2 -= 9
	d3[pipeline.ShortEpisode] = 2
	k3 -= 2
	srcs := []srcWant{
		{"m/0-empty.jsonl", 0, 0, nil},
		{"m/1.jsonl", l1, k1, d1},
		{"m/2.jsonl.gz", l2, k2, d2},
		{"m/3.jsonl", l3, k3, d3},
		{"m/4.jsonl", 0, 0, nil},
	}
	cfg := `
dataset: conservation
partitions: 2
source: {max_line_bytes: 400}
embodiments:
  arm: {obs: 3, act: 2, obs_low: -10, obs_high: 10, goal_tolerance: 0.1}
  cam: {obs: 3, act: 2, cameras: [front, wrist], goal_tolerance: 0.1}
episodes: {max_gap: 1s, min_steps: 4, max_steps: 10}
goals: {future: 1, geometric: 0, final: 0, negative: 0}
`
	m := runPipeline(t, cfg, files)
	for _, s := range srcs {
		wantSource(t, m, s.key, s.lines, s.kept, s.dropped)
	}
	if s := sourceByKey(t, m, "m/4.jsonl"); keyOrNull(s.DuplicateOf) != "m/1.jsonl" {
		t.Errorf("m/4.jsonl: duplicate_of %s, want m/1.jsonl", keyOrNull(s.DuplicateOf))
	}
	// 4 episodes (m1: 10, 10, 5; m2: 6) hold 31 frames and 9+9+4+5 pairs.
	want := funnelOf(5, 1, srcs, 31, 4, 9+9+4+5)
	wantFunnel(t, m, want)
	// Every reason that can drop a line appears at least once.
	for _, d := range pipeline.ReasonDefs() {
		if d.Lines && want.Dropped[d.Name] == 0 {
			t.Errorf("the corpus has no %s drop", d.Name)
		}
	}
	if want.Lines != 52 {
		t.Errorf("corpus lines %d, want 52", want.Lines)
	}
}

// TestIngestFixturesAreJSONLines checks that each committed fixture line
// the tests count as kept is, for encoding/json, a JSON object (an
// independent parser), and that the malformed fixture's lines are not,
// except those whose fault is a field type or value. This guards the
// fixtures themselves against edits that change what they test.
func TestIngestFixturesAreJSONLines(t *testing.T) {
	lines := bytes.Split(bytes.TrimSuffix(ingestFixture(t, "malformed.jsonl"), []byte("\n")), []byte("\n"))
	if len(lines) != 24 {
		t.Fatalf("malformed.jsonl has %d lines, want 24", len(lines))
	}
	// Physical lines that are not valid JSON (RFC 8259), per the list in
	// TestIngestReasonFixtures: "hello" (2), 05000 (11), the logger token
	// NaN (17, which also has a bad unit), nan (18), trailing text (19),
	// invalid UTF-8 (23).
	notJSON := map[int]bool{2: true, 11: true, 17: true, 18: true, 19: true, 23: true}
	for i, l := range lines {
		n := i + 1
		var v any
		// RFC 8259 §8.1: JSON text exchanged between systems is UTF-8.
		valid := json.Valid(l) && utf8.Valid(l) && json.Unmarshal(l, &v) == nil
		if valid == notJSON[n] {
			t.Errorf("malformed.jsonl line %d: valid JSON %v, want %v: %s", n, valid, !notJSON[n], l)
		}
	}
}

// TestIngestBOMNotCountedInLineLength: SPEC §1 ignores a byte-order mark at
// the start of an object, and SPEC §3.1 measures a line without its line
// end; so a first line of exactly max_line_bytes after the BOM is not
// oversize.
func TestIngestBOMNotCountedInLineLength(t *testing.T) {
	body := "\xef\xbb\xbf" + padTo(t, armLine("b1", 1000, ""), 200) + "\n" + armLine("b1", 2000, "") + "\n"
	m := runPipeline(t, fixtureConfig(200), map[string][]byte{"bom.jsonl": []byte(body)})
	srcs := []srcWant{{"bom.jsonl", 2, 2, nil}}
	wantSource(t, m, "bom.jsonl", 2, 2, nil)
	wantFunnel(t, m, funnelOf(1, 0, srcs, 2, 1, 1))
}

// TestIngestFileURIPercentEncoded: an absolute file:// image reference is a
// URI, whose path is percent-encoded (RFC 3986 §2.1, RFC 8089 §2): a file
// "a b.png" is file:///…/a%20b.png, in a folder "c d" …/c%20d/…. Both
// name existing, valid images here, so both lines are kept.
func TestIngestFileURIPercentEncoded(t *testing.T) {
	imgs := fixtureImages(t)
	outside := t.TempDir()
	writeTree(t, outside, map[string][]byte{"a b.png": imgs["frames/ok.png"], "c d/ok.jpg": imgs["frames/ok.jpg"]})
	root := "file://" + filepath.ToSlash(outside)
	line := func(ts int64, front, wrist string) string {
		return fmt.Sprintf(`{"unit":"p1","embodiment":"cam","t":%d,"obs":[1,2,3],"img":{"front":%q,"wrist":%q}}`, ts, front, wrist)
	}
	m := runPipeline(t, withImageRoots(t, fixtureConfig(100000), root), map[string][]byte{"pct.jsonl": jsonLines(
		line(1000, "frames/ok.png", root+"/c%20d/ok.jpg"),   // folder name encoded
		line(2000, root+"/a%20b.png", root+"/c%20d/ok.jpg"), // file name encoded
	), "frames/ok.png": imgs["frames/ok.png"]})
	srcs := []srcWant{{"pct.jsonl", 2, 2, nil}}
	wantSource(t, m, "pct.jsonl", 2, 2, nil)
	wantFunnel(t, m, funnelOf(1, 0, srcs, 2, 1, 1))
}

// TestIngestLongBlankLine: a line of only white space is skipped and not
// counted (SPEC §1) whatever its length: it is not oversize, nor is an
// unended one at the object's end truncated. Lines of max_line_bytes 200:
// 1 kept; 2 500 spaces and tabs; 3 kept; 4 201 spaces then CRLF; 5 a line
// of 300 bytes with one "x" after 250 spaces: oversize; 6 kept; 7 unended,
// 400 spaces.
func TestIngestLongBlankLine(t *testing.T) {
	body := armLine("w1", 1000, "") + "\n" + strings.Repeat(" \t", 250) + "\n" + armLine("w1", 2000, "") + "\n" +
		strings.Repeat(" ", 201) + "\r\n" + strings.Repeat(" ", 250) + "x" + strings.Repeat(" ", 49) + "\n" +
		armLine("w1", 3000, "") + "\n" + strings.Repeat(" ", 400)
	m := runPipeline(t, fixtureConfig(200), map[string][]byte{"blank.jsonl": []byte(body)})
	srcs := []srcWant{{"blank.jsonl", 4, 3, map[string]int64{pipeline.Oversize: 1}}}
	wantSource(t, m, "blank.jsonl", 4, 3, srcs[0].dropped)
	wantFunnel(t, m, funnelOf(1, 0, srcs, 3, 1, 2))
}

// TestIngestFloat32Overflow: with float: float32 a finite number too large
// for float32 (the largest is (2−2^−23)·2^127 ≈ 3.4028235e38, IEEE 754
// binary32) becomes +Inf when stored: non_finite, checked before
// out_of_range. With float: float64 the same values are finite, and out of
// the declared bounds. Lines: 1 kept; 2 obs 3.5e38; 3 act −3.5e38; 4 obs
// 3.4e38 (finite in float32, out of range); 5 kept.
func TestIngestFloat32Overflow(t *testing.T) {
	body := jsonLines(
		armLine("f1", 1000, ""),
		`{"unit":"f1","embodiment":"arm","t":2000,"obs":[3.5e38,0.5,0.5],"act":[0.1,-0.1]}`,
		`{"unit":"f1","embodiment":"arm","t":3000,"obs":[0.5,0.5,0.5],"act":[-3.5e38,0]}`,
		`{"unit":"f1","embodiment":"arm","t":4000,"obs":[3.4e38,0.5,0.5],"act":[0.1,-0.1]}`,
		armLine("f1", 5000, ""),
	)
	for _, c := range []struct {
		float   string
		dropped map[string]int64
	}{
		{"float32", map[string]int64{pipeline.NonFinite: 2, pipeline.OutOfRange: 1}},
		{"float64", map[string]int64{pipeline.OutOfRange: 3}},
	} {
		m := runPipeline(t, fixtureConfig(1000)+"float: "+c.float+"\n", map[string][]byte{"big.jsonl": body})
		srcs := []srcWant{{"big.jsonl", 5, 2, c.dropped}}
		wantSource(t, m, "big.jsonl", 5, 2, c.dropped)
		wantFunnel(t, m, funnelOf(1, 0, srcs, 2, 1, 1))
	}
}

// TestIngestNoObjects: a source where no object matches include (here, the
// only object is not .jsonl) fails the run, naming the source and the
// patterns, and writes no version.
func TestIngestNoObjects(t *testing.T) {
	dir := t.TempDir()
	writeTree(t, filepath.Join(dir, "src"), map[string][]byte{"notes/a.json": jsonLines(armLine("n1", 1000, ""))})
	cfgPath := filepath.Join(dir, "hindcast.yaml")
	if err := os.WriteFile(cfgPath, withLocations(t, fixtureConfig(1000), "src", "work", "out"), 0o644); err != nil {
		t.Fatal(err)
	}
	cfg, err := pipeline.LoadConfig(cfgPath)
	if err != nil {
		t.Fatal(err)
	}
	_, err = pipeline.Execute(context.Background(), cfg, All(), pipeline.Options{Version: "v1", Parallel: 2})
	want := fmt.Sprintf(`ingest: no object under file://%s/ matches include ["**/*.jsonl" "**/*.jsonl.gz" "**/*.jsonl.zst" "**/*.mcap"] (exclude [])`, filepath.ToSlash(filepath.Join(dir, "src")))
	if err == nil || !strings.Contains(err.Error(), want) {
		t.Errorf("run over a source with no matching object: %v; want an error containing %s", err, want)
	}
	if _, err := os.Stat(filepath.Join(dir, "out", cfg.Dataset, "v1", "manifest.json")); !errors.Is(err, fs.ErrNotExist) {
		t.Errorf("manifest after the failed run: %v, want none", err)
	}
}

// TestIngestObjectChangedSinceListing: an ingest item is keyed by the size
// and ETag the listing gave; an object that no longer matches when read
// (overwritten meanwhile) fails its item naming the object, instead of
// sealing other content under that key.
func TestIngestObjectChangedSinceListing(t *testing.T) {
	dir := t.TempDir()
	body := jsonLines(armLine("c1", 1000, ""), armLine("c1", 2000, ""))
	writeTree(t, filepath.Join(dir, "src"), map[string][]byte{"a.jsonl": body})
	cfg, err := pipeline.ParseConfig(withLocations(t, fixtureConfig(1000), "src", "work", "out"), dir, "c.yaml")
	if err != nil {
		t.Fatal(err)
	}
	env := &pipeline.Env{Config: cfg, Source: pipeline.NewLocalStore(filepath.Join(dir, "src")), Work: pipeline.NewLocalStore(filepath.Join(dir, "work"))}
	// As listed before the object grew by one line, without a tag, so that
	// the size alone tells (a local reader's tag is checked at open, see
	// TestIngestLocalObjectTagChangedSinceListing).
	listed := pipeline.ObjectInfo{Key: "a.jsonl", Size: int64(len(body)) - 10}
	_, err = Ingest{}.Do(context.Background(), env, pipeline.Item{ID: "a.jsonl", Key: "k", Meta: listed})
	want := fmt.Sprintf("changed since it was listed (%d bytes read, %d listed)", len(body), len(body)-10)
	if err == nil || !strings.Contains(err.Error(), want) || !strings.Contains(err.Error(), "a.jsonl") {
		t.Errorf("ingest of an object that changed since listing: %v; want an error naming it, containing %q", err, want)
	}
	listed.Size = int64(len(body))
	if _, err := (Ingest{}).Do(context.Background(), env, pipeline.Item{ID: "a.jsonl", Key: "k2", Meta: listed}); err != nil {
		t.Errorf("ingest of the object as listed: %v", err)
	}
}

// zstdRawFrame is a zstd frame written by hand (RFC 8878 §3.1.1): the magic
// number, a frame header descriptor of 0 (no content size, not single
// segment, no checksum, no dictionary), a window descriptor of exponent e
// and mantissa 0 (window 2^(10+e) bytes, §3.1.1.1.2), then the content as
// one raw, last block (block header: last = 1, type raw = 0, size; §3.1.1.2).
func zstdRawFrame(e byte, content []byte) []byte {
	b := []byte{0x28, 0xb5, 0x2f, 0xfd, 0x00, e << 3}
	h := 1 | uint32(len(content))<<3
	b = append(b, byte(h), byte(h>>8), byte(h>>16))
	return append(b, content...)
}

// TestIngestZstdWindowBound: a zstd frame may declare a window far larger
// than its content; decoding may hold that window, so ingest decodes windows of
// up to 128 MiB and counts an object that declares more as incomplete, with
// no lines, instead of allocating it. The same content under a 1 MiB window
// is read whole.
func TestIngestZstdWindowBound(t *testing.T) {
	content := jsonLines(armLine("z1", 1000, ""), armLine("z1", 2000, ""))
	m := runPipeline(t, fixtureConfig(1000), map[string][]byte{
		"small-window.jsonl.zst": zstdRawFrame(10, content), // 2^20 bytes
		"huge-window.jsonl.zst":  zstdRawFrame(18, content), // 2^28 bytes: over 128 MiB
	})
	wantSource(t, m, "small-window.jsonl.zst", 2, 2, nil)
	wantSource(t, m, "huge-window.jsonl.zst", 0, 0, nil)
	if s := sourceByKey(t, m, "huge-window.jsonl.zst"); !s.Incomplete {
		t.Errorf("an object declaring a 256 MiB window: incomplete %v, want true", s.Incomplete)
	}
	if s := sourceByKey(t, m, "small-window.jsonl.zst"); s.Incomplete {
		t.Errorf("an object declaring a 1 MiB window: incomplete, want read whole")
	}
}

// TestIngestSymlinkedObject: a source object that is a link to a file is
// read as that file, whatever the link's own size: the check that an object
// still matches its listing compares with what the link points to.
func TestIngestSymlinkedObject(t *testing.T) {
	dir := t.TempDir()
	body := jsonLines(armLine("s1", 1000, ""), armLine("s1", 2000, ""), armLine("s1", 3000, ""))
	writeTree(t, filepath.Join(dir, "elsewhere"), map[string][]byte{"a.jsonl": body})
	writeTree(t, filepath.Join(dir, "src"), nil)
	if err := os.Symlink(filepath.Join(dir, "elsewhere", "a.jsonl"), filepath.Join(dir, "src", "a.jsonl")); err != nil {
		t.Fatal(err)
	}
	cfg, err := pipeline.ParseConfig(withLocations(t, fixtureConfig(1000), "src", "work", "out"), dir, "c.yaml")
	if err != nil {
		t.Fatal(err)
	}
	m, err := pipeline.Execute(context.Background(), cfg, All(), pipeline.Options{Version: "v1", Parallel: 2})
	if err != nil {
		t.Fatalf("run over a linked object: %v", err)
	}
	srcs := []srcWant{{"a.jsonl", 3, 3, nil}}
	wantSource(t, m, "a.jsonl", 3, 3, nil)
	wantFunnel(t, m, funnelOf(1, 0, srcs, 3, 1, 2))
}
