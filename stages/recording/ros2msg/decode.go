package ros2msg

import (
	"encoding/binary"
	"fmt"
	"math"
)

// Encapsulation ids (byte 1 of the 4-byte header; byte 0 is 0), from the OMG
// DDS-XTypes 1.3 specification, 7.6.2.1.2 (as listed in the source of npm
// @foxglove/cdr, EncapsulationKind).
const (
	encCDRBE  = 0x00 // plain CDR (XCDR1), big-endian
	encCDRLE  = 0x01 // plain CDR (XCDR1), little-endian
	encCDR2BE = 0x06 // plain CDR2 (XCDR2, FINAL), big-endian
	encCDR2LE = 0x07 // plain CDR2 (XCDR2, FINAL), little-endian
)

// headerLen is the encapsulation header; alignment counts from after it.
const headerLen = 4

type decoder struct {
	b    []byte
	off  int
	big  bool
	max8 int // alignment of 8-byte values: 8 in XCDR1, 4 in XCDR2
}

func (s *Schema) decode(p []byte) (map[string]any, error) {
	if len(p) < headerLen {
		return nil, fmt.Errorf("decode %s: payload of %d bytes has no 4-byte encapsulation header", s.Name, len(p))
	}
	d := decoder{b: p, off: headerLen, max8: 8}
	if p[0] != 0 {
		return nil, fmt.Errorf("decode %s: encapsulation 0x%02x%02x: %w", s.Name, p[0], p[1], ErrUnsupported)
	}
	switch p[1] {
	case encCDRBE:
		d.big = true
	case encCDRLE:
	case encCDR2BE, encCDR2LE:
		if !s.cdr2 {
			return nil, fmt.Errorf("decode %s: XCDR2 payload of a type with arrays of strings or messages (their delimiter headers differ between DDS implementations): %w", s.Name, ErrUnsupported)
		}
		d.big = p[1] == encCDR2BE
		d.max8 = 4
	default:
		return nil, fmt.Errorf("decode %s: encapsulation 0x%02x%02x (only plain CDR 0x0000/0x0001 and plain CDR2 0x0006/0x0007): %w", s.Name, p[0], p[1], ErrUnsupported)
	}
	if s.wstring {
		return nil, fmt.Errorf("decode %s: a wstring field (its CDR form is implementation-defined): %w", s.Name, ErrUnsupported)
	}
	m, err := d.message(s.root)
	if err != nil {
		return nil, fmt.Errorf("decode %s: %w", s.Name, err)
	}
	return m, nil
}

// shortError reports a payload that ends before what the schema asks.
type shortError struct {
	at, need, have int
}

func (e *shortError) Error() string {
	return fmt.Sprintf("payload ends at byte %d, %d more needed (%d left)", e.at, e.need, e.have)
}

// fieldError names the field path where decoding stopped.
type fieldError struct {
	path string
	err  error
}

func (e *fieldError) Error() string { return "field " + e.path + ": " + e.err.Error() }
func (e *fieldError) Unwrap() error { return e.err }

func inField(name string, err error) error {
	if fe, ok := err.(*fieldError); ok {
		sep := "."
		if fe.path[0] == '[' {
			sep = ""
		}
		return &fieldError{path: name + sep + fe.path, err: fe.err}
	}
	return &fieldError{path: name, err: err}
}

// align skips padding so that the next value of size n sits at a multiple of
// n (at most max8) counted from the end of the header.
func (d *decoder) align(n int) {
	if n > d.max8 {
		n = d.max8
	}
	if pad := (d.off - headerLen) & (n - 1); pad != 0 {
		d.off += n - pad
	}
}

// need checks that n bytes are left.
func (d *decoder) need(n int) error {
	if d.off > len(d.b) || n > len(d.b)-d.off {
		have := len(d.b) - d.off
		if have < 0 {
			have = 0
		}
		return &shortError{at: min(d.off, len(d.b)), need: n, have: have}
	}
	return nil
}

func (d *decoder) u16() uint16 {
	p := d.b[d.off : d.off+2]
	d.off += 2
	if d.big {
		return binary.BigEndian.Uint16(p)
	}
	return binary.LittleEndian.Uint16(p)
}

func (d *decoder) u32() uint32 {
	p := d.b[d.off : d.off+4]
	d.off += 4
	if d.big {
		return binary.BigEndian.Uint32(p)
	}
	return binary.LittleEndian.Uint32(p)
}

func (d *decoder) u64() uint64 {
	p := d.b[d.off : d.off+8]
	d.off += 8
	if d.big {
		return binary.BigEndian.Uint64(p)
	}
	return binary.LittleEndian.Uint64(p)
}

// length reads a uint32 count or string length, as an int that stays
// positive on 32-bit platforms too (a count beyond MaxInt32 cannot fit in
// any payload, so clamping it keeps it an error).
func (d *decoder) length() int {
	u := d.u32()
	if u > math.MaxInt32 {
		return math.MaxInt32
	}
	return int(u)
}

// count reads a sequence count and checks that count elements of at least
// elemMin bytes each fit in what is left, before anything is allocated.
func (d *decoder) count(elemMin int) (int, error) {
	d.align(4)
	if err := d.need(4); err != nil {
		return 0, err
	}
	n := d.length()
	if err := d.fits(n, elemMin); err != nil {
		return 0, err
	}
	return n, nil
}

func (d *decoder) fits(n, elemMin int) error {
	left := len(d.b) - d.off
	if left < 0 {
		left = 0
	}
	if n > 0 && n > left/elemMin {
		return fmt.Errorf("%d elements of at least %d bytes do not fit in the %d bytes left", n, elemMin, left)
	}
	return nil
}

func (d *decoder) message(t *msgType) (map[string]any, error) {
	m := make(map[string]any, len(t.fields))
	if len(t.fields) == 0 {
		if err := d.need(1); err != nil {
			return nil, err
		}
		d.off++
		return m, nil
	}
	for i := range t.fields {
		f := &t.fields[i]
		var v any
		var err error
		switch f.arr {
		case single:
			v, err = d.single(f)
		case fixed:
			v, err = d.array(f, f.n)
		default:
			var n int
			if n, err = d.count(f.elemMin()); err == nil {
				if f.n > 0 && n > f.n {
					err = fmt.Errorf("%d elements in a sequence bounded to %d", n, f.n)
				} else {
					v, err = d.array(f, n)
				}
			}
		}
		if err != nil {
			return nil, inField(f.name, err)
		}
		m[f.name] = v
	}
	return m, nil
}

// elemMin is the smallest wire size of one element of f.
func (f *field) elemMin() int {
	switch f.kind {
	case kMessage:
		return f.msg.minSize
	case kString, kWString:
		return 4
	}
	return f.kind.size()
}

func (d *decoder) single(f *field) (any, error) {
	switch f.kind {
	case kMessage:
		return d.message(f.msg)
	case kString:
		return d.str(f.strN)
	}
	sz := f.kind.size()
	d.align(sz)
	if err := d.need(sz); err != nil {
		return nil, err
	}
	switch f.kind {
	case kBool:
		d.off++
		return d.b[d.off-1] != 0, nil
	case kInt8:
		d.off++
		return int64(int8(d.b[d.off-1])), nil
	case kUint8, kChar:
		d.off++
		return uint64(d.b[d.off-1]), nil
	case kInt16:
		return int64(int16(d.u16())), nil
	case kUint16:
		return uint64(d.u16()), nil
	case kInt32:
		return int64(int32(d.u32())), nil
	case kUint32:
		return uint64(d.u32()), nil
	case kInt64:
		return int64(d.u64()), nil
	case kUint64:
		return d.u64(), nil
	case kFloat32:
		return float64(math.Float32frombits(d.u32())), nil
	case kFloat64:
		return math.Float64frombits(d.u64()), nil
	}
	return nil, fmt.Errorf("type %s: %w", f.ftype, ErrUnsupported)
}

// str reads a string: a uint32 length counting the terminating NUL, then the
// bytes. A length of 0 (written by some implementations for "") is accepted.
// A string longer than its bound (bound > 0) is an error, as a sequence
// longer than its bound is: a conforming writer never sends one, and Encode
// refuses to write one.
func (d *decoder) str(bound int) (string, error) {
	lo, err := d.strSpan(bound)
	if err != nil {
		return "", err
	}
	p := d.b[lo:d.off]
	if k := len(p); k > 0 && p[k-1] == 0 {
		p = p[:k-1]
	}
	return string(p), nil
}

// array reads n elements of f's type into the typed slice of the value model.
func (d *decoder) array(f *field, n int) (any, error) {
	if err := d.fits(n, f.elemMin()); err != nil {
		return nil, err
	}
	switch f.kind {
	case kMessage:
		out := make([]any, n)
		for i := range out {
			m, err := d.message(f.msg)
			if err != nil {
				return nil, inField(fmt.Sprintf("[%d]", i), err)
			}
			out[i] = m
		}
		return out, nil
	case kString:
		return d.strings(n, f.strN)
	}
	sz := f.kind.size()
	if n > 0 {
		d.align(sz)
	}
	if err := d.need(n * sz); err != nil {
		return nil, err
	}
	switch f.kind {
	case kUint8:
		p := d.b[d.off : d.off+n : d.off+n]
		d.off += n
		return p, nil
	case kBool:
		out := make([]bool, n)
		for i := range out {
			out[i] = d.b[d.off+i] != 0
		}
		d.off += n
		return out, nil
	case kInt8:
		out := make([]int64, n)
		for i := range out {
			out[i] = int64(int8(d.b[d.off+i]))
		}
		d.off += n
		return out, nil
	case kChar:
		out := make([]uint64, n)
		for i := range out {
			out[i] = uint64(d.b[d.off+i])
		}
		d.off += n
		return out, nil
	case kInt16:
		out := make([]int64, n)
		for i := range out {
			out[i] = int64(int16(d.u16()))
		}
		return out, nil
	case kUint16:
		out := make([]uint64, n)
		for i := range out {
			out[i] = uint64(d.u16())
		}
		return out, nil
	case kInt32:
		out := make([]int64, n)
		for i := range out {
			out[i] = int64(int32(d.u32()))
		}
		return out, nil
	case kUint32:
		out := make([]uint64, n)
		for i := range out {
			out[i] = uint64(d.u32())
		}
		return out, nil
	case kInt64:
		out := make([]int64, n)
		for i := range out {
			out[i] = int64(d.u64())
		}
		return out, nil
	case kUint64:
		out := make([]uint64, n)
		for i := range out {
			out[i] = d.u64()
		}
		return out, nil
	case kFloat32:
		out := make([]float64, n)
		p := d.b[d.off : d.off+4*n]
		d.off += 4 * n
		if d.big {
			for i := range out {
				out[i] = float64(math.Float32frombits(binary.BigEndian.Uint32(p[4*i:])))
			}
		} else {
			for i := range out {
				out[i] = float64(math.Float32frombits(binary.LittleEndian.Uint32(p[4*i:])))
			}
		}
		return out, nil
	case kFloat64:
		out := make([]float64, n)
		p := d.b[d.off : d.off+8*n]
		d.off += 8 * n
		if d.big {
			for i := range out {
				out[i] = math.Float64frombits(binary.BigEndian.Uint64(p[8*i:]))
			}
		} else {
			for i := range out {
				out[i] = math.Float64frombits(binary.LittleEndian.Uint64(p[8*i:]))
			}
		}
		return out, nil
	}
	return nil, fmt.Errorf("type %s: %w", f.ftype, ErrUnsupported)
}

// strings reads n strings with one allocation for all their bytes: a first
// walk checks them and finds where they end, then one Go string is made of
// the whole stretch (lengths and padding included) and each element is a
// substring of it.
func (d *decoder) strings(n, bound int) ([]string, error) {
	start := d.off
	for i := range n {
		if _, err := d.strSpan(bound); err != nil {
			return nil, fmt.Errorf("[%d]: %w", i, err)
		}
	}
	whole := string(d.b[start:d.off])
	d.off = start
	out := make([]string, n)
	for i := range out {
		lo, _ := d.strSpan(bound)
		out[i] = whole[lo-start : d.off-start]
		if k := len(out[i]); k > 0 && out[i][k-1] == 0 {
			out[i] = out[i][:k-1]
		}
	}
	return out, nil
}

// strSpan steps over one string and returns where its bytes begin.
func (d *decoder) strSpan(bound int) (int, error) {
	d.align(4)
	if err := d.need(4); err != nil {
		return 0, err
	}
	n := d.length()
	if err := d.need(n); err != nil {
		return 0, err
	}
	lo := d.off
	d.off += n
	k := n
	if k > 0 && d.b[d.off-1] == 0 {
		k--
	}
	if bound > 0 && k > bound {
		return 0, fmt.Errorf("string of %d bytes longer than its bound %d", k, bound)
	}
	return lo, nil
}
