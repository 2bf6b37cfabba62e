package ros2msg

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"testing"
)

// The fixtures in testdata/ros2msg were written by testdata/node/ros2cdr.mjs
// with npm @foxglove/rosmsg 5.0.5 (schema parsing) and
// @foxglove/rosmsg2-serialization 3.1.0 (MessageWriter writes the payload,
// MessageReader reads it back into the .json) or, for the big-endian and
// CDR2 payloads, npm @foxglove/cdr 3.5.0 CdrWriter driven value by value.

const fixtureDir = "../../../testdata/ros2msg"

type fixture struct {
	File          string `json:"file"`
	Schema        string `json:"schema"`
	Msg           string `json:"msg"`
	Writer        string `json:"writer"`
	Encapsulation int    `json:"encapsulation"`

	text    []byte
	payload []byte
	want    any
}

func loadFixtures(tb testing.TB) []fixture {
	tb.Helper()
	raw, err := os.ReadFile(filepath.Join(fixtureDir, "index.json"))
	if err != nil {
		tb.Fatal(err)
	}
	var fs []fixture
	if err := json.Unmarshal(raw, &fs); err != nil {
		tb.Fatal(err)
	}
	for i := range fs {
		f := &fs[i]
		if f.text, err = os.ReadFile(filepath.Join(fixtureDir, f.Msg)); err != nil {
			tb.Fatal(err)
		}
		if f.payload, err = os.ReadFile(filepath.Join(fixtureDir, f.File+".cdr")); err != nil {
			tb.Fatal(err)
		}
		j, err := os.ReadFile(filepath.Join(fixtureDir, f.File+".json"))
		if err != nil {
			tb.Fatal(err)
		}
		dec := json.NewDecoder(bytes.NewReader(j))
		dec.UseNumber()
		if err := dec.Decode(&f.want); err != nil {
			tb.Fatalf("%s.json: %v", f.File, err)
		}
	}
	return fs
}

func TestDecodeFixtures(t *testing.T) {
	fs := loadFixtures(t)
	if len(fs) != 7 {
		t.Fatalf("%d fixtures in index.json, want 7", len(fs))
	}
	// Leaves (numbers, strings, bools) compared per fixture: counted from
	// the .json files, so a decoder that drops a field cannot pass.
	wantLeaves := map[string]int{
		"joint_state": 3 + 7 + 7 + 7, "pose_stamped": 3 + 7, "compressed_image": 3 + 1 + 18,
		"mixed_be": 15, "mixed_cdr2_be": 15, "mixed_cdr2_le": 15,
		"all_types": 142, // 18 scalars, 39 in fixed arrays, 22 bounded, 32 in sequences, 30 in nested messages, 1 tail
	}
	for _, f := range fs {
		t.Run(f.File, func(t *testing.T) {
			s, err := Parse(f.Schema, f.text)
			if err != nil {
				t.Fatal(err)
			}
			if f.payload[1] != byte(f.Encapsulation) {
				t.Fatalf("encapsulation byte %#x, index says %#x", f.payload[1], f.Encapsulation)
			}
			got, err := s.Decode(f.payload)
			if err != nil {
				t.Fatal(err)
			}
			n, err := compare("", f.want, got)
			if err != nil {
				t.Fatalf("decoded value differs from what %s wrote: %v", f.Writer, err)
			}
			if n != wantLeaves[f.File] {
				t.Fatalf("compared %d leaves, want %d", n, wantLeaves[f.File])
			}
		})
	}
}

// TestEncodeMatchesFixtures re-encodes each decoded fixture and wants the
// independent writer's bytes back exactly (plain CDR only: Encode does not
// write CDR2).
func TestEncodeMatchesFixtures(t *testing.T) {
	checked := 0
	for _, f := range loadFixtures(t) {
		if f.Encapsulation != encCDRLE && f.Encapsulation != encCDRBE {
			continue
		}
		s, err := Parse(f.Schema, f.text)
		if err != nil {
			t.Fatal(err)
		}
		v, err := s.Decode(f.payload)
		if err != nil {
			t.Fatal(err)
		}
		b, err := s.Encode(v, f.Encapsulation == encCDRBE)
		if err != nil {
			t.Fatalf("%s: %v", f.File, err)
		}
		if !bytes.Equal(b, f.payload) {
			t.Fatalf("%s: Encode differs from %s:\n got %x\nwant %x", f.File, f.Writer, b, f.payload)
		}
		checked++
	}
	if checked != 5 {
		t.Fatalf("checked %d plain CDR fixtures, want 5", checked)
	}
}

// TestCDR2Refused: XCDR2 payloads of types with arrays of strings or
// messages are refused (DDS implementations differ on their delimiter
// headers), whatever their bytes.
func TestCDR2Refused(t *testing.T) {
	for _, f := range loadFixtures(t) {
		if f.File != "joint_state" && f.File != "all_types" {
			continue
		}
		s, err := Parse(f.Schema, f.text)
		if err != nil {
			t.Fatal(err)
		}
		for _, id := range []byte{encCDR2BE, encCDR2LE} {
			p := bytes.Clone(f.payload)
			p[1] = id
			if _, err := s.Decode(p); !errors.Is(err, ErrUnsupported) {
				t.Fatalf("%s with encapsulation %#x: err %v, want ErrUnsupported", f.File, id, err)
			}
		}
	}
	s, err := Parse("hindcast_test/Mixed", mustRead(t, "mixed.msg"))
	if err != nil {
		t.Fatal(err)
	}
	for _, id := range []byte{0x02, 0x03, 0x08, 0x09, 0x0a, 0x0b, 0x10, 0x11} {
		if _, err := s.Decode([]byte{0, id, 0, 0, 1, 2, 3, 4}); !errors.Is(err, ErrUnsupported) {
			t.Fatalf("encapsulation %#x: err %v, want ErrUnsupported", id, err)
		}
	}
}

func mustRead(t *testing.T, name string) []byte {
	t.Helper()
	b, err := os.ReadFile(filepath.Join(fixtureDir, name))
	if err != nil {
		t.Fatal(err)
	}
	return b
}

// compare checks got (Decode's value model) against want (the fixture JSON,
// numbers as json.Number; 64-bit integers and non-finite floats as strings)
// and returns the number of leaves compared.
func compare(path string, want, got any) (int, error) {
	switch g := got.(type) {
	case map[string]any:
		w, ok := want.(map[string]any)
		if !ok {
			return 0, fmt.Errorf("%s: got a message, want %T", path, want)
		}
		if len(w) != len(g) {
			return 0, fmt.Errorf("%s: got %d fields, want %d", path, len(g), len(w))
		}
		n := 0
		for k, wv := range w {
			gv, ok := g[k]
			if !ok {
				return 0, fmt.Errorf("%s.%s: missing", path, k)
			}
			c, err := compare(path+"."+k, wv, gv)
			if err != nil {
				return 0, err
			}
			n += c
		}
		return n, nil
	case []any:
		return compareSlice(path, want, len(g), func(i int) any { return g[i] })
	case []byte:
		return compareSlice(path, want, len(g), func(i int) any { return uint64(g[i]) })
	case []int64:
		return compareSlice(path, want, len(g), func(i int) any { return g[i] })
	case []uint64:
		return compareSlice(path, want, len(g), func(i int) any { return g[i] })
	case []float64:
		return compareSlice(path, want, len(g), func(i int) any { return g[i] })
	case []bool:
		return compareSlice(path, want, len(g), func(i int) any { return g[i] })
	case []string:
		return compareSlice(path, want, len(g), func(i int) any { return g[i] })
	case int64:
		w, err := strconv.ParseInt(numText(want), 10, 64)
		if err != nil || w != g {
			return 0, fmt.Errorf("%s: got int64 %d, want %v", path, g, want)
		}
	case uint64:
		w, err := strconv.ParseUint(numText(want), 10, 64)
		if err != nil || w != g {
			return 0, fmt.Errorf("%s: got uint64 %d, want %v", path, g, want)
		}
	case float64:
		var w float64
		switch numText(want) {
		case "NaN":
			w = math.NaN()
		case "Infinity":
			w = math.Inf(1)
		case "-Infinity":
			w = math.Inf(-1)
		case "-0":
			w = math.Copysign(0, -1)
		default:
			var err error
			if w, err = strconv.ParseFloat(numText(want), 64); err != nil {
				return 0, fmt.Errorf("%s: got float64 %v, want %v", path, g, want)
			}
		}
		same := w == g && math.Signbit(w) == math.Signbit(g) || math.IsNaN(w) && math.IsNaN(g)
		if !same {
			return 0, fmt.Errorf("%s: got float64 %v, want %v", path, g, want)
		}
	case bool, string:
		if want != got {
			return 0, fmt.Errorf("%s: got %T %v, want %v", path, got, got, want)
		}
	default:
		return 0, fmt.Errorf("%s: %T is not in the value model", path, got)
	}
	return 1, nil
}

func compareSlice(path string, want any, n int, at func(int) any) (int, error) {
	w, ok := want.([]any)
	if !ok {
		return 0, fmt.Errorf("%s: got an array, want %T", path, want)
	}
	if len(w) != n {
		return 0, fmt.Errorf("%s: got %d elements, want %d", path, n, len(w))
	}
	total := 0
	for i := range w {
		c, err := compare(fmt.Sprintf("%s[%d]", path, i), w[i], at(i))
		if err != nil {
			return 0, err
		}
		total += c
	}
	return total, nil
}

func numText(v any) string {
	switch x := v.(type) {
	case json.Number:
		return string(x)
	case string:
		return x
	}
	return fmt.Sprint(v)
}
