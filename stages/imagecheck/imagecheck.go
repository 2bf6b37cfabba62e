// Package imagecheck decides whether a camera frame's bytes are a complete PNG
// or JPEG image, and decodes RFC 2397 data: URIs that carry such bytes inline.
//
// The ingest stage drops a frame as image_corrupt when its image is not a
// complete PNG or JPEG (SPEC §3.1). Check runs on every frame's image, so it
// only walks the container structure (PNG chunks with their CRCs, JPEG marker
// segments and the entropy-coded data between them); it never decompresses or
// decodes pixels. That is enough to catch what fleet logs actually suffer
// from: uploads cut short, bit rot, and bytes that were never an image.
package imagecheck

import (
	"bytes"
	"encoding/base64"
	"encoding/binary"
	"errors"
	"fmt"
	"hash/crc32"
	"strings"
)

// Format names a recognised image format.
type Format string

// The formats Check recognises.
const (
	PNG  Format = "png"
	JPEG Format = "jpeg"
)

// Errors returned by Check and DecodeDataURI wrap one of these, so a caller can
// tell "the upload was cut short" from "the bytes are damaged" without parsing
// messages; the message itself says what and where.
var (
	// ErrUnknownSignature: the bytes start like neither a PNG nor a JPEG.
	ErrUnknownSignature = errors.New("unknown signature")
	// ErrTruncated: the bytes end before the image is complete.
	ErrTruncated = errors.New("truncated")
	// ErrCorrupt: the structure is broken (bad CRC, bad chunk or segment,
	// chunks or markers in an impossible order).
	ErrCorrupt = errors.New("corrupt")
	// ErrBadDataURI: the string is not a well-formed RFC 2397 data URI.
	ErrBadDataURI = errors.New("malformed data URI")
)

// pngSignature is the fixed 8-byte PNG file signature (PNG spec §5.2).
const pngSignature = "\x89PNG\r\n\x1a\n"

// Check reports the format of b when b is a complete PNG or JPEG image, and an
// error saying what is wrong otherwise (unknown signature, truncated chunk, bad
// CRC in chunk "IDAT", missing IEND, no JPEG end marker, ...).
//
// A prefix of a valid image always fails with ErrTruncated, whatever the cut
// point, so an upload cut short is never mistaken for a damaged one.
func Check(b []byte) (Format, error) {
	switch {
	case len(b) == 0:
		return "", fmt.Errorf("%w: no bytes", ErrTruncated)
	case len(b) >= len(pngSignature) && string(b[:len(pngSignature)]) == pngSignature:
		if err := checkPNG(b); err != nil {
			return "", err
		}
		return PNG, nil
	case len(b) < len(pngSignature) && string(b) == pngSignature[:len(b)]:
		return "", fmt.Errorf("png: %w: %d of the 8 signature bytes", ErrTruncated, len(b))
	case len(b) >= 2 && b[0] == 0xFF && b[1] == 0xD8:
		if err := checkJPEG(b); err != nil {
			return "", err
		}
		return JPEG, nil
	case len(b) == 1 && b[0] == 0xFF:
		return "", fmt.Errorf("jpeg: %w: 1 of the 2 SOI bytes", ErrTruncated)
	}
	n := min(len(b), 8)
	return "", fmt.Errorf("%w: first bytes % x", ErrUnknownSignature, b[:n])
}

// pngMaxChunkLength is the largest chunk length the PNG spec allows (§5.3:
// "restricted to 2^31-1 bytes").
const pngMaxChunkLength = 1<<31 - 1

// checkPNG walks the chunks after the signature (PNG spec §5.3, §5.6): every
// chunk up to and including IEND must be complete with a correct CRC, IHDR must
// come first (length 13) and only once, at least one IDAT must precede IEND, and
// IEND must be empty.
func checkPNG(b []byte) error {
	off := len(pngSignature)
	sawIDAT := false
	for first := true; ; first = false {
		left := len(b) - off
		if left == 0 {
			return fmt.Errorf("png: %w: missing IEND chunk (data ends at offset %d)", ErrTruncated, off)
		}
		if left < 8 {
			return fmt.Errorf("png: %w: chunk header at offset %d has %d of 8 bytes", ErrTruncated, off, left)
		}
		length := binary.BigEndian.Uint32(b[off:])
		typ := b[off+4 : off+8]
		if length > pngMaxChunkLength {
			return fmt.Errorf("png: %w: chunk at offset %d has length %d, above 2^31-1", ErrCorrupt, off, length)
		}
		if !isChunkType(typ) {
			return fmt.Errorf("png: %w: chunk at offset %d has type % x, not four ASCII letters", ErrCorrupt, off, typ)
		}
		name := string(typ)
		switch {
		case first && (name != "IHDR" || length != 13):
			return fmt.Errorf("png: %w: first chunk is %q with length %d, want \"IHDR\" with length 13", ErrCorrupt, name, length)
		case !first && name == "IHDR":
			return fmt.Errorf("png: %w: second IHDR chunk at offset %d", ErrCorrupt, off)
		}
		// Compare in int64 so a huge length cannot overflow on 32-bit platforms.
		if need := 12 + int64(length); need > int64(left) {
			return fmt.Errorf("png: %w: chunk %q at offset %d needs %d bytes, %d left", ErrTruncated, name, off, need, left)
		}
		end := off + 8 + int(length)
		stored := binary.BigEndian.Uint32(b[end:])
		// The CRC covers the type and data fields, not the length (PNG spec §5.3).
		if sum := crc32.Update(0, crc32.IEEETable, b[off+4:end]); sum != stored {
			return fmt.Errorf("png: %w: bad CRC in chunk %q at offset %d: stored %08x, computed %08x", ErrCorrupt, name, off, stored, sum)
		}
		switch name {
		case "IDAT":
			sawIDAT = true
		case "IEND":
			if length != 0 {
				return fmt.Errorf("png: %w: IEND chunk at offset %d has length %d, want 0", ErrCorrupt, off, length)
			}
			if !sawIDAT {
				return fmt.Errorf("png: %w: IEND at offset %d before any IDAT chunk", ErrCorrupt, off)
			}
			// Bytes after IEND are tolerated: decoders stop at IEND, and some
			// writers pad files or append trailers after it (common practice).
			return nil
		}
		off = end + 4
	}
}

// isChunkType reports whether t is a valid chunk type: four ASCII letters
// (PNG spec §5.4).
func isChunkType(t []byte) bool {
	for _, c := range t {
		if !('A' <= c && c <= 'Z' || 'a' <= c && c <= 'z') {
			return false
		}
	}
	return true
}

// JPEG marker codes (ITU-T T.81 Table B.1).
const (
	jpegTEM  = 0x01
	jpegRST0 = 0xD0
	jpegRST7 = 0xD7
	jpegSOI  = 0xD8
	jpegEOI  = 0xD9
	jpegSOS  = 0xDA
)

// isSOF reports whether m is a start-of-frame marker: C0–CF except DHT (C4),
// JPG (C8) and DAC (CC) (ITU-T T.81 Table B.1).
func isSOF(m byte) bool {
	return 0xC0 <= m && m <= 0xCF && m != 0xC4 && m != 0xC8 && m != 0xCC
}

// checkJPEG walks the marker segments after SOI (ITU-T T.81 Annex B): each
// segment must be complete, a frame header (SOFn) must precede the first scan
// (SOS), and the image is complete only when EOI is reached after at least one
// scan. A frame with tables but no scan holds no pixels, so it is not an image.
func checkJPEG(b []byte) error {
	pos := 2 // after SOI
	sawFrame, sawScan := false, false
	for {
		if pos >= len(b) {
			return fmt.Errorf("jpeg: %w: no EOI marker (data ends at offset %d)", ErrTruncated, pos)
		}
		if b[pos] != 0xFF {
			return fmt.Errorf("jpeg: %w: expected a marker at offset %d, found byte %02x", ErrCorrupt, pos, b[pos])
		}
		// Any number of fill bytes FF may precede a marker (T.81 §B.1.1.2).
		at := pos
		for pos < len(b) && b[pos] == 0xFF {
			pos++
		}
		if pos >= len(b) {
			return fmt.Errorf("jpeg: %w: data ends inside the marker at offset %d", ErrTruncated, at)
		}
		m := b[pos]
		pos++
		switch {
		case m == jpegEOI:
			if !sawScan {
				return fmt.Errorf("jpeg: %w: EOI at offset %d before any scan", ErrCorrupt, at)
			}
			// Bytes after EOI are tolerated: decoders stop at EOI, and cameras
			// and editors append data there (vendor trailers, MPF secondary
			// images, zero padding) — common practice.
			return nil
		case m == jpegSOI:
			return fmt.Errorf("jpeg: %w: second SOI marker at offset %d", ErrCorrupt, at)
		case m == 0x00:
			return fmt.Errorf("jpeg: %w: stuffed byte FF 00 at offset %d outside entropy-coded data", ErrCorrupt, at)
		case jpegRST0 <= m && m <= jpegRST7, m == jpegTEM:
			continue // standalone markers carry no length (T.81 §B.1.1.3)
		}
		if len(b)-pos < 2 {
			return fmt.Errorf("jpeg: %w: segment FF%02X at offset %d ends inside its length field", ErrTruncated, m, at)
		}
		// The length counts its own two bytes (T.81 §B.1.1.4).
		length := int(binary.BigEndian.Uint16(b[pos:]))
		if length < 2 {
			return fmt.Errorf("jpeg: %w: segment FF%02X at offset %d has length %d, below 2", ErrCorrupt, m, at, length)
		}
		if left := len(b) - pos; length > left {
			return fmt.Errorf("jpeg: %w: segment FF%02X at offset %d has length %d, %d bytes left", ErrTruncated, m, at, length, left)
		}
		seg := b[pos+2 : pos+length]
		pos += length
		switch {
		case isSOF(m):
			// Frame header: P, Y, X, Nf, then 3 bytes per component (T.81 §B.2.2).
			if len(seg) < 6 || len(seg) != 6+3*int(seg[5]) {
				return fmt.Errorf("jpeg: %w: frame header FF%02X at offset %d has length %d, inconsistent with its component count", ErrCorrupt, m, at, length)
			}
			sawFrame = true
		case m == jpegSOS:
			// Scan header: Ns, 2 bytes per component, Ss, Se, Ah/Al (T.81 §B.2.3).
			if len(seg) < 1 || len(seg) != 4+2*int(seg[0]) {
				return fmt.Errorf("jpeg: %w: scan header at offset %d has length %d, inconsistent with its component count", ErrCorrupt, at, length)
			}
			if !sawFrame {
				return fmt.Errorf("jpeg: %w: scan at offset %d before any frame header", ErrCorrupt, at)
			}
			sawScan = true
			var err error
			if pos, err = skipEntropyCoded(b, pos); err != nil {
				return err
			}
		}
	}
}

// skipEntropyCoded returns the offset of the marker that ends the
// entropy-coded data starting at pos (T.81 §B.1.1.5): inside it, FF 00 is a
// stuffed data byte FF and FF D0–D7 are restart markers; any other marker,
// possibly after fill bytes, ends the scan. The returned offset is that of the
// first FF, so the caller sees the fill bytes and the marker.
func skipEntropyCoded(b []byte, pos int) (int, error) {
	start := pos
	for {
		i := bytes.IndexByte(b[pos:], 0xFF)
		if i < 0 {
			return 0, fmt.Errorf("jpeg: %w: no EOI marker: entropy-coded data from offset %d runs to the end", ErrTruncated, start)
		}
		ff := pos + i
		q := ff + 1
		for q < len(b) && b[q] == 0xFF {
			q++
		}
		if q >= len(b) {
			return 0, fmt.Errorf("jpeg: %w: no EOI marker: entropy-coded data from offset %d ends inside a marker", ErrTruncated, start)
		}
		if m := b[q]; m == 0x00 || jpegRST0 <= m && m <= jpegRST7 {
			pos = q + 1
			continue
		}
		return ff, nil
	}
}

// defaultMediaType is the media type of a data URI that omits it (RFC 2397 §2).
const defaultMediaType = "text/plain;charset=US-ASCII"

// IsDataURI reports whether s starts with the "data:" scheme (case-insensitive, RFC 3986 §3.1).
func IsDataURI(s string) bool {
	return len(s) >= 5 && strings.EqualFold(s[:5], "data:")
}

// DecodeDataURI decodes an RFC 2397 data URI, "data:[<mediatype>][;base64],<data>",
// returning the media type (default "text/plain;charset=US-ASCII" per RFC 2397 §2 when omitted) and the bytes.
// Non-base64 data is percent-decoded (RFC 3986 §2.1). Malformed URIs return an error.
//
// Media type parameters are kept as written. When only parameters are given
// ("data:;charset=utf-8,…"), the type is "text/plain" (RFC 2397 §2 shorthand).
// Base64 data is percent-decoded too before base64 decoding, because RFC 2397
// §3 defines data as URL characters, which include %-escapes; standard base64
// with padding is expected, but missing padding is tolerated because some
// loggers strip it.
func DecodeDataURI(s string) (mediaType string, data []byte, err error) {
	if !IsDataURI(s) {
		return "", nil, fmt.Errorf("%w: scheme is not \"data:\"", ErrBadDataURI)
	}
	rest := s[len("data:"):]
	comma := strings.IndexByte(rest, ',')
	if comma < 0 {
		return "", nil, fmt.Errorf("%w: no comma before the data", ErrBadDataURI)
	}
	meta, payload := rest[:comma], rest[comma+1:]
	isBase64 := false
	if i := strings.LastIndexByte(meta, ';'); i >= 0 && strings.EqualFold(meta[i+1:], "base64") {
		isBase64 = true
		meta = meta[:i]
	}
	if mediaType, err = resolveMediaType(meta); err != nil {
		return "", nil, err
	}
	if !isBase64 {
		if data, err = percentDecode(payload); err != nil {
			return "", nil, err
		}
		return mediaType, data, nil
	}
	enc := payload
	if strings.IndexByte(enc, '%') >= 0 {
		raw, err := percentDecode(enc)
		if err != nil {
			return "", nil, err
		}
		enc = string(raw)
	}
	if data, err = base64.StdEncoding.DecodeString(enc); err == nil {
		return mediaType, data, nil
	}
	// Without any '=' the data may just have lost its padding; with '=', the
	// padded decoder's complaint is the one that describes the problem.
	if strings.IndexByte(enc, '=') < 0 {
		if data, err = base64.RawStdEncoding.DecodeString(enc); err == nil {
			return mediaType, data, nil
		}
	}
	return "", nil, fmt.Errorf("%w: base64 data: %w", ErrBadDataURI, err)
}

// resolveMediaType validates the media type of a data URI, "type/subtype"
// followed by ";attribute=value" parameters (RFC 2397 §3, RFC 2045 §5.1), and
// applies the RFC 2397 §2 defaults.
func resolveMediaType(meta string) (string, error) {
	if meta == "" {
		return defaultMediaType, nil
	}
	typ, params, hasParams := strings.Cut(meta, ";")
	if typ == "" {
		meta = "text/plain" + meta
	} else {
		top, sub, ok := strings.Cut(typ, "/")
		if !ok || !isToken(top) || !isToken(sub) {
			return "", fmt.Errorf("%w: media type %q is not type/subtype", ErrBadDataURI, typ)
		}
	}
	if hasParams {
		for p := range strings.SplitSeq(params, ";") {
			attr, _, ok := strings.Cut(p, "=")
			if !ok || !isToken(attr) {
				return "", fmt.Errorf("%w: media type parameter %q is not attribute=value", ErrBadDataURI, p)
			}
		}
	}
	return meta, nil
}

// isToken reports whether s is a non-empty RFC 2045 §5.1 token: ASCII without
// space, controls or tspecials.
func isToken(s string) bool {
	if s == "" {
		return false
	}
	for i := 0; i < len(s); i++ {
		c := s[i]
		if c <= ' ' || c >= 0x7F || strings.IndexByte(`()<>@,;:\"/[]?=`, c) >= 0 {
			return false
		}
	}
	return true
}

// percentDecode replaces each "%HH" with the byte it encodes (RFC 3986 §2.1)
// and keeps every other byte; a '%' not followed by two hex digits is an error.
func percentDecode(s string) ([]byte, error) {
	out := make([]byte, 0, len(s))
	for i := 0; i < len(s); i++ {
		if s[i] != '%' {
			out = append(out, s[i])
			continue
		}
		if i+2 >= len(s) {
			return nil, fmt.Errorf("%w: incomplete percent escape %q at offset %d", ErrBadDataURI, s[i:], i)
		}
		hi, ok1 := unhex(s[i+1])
		lo, ok2 := unhex(s[i+2])
		if !ok1 || !ok2 {
			return nil, fmt.Errorf("%w: invalid percent escape %q at offset %d", ErrBadDataURI, s[i:i+3], i)
		}
		out = append(out, hi<<4|lo)
		i += 2
	}
	return out, nil
}

// unhex returns the value of hex digit c.
func unhex(c byte) (byte, bool) {
	switch {
	case '0' <= c && c <= '9':
		return c - '0', true
	case 'a' <= c && c <= 'f':
		return c - 'a' + 10, true
	case 'A' <= c && c <= 'F':
		return c - 'A' + 10, true
	}
	return 0, false
}
