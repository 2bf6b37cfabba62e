package ros2msg

import (
	"encoding/binary"
	"fmt"
	"math"
	"reflect"
)

// encoder writes plain CDR (XCDR1): the demo and bench fleets' recordings and
// the round-trip tests need no other encapsulation.
type encoder struct {
	b   []byte
	big bool
}

func (s *Schema) encode(v map[string]any, bigEndian bool) ([]byte, error) {
	if s.wstring {
		return nil, fmt.Errorf("encode %s: a wstring field (its CDR form is implementation-defined): %w", s.Name, ErrUnsupported)
	}
	e := encoder{b: make([]byte, headerLen, 64), big: bigEndian}
	if bigEndian {
		e.b[1] = encCDRBE
	} else {
		e.b[1] = encCDRLE
	}
	if err := e.message(s.root, v); err != nil {
		return nil, fmt.Errorf("encode %s: %w", s.Name, err)
	}
	return e.b, nil
}

func (e *encoder) align(n int) {
	if pad := (len(e.b) - headerLen) & (n - 1); pad != 0 {
		for range n - pad {
			e.b = append(e.b, 0)
		}
	}
}

func (e *encoder) u16(x uint16) {
	e.align(2)
	if e.big {
		e.b = binary.BigEndian.AppendUint16(e.b, x)
	} else {
		e.b = binary.LittleEndian.AppendUint16(e.b, x)
	}
}

func (e *encoder) u32(x uint32) {
	e.align(4)
	if e.big {
		e.b = binary.BigEndian.AppendUint32(e.b, x)
	} else {
		e.b = binary.LittleEndian.AppendUint32(e.b, x)
	}
}

func (e *encoder) u64(x uint64) {
	e.align(8)
	if e.big {
		e.b = binary.BigEndian.AppendUint64(e.b, x)
	} else {
		e.b = binary.LittleEndian.AppendUint64(e.b, x)
	}
}

func (e *encoder) message(t *msgType, v map[string]any) error {
	if len(t.fields) == 0 {
		e.b = append(e.b, 0)
		return nil
	}
	for i := range t.fields {
		f := &t.fields[i]
		var err error
		if f.arr == single {
			err = e.single(f, v[f.name])
		} else {
			err = e.array(f, v[f.name])
		}
		if err != nil {
			return inField(f.name, err)
		}
	}
	return nil
}

func (e *encoder) single(f *field, x any) error {
	switch f.kind {
	case kMessage:
		m, ok := x.(map[string]any)
		if !ok && x != nil {
			return fmt.Errorf("want a message (map[string]any) for %s, got %T", f.ftype, x)
		}
		return e.message(f.msg, m)
	case kString:
		return e.str(f, x)
	case kBool:
		b, ok := x.(bool)
		if !ok && x != nil {
			return fmt.Errorf("want a bool, got %T", x)
		}
		if b {
			e.b = append(e.b, 1)
		} else {
			e.b = append(e.b, 0)
		}
		return nil
	case kFloat32:
		fl, err := toFloat(x)
		if err != nil {
			return err
		}
		e.u32(math.Float32bits(float32(fl)))
		return nil
	case kFloat64:
		fl, err := toFloat(x)
		if err != nil {
			return err
		}
		e.u64(math.Float64bits(fl))
		return nil
	case kInt8, kInt16, kInt32, kInt64:
		i, err := toInt(x)
		if err != nil {
			return err
		}
		bits := 8 * f.kind.size()
		if bits < 64 && (i < -1<<(bits-1) || i >= 1<<(bits-1)) {
			return fmt.Errorf("%d out of range of %s", i, f.ftype)
		}
		e.putUint(f.kind, uint64(i))
		return nil
	case kUint8, kChar, kUint16, kUint32, kUint64:
		u, err := toUint(x)
		if err != nil {
			return err
		}
		bits := 8 * f.kind.size()
		if bits < 64 && u >= 1<<bits {
			return fmt.Errorf("%d out of range of %s", u, f.ftype)
		}
		e.putUint(f.kind, u)
		return nil
	}
	return fmt.Errorf("type %s: %w", f.ftype, ErrUnsupported)
}

func (e *encoder) putUint(k kind, u uint64) {
	switch k.size() {
	case 1:
		e.b = append(e.b, byte(u))
	case 2:
		e.u16(uint16(u))
	case 4:
		e.u32(uint32(u))
	default:
		e.u64(u)
	}
}

func (e *encoder) str(f *field, x any) error {
	var s string
	switch v := x.(type) {
	case nil:
	case string:
		s = v
	case []byte:
		s = string(v)
	default:
		return fmt.Errorf("want a string, got %T", x)
	}
	if f.strN > 0 && len(s) > f.strN {
		return fmt.Errorf("string of %d bytes longer than its bound %d", len(s), f.strN)
	}
	e.u32(uint32(len(s) + 1))
	e.b = append(e.b, s...)
	e.b = append(e.b, 0)
	return nil
}

func (e *encoder) array(f *field, x any) error {
	n := 0
	var rv reflect.Value
	if x != nil {
		rv = reflect.ValueOf(x)
		if k := rv.Kind(); k != reflect.Slice && k != reflect.Array {
			if _, isStr := x.(string); !isStr || f.kind != kUint8 {
				return fmt.Errorf("want an array for %s, got %T", f.ftype, x)
			}
			rv = reflect.ValueOf([]byte(x.(string)))
		}
		n = rv.Len()
	}
	switch f.arr {
	case fixed:
		if x != nil && n != f.n {
			return fmt.Errorf("%d elements for %s", n, f.ftype)
		}
		n = f.n
	case sequence:
		if f.n > 0 && n > f.n {
			return fmt.Errorf("%d elements for %s", n, f.ftype)
		}
		if uint64(n) > math.MaxUint32 {
			return fmt.Errorf("%d elements: more than a uint32 count", n)
		}
		e.u32(uint32(n))
	}
	if f.kind == kUint8 {
		if p, ok := x.([]byte); ok {
			e.b = append(e.b, p...)
			return nil
		}
	}
	if f.kind == kFloat64 {
		if p, ok := x.([]float64); ok {
			for _, v := range p {
				e.u64(math.Float64bits(v))
			}
			return nil
		}
	}
	one := *f
	one.arr = single
	for i := range n {
		var el any
		if x != nil {
			el = rv.Index(i).Interface()
		}
		if err := e.single(&one, el); err != nil {
			return fmt.Errorf("[%d]: %w", i, err)
		}
	}
	return nil
}

func toInt(x any) (int64, error) {
	switch v := x.(type) {
	case nil:
		return 0, nil
	case int:
		return int64(v), nil
	case int8:
		return int64(v), nil
	case int16:
		return int64(v), nil
	case int32:
		return int64(v), nil
	case int64:
		return v, nil
	case uint, uint8, uint16, uint32, uint64, uintptr:
		u, _ := toUint(v)
		if u > math.MaxInt64 {
			return 0, fmt.Errorf("%d out of range of int64", u)
		}
		return int64(u), nil
	case float32:
		return toInt(float64(v))
	case float64:
		if v != math.Trunc(v) || v < -(1<<63) || v >= 1<<63 {
			return 0, fmt.Errorf("%v is not an int64", v)
		}
		return int64(v), nil
	}
	return 0, fmt.Errorf("want an integer, got %T", x)
}

func toUint(x any) (uint64, error) {
	switch v := x.(type) {
	case nil:
		return 0, nil
	case uint:
		return uint64(v), nil
	case uint8:
		return uint64(v), nil
	case uint16:
		return uint64(v), nil
	case uint32:
		return uint64(v), nil
	case uint64:
		return v, nil
	case uintptr:
		return uint64(v), nil
	case int, int8, int16, int32, int64:
		i, _ := toInt(v)
		if i < 0 {
			return 0, fmt.Errorf("%d is negative for an unsigned type", i)
		}
		return uint64(i), nil
	case float32:
		return toUint(float64(v))
	case float64:
		if v != math.Trunc(v) || v < 0 || v >= 1<<64 {
			return 0, fmt.Errorf("%v is not a uint64", v)
		}
		return uint64(v), nil
	}
	return 0, fmt.Errorf("want an unsigned integer, got %T", x)
}

func toFloat(x any) (float64, error) {
	switch v := x.(type) {
	case nil:
		return 0, nil
	case float64:
		return v, nil
	case float32:
		return float64(v), nil
	case int, int8, int16, int32, int64:
		i, _ := toInt(v)
		return float64(i), nil
	case uint, uint8, uint16, uint32, uint64, uintptr:
		u, _ := toUint(v)
		return float64(u), nil
	}
	return 0, fmt.Errorf("want a number, got %T", x)
}
