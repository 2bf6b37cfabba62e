package imagecheck

import (
	"bytes"
	"encoding/base64"
	"encoding/binary"
	"errors"
	"fmt"
	"hash/crc32"
	"image"
	"image/color"
	"image/jpeg"
	"image/png"
	"math/rand/v2"
	"testing"
)

// crcBitwise is the CRC of PNG spec Annex D ("Sample CRC implementation"):
// reflected polynomial 0xEDB88320, register preset to all ones and inverted at
// the end. Annex D goes through a 256-entry table; this computes the same
// update_crc bit by bit, so the test does not share code with hash/crc32.
func crcBitwise(data []byte) uint32 {
	c := uint32(0xFFFFFFFF)
	for _, b := range data {
		c ^= uint32(b)
		for range 8 {
			if c&1 != 0 {
				c = 0xEDB88320 ^ (c >> 1)
			} else {
				c >>= 1
			}
		}
	}
	return c ^ 0xFFFFFFFF
}

// chunk builds a PNG chunk (PNG spec §5.3): length, type, data, CRC over type+data.
func chunk(typ string, data []byte) []byte {
	out := binary.BigEndian.AppendUint32(nil, uint32(len(data)))
	out = append(out, typ...)
	out = append(out, data...)
	return binary.BigEndian.AppendUint32(out, crcBitwise(out[4:]))
}

func cat(parts ...[]byte) []byte { return bytes.Join(parts, nil) }

var (
	sig = []byte{0x89, 'P', 'N', 'G', '\r', '\n', 0x1A, '\n'} // PNG spec §5.2
	// ihdr1x1: width 1, height 1, bit depth 8, colour type 0 (greyscale),
	// compression 0, filter 0, interlace 0 (PNG spec §11.2.2).
	ihdr1x1 = chunk("IHDR", []byte{0, 0, 0, 1, 0, 0, 0, 1, 8, 0, 0, 0, 0})
	// idat1x1 holds one scanline, filter byte 0 then grey 0x80, as a zlib
	// stream (RFC 1950: CMF 78, FLG 01) with one stored deflate block (RFC 1951
	// §3.2.4: BFINAL=1 BTYPE=00, LEN=2, NLEN=^2) and the Adler-32 of 00 80,
	// which is 00820081 (RFC 1950 §8: a=1+0x80, b=1+0x81).
	idat1x1 = chunk("IDAT", []byte{0x78, 0x01, 0x01, 0x02, 0x00, 0xFD, 0xFF, 0x00, 0x80, 0x00, 0x82, 0x00, 0x81})
	iend    = chunk("IEND", nil)
)

// handPNG is a 70-byte 1×1 greyscale PNG: signature at 0, IHDR at 8, IDAT at
// 33, IEND at 58.
func handPNG() []byte { return cat(sig, ihdr1x1, idat1x1, iend) }

// JPEG pieces (ITU-T T.81 Annex B), laid out so that in handJPEG SOF0 is at
// 2, SOS at 15, the entropy-coded data at 25 and EOI at 35.
var (
	soi = []byte{0xFF, 0xD8}
	eoi = []byte{0xFF, 0xD9}
	// sof0: baseline frame header, length 11: P=8, Y=1, X=1, Nf=1, component
	// 1 with H/V 1×1 and table 0 (T.81 §B.2.2).
	sof0 = []byte{0xFF, 0xC0, 0x00, 0x0B, 0x08, 0x00, 0x01, 0x00, 0x01, 0x01, 0x01, 0x11, 0x00}
	// sos: scan header, length 8: Ns=1, component 1 with tables 0/0, Ss=0,
	// Se=63, Ah/Al=0 (T.81 §B.2.3).
	sos = []byte{0xFF, 0xDA, 0x00, 0x08, 0x01, 0x01, 0x00, 0x00, 0x3F, 0x00}
	// scanData contains a stuffed byte FF 00 (T.81 §B.1.1.5) and the restart
	// markers RST0 and RST7 (T.81 Table B.1), none of which ends the scan.
	scanData = []byte{0x12, 0xFF, 0x00, 0x34, 0xFF, 0xD0, 0x56, 0xFF, 0xD7, 0x78}
)

func handJPEG() []byte { return cat(soi, sof0, sos, scanData, eoi) }

// testImage is a 2×2 image with four distinct colours.
func testImage() image.Image {
	m := image.NewNRGBA(image.Rect(0, 0, 2, 2))
	m.Set(0, 0, color.NRGBA{255, 0, 0, 255})
	m.Set(1, 0, color.NRGBA{0, 255, 0, 255})
	m.Set(0, 1, color.NRGBA{0, 0, 255, 255})
	m.Set(1, 1, color.NRGBA{255, 255, 255, 128})
	return m
}

func stdPNG(t testing.TB, m image.Image) []byte {
	t.Helper()
	var buf bytes.Buffer
	if err := png.Encode(&buf, m); err != nil {
		t.Fatalf("png.Encode: %v", err)
	}
	return buf.Bytes()
}

func stdJPEG(t testing.TB, m image.Image) []byte {
	t.Helper()
	var buf bytes.Buffer
	if err := jpeg.Encode(&buf, m, &jpeg.Options{Quality: 90}); err != nil {
		t.Fatalf("jpeg.Encode: %v", err)
	}
	return buf.Bytes()
}

func TestCRCBitwise(t *testing.T) {
	// The CRC of an IEND chunk (type "IEND", no data) is AE 42 60 82, the last
	// four bytes of every PNG (from memory; cross-checked against
	// image/png output in TestCheckStdlibPNG).
	if got := crcBitwise([]byte("IEND")); got != 0xAE426082 {
		t.Errorf(`crcBitwise("IEND") = %08x, want ae426082`, got)
	}
	// CRC-32/ISO-HDLC check value over "123456789" (Catalogue of parametrised
	// CRC algorithms; from memory).
	if got := crcBitwise([]byte("123456789")); got != 0xCBF43926 {
		t.Errorf(`crcBitwise("123456789") = %08x, want cbf43926`, got)
	}
	// Check uses hash/crc32's IEEE table: it must be the same CRC (PNG spec
	// §5.3 names ISO 3309 / ITU-T V.42).
	for _, s := range []string{"", "IEND", "IHDR\x00\x00\x00\x01", "123456789"} {
		if got, want := crc32.ChecksumIEEE([]byte(s)), crcBitwise([]byte(s)); got != want {
			t.Errorf("crc32.ChecksumIEEE(%q) = %08x, bitwise %08x", s, got, want)
		}
	}
	if want := []byte{0, 0, 0, 0, 'I', 'E', 'N', 'D', 0xAE, 0x42, 0x60, 0x82}; !bytes.Equal(iend, want) {
		t.Errorf("IEND chunk = % x, want % x", iend, want)
	}
}

func TestCheckStdlibPNG(t *testing.T) {
	b := stdPNG(t, testImage())
	// Every PNG ends with the empty IEND chunk and its CRC AE 42 60 82.
	if want := []byte{0, 0, 0, 0, 'I', 'E', 'N', 'D', 0xAE, 0x42, 0x60, 0x82}; !bytes.Equal(b[len(b)-12:], want) {
		t.Fatalf("image/png output ends % x, want % x", b[len(b)-12:], want)
	}
	f, err := Check(b)
	if f != PNG || err != nil {
		t.Fatalf("Check(image/png output) = %q, %v; want png, nil", f, err)
	}
}

func TestCheckStdlibJPEG(t *testing.T) {
	b := stdJPEG(t, testImage())
	if !bytes.Equal(b[:2], soi) || !bytes.Equal(b[len(b)-2:], eoi) {
		t.Fatalf("image/jpeg output starts % x and ends % x, want SOI and EOI", b[:2], b[len(b)-2:])
	}
	f, err := Check(b)
	if f != JPEG || err != nil {
		t.Fatalf("Check(image/jpeg output) = %q, %v; want jpeg, nil", f, err)
	}
}

func TestHandPNGDecodes(t *testing.T) {
	// An independent consumer, image/png, must accept the hand-built PNG and
	// see one grey pixel of value 0x80; otherwise the error cases below would
	// be built on a broken base.
	b := handPNG()
	if len(b) != 70 {
		t.Fatalf("len(handPNG) = %d, want 70", len(b))
	}
	m, err := png.Decode(bytes.NewReader(b))
	if err != nil {
		t.Fatalf("png.Decode(handPNG): %v", err)
	}
	if got := m.Bounds(); got != image.Rect(0, 0, 1, 1) {
		t.Fatalf("bounds = %v, want (0,0)-(1,1)", got)
	}
	if got, want := m.At(0, 0), (color.Gray{Y: 0x80}); got != want {
		t.Fatalf("pixel = %v, want %v", got, want)
	}
	f, err := Check(b)
	if f != PNG || err != nil {
		t.Fatalf("Check(handPNG) = %q, %v; want png, nil", f, err)
	}
}

func TestCheckPNGAccepts(t *testing.T) {
	withTrailer := cat(handPNG(), []byte("trailing bytes after IEND"))
	// Ancillary chunks with lower-case letters are valid (PNG spec §5.4).
	withText := cat(sig, ihdr1x1, chunk("tEXt", []byte("Software\x00hindcast")), idat1x1, iend)
	// Image data split over two IDAT chunks (PNG spec §5.6: multiple IDAT allowed).
	zdata := idat1x1[8 : len(idat1x1)-4]
	split := cat(sig, ihdr1x1, chunk("IDAT", zdata[:5]), chunk("IDAT", zdata[5:]), iend)
	for name, b := range map[string][]byte{"trailer after IEND": withTrailer, "tEXt chunk": withText, "split IDAT": split} {
		f, err := Check(b)
		if f != PNG || err != nil {
			t.Errorf("%s: Check = %q, %v; want png, nil", name, f, err)
		}
	}
}

func TestCheckPNGErrors(t *testing.T) {
	good := handPNG()
	flipped := bytes.Clone(good)
	flipped[33+8+8] ^= 0x01 // one bit of the pixel byte inside IDAT's data
	flippedCRCStored := binary.BigEndian.Uint32(flipped[33+8+13:])
	flippedCRCComputed := crcBitwise(flipped[33+4 : 33+8+13])

	hugeLen := bytes.Clone(good)
	binary.BigEndian.PutUint32(hugeLen[33:], 1<<31)

	badType := cat(sig, ihdr1x1, chunk("ID4T", idat1x1[8:len(idat1x1)-4]), iend)

	ihdr12 := chunk("IHDR", []byte{0, 0, 0, 1, 0, 0, 0, 1, 8, 0, 0, 0})

	lfSig := []byte{0x89, 'P', 'N', 'G', '\n', 0x1A, '\n', 0, 0, 0}

	cases := []struct {
		name string
		b    []byte
		is   error
		msg  string
	}{
		{"empty", nil, ErrTruncated, "truncated: no bytes"},
		// PNG spec §5.2: a GIF signature is not a PNG signature.
		{"GIF signature", []byte("GIF89a\x01\x00\x01\x00"), ErrUnknownSignature,
			"unknown signature: first bytes 47 49 46 38 39 61 01 00"},
		// PNG spec §5.2: CR LF in the signature detects newline conversion.
		{"signature after CRLF to LF", lfSig, ErrUnknownSignature,
			"unknown signature: first bytes 89 50 4e 47 0a 1a 0a 00"},
		{"signature prefix", good[:5], ErrTruncated, "png: truncated: 5 of the 8 signature bytes"},
		// PNG spec §5.3: CRC over type and data.
		{"flipped bit in IDAT", flipped, ErrCorrupt,
			fmt.Sprintf(`png: corrupt: bad CRC in chunk "IDAT" at offset 33: stored %08x, computed %08x`, flippedCRCStored, flippedCRCComputed)},
		// PNG spec §5.6: IEND must be present.
		{"missing IEND", good[:58], ErrTruncated, "png: truncated: missing IEND chunk (data ends at offset 58)"},
		{"cut in chunk header", good[:36], ErrTruncated, "png: truncated: chunk header at offset 33 has 3 of 8 bytes"},
		{"cut in IDAT", good[:50], ErrTruncated, `png: truncated: chunk "IDAT" at offset 33 needs 25 bytes, 17 left`},
		// PNG spec §5.6: IHDR first.
		{"first chunk not IHDR", cat(sig, idat1x1, iend), ErrCorrupt,
			`png: corrupt: first chunk is "IDAT" with length 13, want "IHDR" with length 13`},
		// PNG spec §11.2.2: IHDR holds 13 bytes.
		{"IHDR length 12", cat(sig, ihdr12, idat1x1, iend), ErrCorrupt,
			`png: corrupt: first chunk is "IHDR" with length 12, want "IHDR" with length 13`},
		{"second IHDR", cat(sig, ihdr1x1, ihdr1x1, idat1x1, iend), ErrCorrupt, "png: corrupt: second IHDR chunk at offset 33"},
		// PNG spec §11.2.5: IEND's data field is empty.
		{"IEND with data", cat(sig, ihdr1x1, idat1x1, chunk("IEND", []byte{0})), ErrCorrupt,
			"png: corrupt: IEND chunk at offset 58 has length 1, want 0"},
		// PNG spec §5.6: at least one IDAT.
		{"no IDAT", cat(sig, ihdr1x1, iend), ErrCorrupt, "png: corrupt: IEND at offset 33 before any IDAT chunk"},
		// PNG spec §5.4: chunk types are ASCII letters.
		{"digit in chunk type", badType, ErrCorrupt, "png: corrupt: chunk at offset 33 has type 49 44 34 54, not four ASCII letters"},
		// PNG spec §5.3: length at most 2^31-1.
		{"length 2^31", hugeLen, ErrCorrupt, "png: corrupt: chunk at offset 33 has length 2147483648, above 2^31-1"},
	}
	for _, c := range cases {
		f, err := Check(c.b)
		if f != "" || err == nil || !errors.Is(err, c.is) || err.Error() != c.msg {
			t.Errorf("%s: Check = %q, %v; want \"\", error %q wrapping %v", c.name, f, err, c.msg, c.is)
		}
	}
}

func TestCheckJPEGAccepts(t *testing.T) {
	withFill := cat(soi, []byte{0xFF, 0xFF}, sof0, sos, scanData, []byte{0xFF, 0xFF, 0xFF}, eoi)
	// TEM and RSTn are standalone markers without a length (T.81 §B.1.1.3).
	withStandalone := cat(soi, []byte{0xFF, 0x01, 0xFF, 0xD3}, sof0, sos, scanData, eoi)
	// An APP1 segment holding an embedded thumbnail with its own SOI and EOI:
	// the walk skips it by length (T.81 §B.1.1.4), its EOI ends nothing.
	thumb := []byte{0xFF, 0xE1, 0x00, 0x08, 0xFF, 0xD8, 0xFF, 0xD9, 0xFF, 0xD9}
	withThumb := cat(soi, thumb, sof0, sos, scanData, eoi)
	// Progressive-style: two scans in one frame, the first ended by the second SOS.
	twoScans := cat(soi, sof0, sos, scanData, sos, scanData, eoi)
	withTrailer := cat(handJPEG(), []byte{0x00, 0x00, 0xFF, 0xD8, 'x'})
	for name, b := range map[string][]byte{
		"hand-built":         handJPEG(),
		"fill bytes":         withFill,
		"TEM and RST":        withStandalone,
		"APP1 thumbnail":     withThumb,
		"two scans":          twoScans,
		"trailer after EOI":  withTrailer,
		"stdlib 2x2 quality": stdJPEG(t, testImage()),
	} {
		f, err := Check(b)
		if f != JPEG || err != nil {
			t.Errorf("%s: Check = %q, %v; want jpeg, nil", name, f, err)
		}
	}
}

func TestCheckJPEGErrors(t *testing.T) {
	good := handJPEG()
	if len(good) != 37 {
		t.Fatalf("len(handJPEG) = %d, want 37", len(good))
	}
	thumb := []byte{0xFF, 0xE1, 0x00, 0x08, 0xFF, 0xD8, 0xFF, 0xD9, 0xFF, 0xD9}
	sof0TwoComponents := bytes.Clone(sof0)
	sof0TwoComponents[9] = 2
	sosTwoComponents := bytes.Clone(sos)
	sosTwoComponents[4] = 2

	cases := []struct {
		name string
		b    []byte
		is   error
		msg  string
	}{
		{"SOI prefix", []byte{0xFF}, ErrTruncated, "jpeg: truncated: 1 of the 2 SOI bytes"},
		// T.81 §B.2.1: the image ends with EOI.
		{"missing EOI", good[:35], ErrTruncated, "jpeg: truncated: no EOI marker: entropy-coded data from offset 25 runs to the end"},
		{"missing EOI after segment", cat(soi, sof0), ErrTruncated, "jpeg: truncated: no EOI marker (data ends at offset 15)"},
		{"cut after FF in scan", good[:30], ErrTruncated, "jpeg: truncated: no EOI marker: entropy-coded data from offset 25 ends inside a marker"},
		{"cut after thumbnail", cat(soi, thumb), ErrTruncated, "jpeg: truncated: no EOI marker (data ends at offset 12)"},
		{"cut in fill bytes", cat(soi, []byte{0xFF, 0xFF}), ErrTruncated, "jpeg: truncated: data ends inside the marker at offset 2"},
		{"cut in length field", cat(soi, []byte{0xFF, 0xE0, 0x00}), ErrTruncated, "jpeg: truncated: segment FFE0 at offset 2 ends inside its length field"},
		// T.81 §B.1.1.4: the length covers the segment.
		{"segment past end", cat(soi, []byte{0xFF, 0xE1, 0x00, 0x10, 1, 2, 3, 4}), ErrTruncated,
			"jpeg: truncated: segment FFE1 at offset 2 has length 16, 6 bytes left"},
		{"length below 2", cat(soi, []byte{0xFF, 0xE0, 0x00, 0x01}, eoi), ErrCorrupt,
			"jpeg: corrupt: segment FFE0 at offset 2 has length 1, below 2"},
		// T.81 §B.1.1.5: FF 00 only inside entropy-coded data.
		{"stuffed byte outside scan", cat(soi, []byte{0xFF, 0x00}, eoi), ErrCorrupt,
			"jpeg: corrupt: stuffed byte FF 00 at offset 2 outside entropy-coded data"},
		{"no marker", cat(soi, []byte{0x00}, eoi), ErrCorrupt, "jpeg: corrupt: expected a marker at offset 2, found byte 00"},
		{"second SOI", cat(soi, soi, eoi), ErrCorrupt, "jpeg: corrupt: second SOI marker at offset 2"},
		// T.81 §B.2.1: a frame header precedes the scans.
		{"scan without frame", cat(soi, sos, scanData, eoi), ErrCorrupt, "jpeg: corrupt: scan at offset 2 before any frame header"},
		{"SOI EOI only", cat(soi, eoi), ErrCorrupt, "jpeg: corrupt: EOI at offset 2 before any scan"},
		{"frame without scan", cat(soi, sof0, eoi), ErrCorrupt, "jpeg: corrupt: EOI at offset 15 before any scan"},
		// T.81 §B.2.2: Lf = 8 + 3·Nf.
		{"frame header length", cat(soi, sof0TwoComponents, sos, scanData, eoi), ErrCorrupt,
			"jpeg: corrupt: frame header FFC0 at offset 2 has length 11, inconsistent with its component count"},
		// T.81 §B.2.3: Ls = 6 + 2·Ns.
		{"scan header length", cat(soi, sof0, sosTwoComponents, scanData, eoi), ErrCorrupt,
			"jpeg: corrupt: scan header at offset 15 has length 8, inconsistent with its component count"},
	}
	for _, c := range cases {
		f, err := Check(c.b)
		if f != "" || err == nil || !errors.Is(err, c.is) || err.Error() != c.msg {
			t.Errorf("%s: Check = %q, %v; want \"\", error %q wrapping %v", c.name, f, err, c.msg, c.is)
		}
	}
}

// TestEveryPrefixFails cuts valid images at every byte offset: each of the
// len(b) proper prefixes, from empty to one byte short, must fail as truncated.
func TestEveryPrefixFails(t *testing.T) {
	images := []struct {
		name string
		b    []byte
		f    Format
	}{
		{"hand-built PNG", handPNG(), PNG},
		{"image/png 2x2", stdPNG(t, testImage()), PNG},
		{"hand-built JPEG", handJPEG(), JPEG},
		{"image/jpeg 2x2", stdJPEG(t, testImage()), JPEG},
	}
	for _, im := range images {
		if f, err := Check(im.b); f != im.f || err != nil {
			t.Fatalf("%s: Check(whole) = %q, %v; want %q, nil", im.name, f, err, im.f)
		}
		failures := 0
		for n := range len(im.b) {
			f, err := Check(im.b[:n])
			switch {
			case err == nil:
				t.Errorf("%s: prefix of %d bytes accepted as %q", im.name, n, f)
			case !errors.Is(err, ErrTruncated):
				t.Errorf("%s: prefix of %d bytes: %v, want a truncated error", im.name, n, err)
			default:
				failures++
			}
		}
		if failures != len(im.b) {
			t.Errorf("%s: %d of %d prefixes failed as truncated, want all", im.name, failures, len(im.b))
		}
	}
}

func TestDecodeDataURI(t *testing.T) {
	pngBytes := stdPNG(t, testImage())
	cases := []struct {
		name, uri, mediaType string
		data                 []byte
	}{
		// RFC 2397 §4, first example; media type defaults per RFC 2397 §2.
		{"RFC 2397 brief note", "data:,A%20brief%20note", "text/plain;charset=US-ASCII", []byte("A brief note")},
		// RFC 2397 §4 Greek example with its invalid "%fg" escape removed.
		{"RFC 2397 charset", "data:text/plain;charset=iso-8859-7,%be%be", "text/plain;charset=iso-8859-7", []byte{0xBE, 0xBE}},
		// RFC 2397 §2: "text/plain" can be omitted but the charset supplied.
		{"charset shorthand", "data:;charset=utf-8,caf%C3%A9", "text/plain;charset=utf-8", []byte("café")},
		{"empty data", "data:,", "text/plain;charset=US-ASCII", []byte{}},
		// RFC 3986 §2.1: only %HH is special; '+' is not a space.
		{"plus kept", "data:,a+b", "text/plain;charset=US-ASCII", []byte("a+b")},
		{"base64 PNG round trip", "data:image/png;base64," + base64.StdEncoding.EncodeToString(pngBytes), "image/png", pngBytes},
		// RFC 2397 §3: parameters kept as written; ";base64" matched case-insensitively.
		{"parameters as written", "data:Image/PNG;Name=Frame%201.png;BASE64,QQ==", "Image/PNG;Name=Frame%201.png", []byte("A")},
		{"base64 no media type", "data:;base64,QUJD", "text/plain;charset=US-ASCII", []byte("ABC")},
		// RFC 4648 §4 padding stripped by some loggers: tolerated.
		{"missing padding 2", "data:text/plain;base64,QQ", "text/plain", []byte("A")},
		{"missing padding 1", "data:text/plain;base64,QUI", "text/plain", []byte("AB")},
		// RFC 2397 §3: data is urlchars, so base64 may itself be %-escaped.
		{"escaped base64", "data:;base64,QQ%3D%3D", "text/plain;charset=US-ASCII", []byte("A")},
		{"upper-case scheme", "DATA:,x", "text/plain;charset=US-ASCII", []byte("x")},
	}
	for _, c := range cases {
		mt, data, err := DecodeDataURI(c.uri)
		if err != nil || mt != c.mediaType || !bytes.Equal(data, c.data) {
			t.Errorf("%s: DecodeDataURI = %q, %q, %v; want %q, %q, nil", c.name, mt, data, err, c.mediaType, c.data)
		}
	}
	_, data, err := DecodeDataURI("data:image/png;base64," + base64.StdEncoding.EncodeToString(pngBytes))
	if f, cerr := Check(data); err != nil || f != PNG || cerr != nil {
		t.Errorf("base64 PNG: decode error %v, Check = %q, %v; want png, nil", err, f, cerr)
	}
}

func TestDecodeDataURIErrors(t *testing.T) {
	cases := []struct{ name, uri, msg string }{
		// RFC 2397 §4 prints "%fg", which is not a valid escape (RFC 3986
		// §2.1: two hex digits): rejected rather than guessed at.
		{"RFC 2397 %fg", "data:text/plain;charset=iso-8859-7,%be%fg%be", `malformed data URI: invalid percent escape "%fg" at offset 3`},
		{"incomplete escape", "data:,abc%4", `malformed data URI: incomplete percent escape "%4" at offset 3`},
		// RFC 4648 §4 alphabet.
		{"invalid base64 char", "data:;base64,QQ*A", "malformed data URI: base64 data: illegal base64 data at input byte 2"},
		{"short padding", "data:;base64,QQ=", "malformed data URI: base64 data: illegal base64 data at input byte 3"},
		{"lone base64 char", "data:;base64,QUJDR", "malformed data URI: base64 data: illegal base64 data at input byte 4"},
		// RFC 2397 §3: a comma separates the header from the data.
		{"missing comma", "data:text/plain;base64", "malformed data URI: no comma before the data"},
		{"not a data URI", "s3://bucket/frames/0001.png", `malformed data URI: scheme is not "data:"`},
		{"media type without subtype", "data:image,xx", `malformed data URI: media type "image" is not type/subtype`},
		{"parameter without value", "data:text/plain;foo,xx", `malformed data URI: media type parameter "foo" is not attribute=value`},
		{"empty parameter", "data:text/plain;,xx", `malformed data URI: media type parameter "" is not attribute=value`},
	}
	for _, c := range cases {
		mt, data, err := DecodeDataURI(c.uri)
		if err == nil || !errors.Is(err, ErrBadDataURI) || err.Error() != c.msg || mt != "" || data != nil {
			t.Errorf("%s: DecodeDataURI = %q, %q, %v; want error %q", c.name, mt, data, err, c.msg)
		}
	}
}

func TestIsDataURI(t *testing.T) {
	// RFC 3986 §3.1: schemes are case-insensitive.
	cases := map[string]bool{
		"data:,x":               true,
		"DATA:,x":               true,
		"Data:image/png;base64": true,
		"data:":                 true,
		"data":                  false,
		"":                      false,
		"xdata:,x":              false,
		" data:,x":              false,
		"frames/data:0001.png":  false,
		"file:///data:x":        false,
	}
	for s, want := range cases {
		if got := IsDataURI(s); got != want {
			t.Errorf("IsDataURI(%q) = %v, want %v", s, got, want)
		}
	}
}

// FuzzCheck asserts Check never panics, returns a format only without an
// error, and only names the format its signature announces.
func FuzzCheck(f *testing.F) {
	f.Add(handPNG())
	f.Add(handJPEG())
	f.Add(stdJPEG(f, testImage()))
	f.Add(stdPNG(f, testImage()))
	f.Fuzz(func(t *testing.T, b []byte) {
		fm, err := Check(b)
		if err != nil {
			if fm != "" {
				t.Fatalf("Check returned format %q with error %v", fm, err)
			}
			return
		}
		switch {
		case fm == PNG && !bytes.HasPrefix(b, sig), fm == JPEG && !bytes.HasPrefix(b, soi), fm != PNG && fm != JPEG:
			t.Fatalf("Check(% x) = %q", b[:min(len(b), 8)], fm)
		}
	})
}

// noiseImage is a w×h image of pseudo-random pixels, which PNG cannot
// compress, so the encoded size is close to 4·w·h bytes.
func noiseImage(w, h int) image.Image {
	r := rand.New(rand.NewPCG(1, 2))
	m := image.NewNRGBA(image.Rect(0, 0, w, h))
	for i := range m.Pix {
		m.Pix[i] = byte(r.Uint32())
	}
	return m
}

func BenchmarkCheckPNG(b *testing.B) {
	data := stdPNG(b, noiseImage(112, 112)) // about 50 KB
	b.SetBytes(int64(len(data)))
	for b.Loop() {
		if _, err := Check(data); err != nil {
			b.Fatal(err)
		}
	}
	// Reported after the loop: b.Loop resets the timer, which drops metrics.
	b.ReportMetric(float64(len(data)), "image-bytes")
}

func BenchmarkCheckJPEG(b *testing.B) {
	data := stdJPEG(b, noiseImage(160, 160))
	b.SetBytes(int64(len(data)))
	for b.Loop() {
		if _, err := Check(data); err != nil {
			b.Fatal(err)
		}
	}
	// Reported after the loop: b.Loop resets the timer, which drops metrics.
	b.ReportMetric(float64(len(data)), "image-bytes")
}
