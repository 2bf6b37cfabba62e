package ros2msg

import (
	"bytes"
	"reflect"
	"runtime"
	"testing"
)

// allocBound is the most Decode may allocate for a payload of n bytes: the
// value tree costs a bounded multiple of the bytes it came from (an empty
// message, the worst case, is 1 byte on the wire and a map in memory).
func allocBound(n int) uint64 { return 512*uint64(n) + 64<<10 }

// FuzzDecode decodes arbitrary payloads with the fixtures' schemas: no panic,
// allocation within allocBound, and whatever decodes re-encodes to a payload
// that decodes to the same value.
func FuzzDecode(f *testing.F) {
	fs := loadFixtures(f)
	schemas := make([]*Schema, len(fs))
	for i, fx := range fs {
		s, err := Parse(fx.Schema, fx.text)
		if err != nil {
			f.Fatal(err)
		}
		schemas[i] = s
		f.Add(uint8(i), fx.payload)
	}
	f.Fuzz(func(t *testing.T, which uint8, payload []byte) {
		s := schemas[int(which)%len(schemas)]
		var before, after runtime.MemStats
		runtime.ReadMemStats(&before)
		v, err := s.Decode(payload)
		runtime.ReadMemStats(&after)
		if d := after.TotalAlloc - before.TotalAlloc; d > allocBound(len(payload)) {
			t.Fatalf("%s: %d bytes allocated for a payload of %d", s.Name, d, len(payload))
		}
		if err != nil {
			return
		}
		if payload[1] == encCDR2BE || payload[1] == encCDR2LE {
			return // Encode writes XCDR1 only
		}
		b, err := s.Encode(v, payload[1] == encCDRBE)
		if err != nil {
			t.Fatalf("%s: decoded value does not encode: %v", s.Name, err)
		}
		back, err := s.Decode(b)
		if err != nil {
			t.Fatalf("%s: re-encoded payload does not decode: %v", s.Name, err)
		}
		if !equalNaN(back, v) {
			t.Fatalf("%s: round trip differs", s.Name)
		}
	})
}

// equalNaN is reflect.DeepEqual with NaN equal to NaN (a fuzzed float may be
// any NaN; compare the encodings instead of the values).
func equalNaN(a, b map[string]any) bool {
	if reflect.DeepEqual(a, b) {
		return true
	}
	// Encoding both with one schema-free walk would need the schema; NaNs
	// are the only values DeepEqual rejects, so compare their bits.
	return deepBits(a, b)
}

func deepBits(a, b any) bool {
	switch x := a.(type) {
	case map[string]any:
		y, ok := b.(map[string]any)
		if !ok || len(x) != len(y) {
			return false
		}
		for k := range x {
			if !deepBits(x[k], y[k]) {
				return false
			}
		}
		return true
	case []any:
		y, ok := b.([]any)
		if !ok || len(x) != len(y) {
			return false
		}
		for i := range x {
			if !deepBits(x[i], y[i]) {
				return false
			}
		}
		return true
	case float64:
		y, ok := b.(float64)
		return ok && (x == y || x != x && y != y)
	case []float64:
		y, ok := b.([]float64)
		if !ok || len(x) != len(y) {
			return false
		}
		for i := range x {
			if !(x[i] == y[i] || x[i] != x[i] && y[i] != y[i]) {
				return false
			}
		}
		return true
	}
	return reflect.DeepEqual(a, b)
}

// FuzzParse parses arbitrary schema texts: no panic, allocation bounded by
// the text's size, and a schema that parses encodes its zero value to a
// payload that decodes and re-encodes to the same bytes.
func FuzzParse(f *testing.F) {
	for _, fx := range loadFixtures(f) {
		f.Add(fx.Schema, fx.text)
	}
	f.Add("p/T", []byte("Header h\nT2[<=3] t\n===\nMSG: p/T2\nstring<=3[2] s\nwstring w\n"))
	f.Add("p/msg/T", []byte("int32 A=1\nstring S=\"#\"\nchar[] c 1\n"))
	f.Fuzz(func(t *testing.T, name string, text []byte) {
		var before, after runtime.MemStats
		runtime.ReadMemStats(&before)
		s, err := Parse(name, text)
		runtime.ReadMemStats(&after)
		if d := after.TotalAlloc - before.TotalAlloc; d > 256*uint64(len(text)+len(name))+64<<10 {
			t.Fatalf("%d bytes allocated to parse %d bytes", d, len(text))
		}
		if err != nil || s.wstring || s.root.minSize > 1<<16 {
			return
		}
		b, err := s.Encode(nil, false)
		if err != nil {
			t.Fatalf("zero value does not encode: %v", err)
		}
		v, err := s.Decode(b)
		if err != nil {
			t.Fatalf("zero value does not decode: %v", err)
		}
		b2, err := s.Encode(v, false)
		if err != nil || !bytes.Equal(b, b2) {
			t.Fatalf("zero value re-encodes differently: %v", err)
		}
	})
}
