package ros2msg

import (
	"bytes"
	"errors"
	"math"
	"reflect"
	"runtime"
	"strings"
	"testing"
)

const handSchema = "uint8 a\nfloat64 c\nint32 b\nstring d\nint16[] e\n"

// handValue and the byte strings below were computed by hand from the CDR
// rules (each value aligned to its size counted from after the 4-byte
// header; a string is a uint32 length counting its NUL; a sequence a uint32
// count), not by any program.
var handValue = map[string]any{
	"a": uint64(1), "c": 1.5, "b": int64(-2), "d": "hi", "e": []int64{3, -4},
}

var handBE = []byte{
	0x00, 0x00, 0x00, 0x00, // header: plain CDR, big-endian
	0x01,                                     // a
	0x00, 0x00, 0x00, 0x00, 0x00, 0x00, 0x00, // padding to 8
	0x3f, 0xf8, 0x00, 0x00, 0x00, 0x00, 0x00, 0x00, // c = 1.5
	0xff, 0xff, 0xff, 0xfe, // b = -2
	0x00, 0x00, 0x00, 0x03, 'h', 'i', 0x00, // d: length 3 with NUL
	0x00,                   // padding to 4
	0x00, 0x00, 0x00, 0x02, // e: count 2
	0x00, 0x03, 0xff, 0xfc, // 3, -4
}

var handLE = []byte{
	0x00, 0x01, 0x00, 0x00, // header: plain CDR, little-endian
	0x01,
	0x00, 0x00, 0x00, 0x00, 0x00, 0x00, 0x00,
	0x00, 0x00, 0x00, 0x00, 0x00, 0x00, 0xf8, 0x3f,
	0xfe, 0xff, 0xff, 0xff,
	0x03, 0x00, 0x00, 0x00, 'h', 'i', 0x00,
	0x00,
	0x02, 0x00, 0x00, 0x00,
	0x03, 0x00, 0xfc, 0xff,
}

func TestHandComputedBytes(t *testing.T) {
	s, err := Parse("hindcast_test/Hand", []byte(handSchema))
	if err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		name string
		big  bool
		want []byte
	}{{"big-endian", true, handBE}, {"little-endian", false, handLE}} {
		got, err := s.Decode(tc.want)
		if err != nil {
			t.Fatalf("%s: %v", tc.name, err)
		}
		if !reflect.DeepEqual(got, handValue) {
			t.Fatalf("%s: decoded %#v, want %#v", tc.name, got, handValue)
		}
		enc, err := s.Encode(handValue, tc.big)
		if err != nil {
			t.Fatal(err)
		}
		if !bytes.Equal(enc, tc.want) {
			t.Fatalf("%s: encoded\n %x, want\n %x", tc.name, enc, tc.want)
		}
	}
	// Cut anywhere, the payload is an error, never a panic or a partial value.
	for n := 0; n < len(handBE); n++ {
		if v, err := s.Decode(handBE[:n]); err == nil {
			t.Fatalf("payload cut to %d bytes decoded as %v", n, v)
		}
	}
}

// TestRoundTrip: every fixture's value, encoded in both byte orders, decodes
// to the same value.
func TestRoundTrip(t *testing.T) {
	n := 0
	for _, f := range loadFixtures(t) {
		s, err := Parse(f.Schema, f.text)
		if err != nil {
			t.Fatal(err)
		}
		v, err := s.Decode(f.payload)
		if err != nil {
			t.Fatal(err)
		}
		for _, big := range []bool{false, true} {
			b, err := s.Encode(v, big)
			if err != nil {
				t.Fatalf("%s: %v", f.File, err)
			}
			if want := map[bool]byte{false: 1, true: 0}[big]; b[1] != want {
				t.Fatalf("%s: encapsulation %#x, want %#x", f.File, b[1], want)
			}
			back, err := s.Decode(b)
			if err != nil {
				t.Fatalf("%s big=%v: %v", f.File, big, err)
			}
			if !reflect.DeepEqual(back, v) {
				t.Fatalf("%s big=%v: round trip differs:\n%#v\n%#v", f.File, big, back, v)
			}
			n++
		}
	}
	if n != 14 {
		t.Fatalf("%d round trips, want 14", n)
	}
}

func TestEncodeLoose(t *testing.T) {
	s, err := Parse("hindcast_test/Hand", []byte(handSchema))
	if err != nil {
		t.Fatal(err)
	}
	// Any Go number type, and missing fields as zero values.
	b, err := s.Encode(map[string]any{"a": 1, "c": float32(1.5), "b": int8(-2), "d": []byte("hi"), "e": []int{3, -4}}, true)
	if err != nil || !bytes.Equal(b, handBE) {
		t.Fatalf("loose types: %x, %v", b, err)
	}
	b, err = s.Encode(nil, false)
	if err != nil {
		t.Fatal(err)
	}
	zero := []byte{0, 1, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 1, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0}
	if !bytes.Equal(b, zero) {
		t.Fatalf("zero value: %x, want %x", b, zero)
	}
	for _, bad := range []map[string]any{
		{"a": 256},            // out of uint8
		{"a": -1},             // negative for unsigned
		{"b": int64(1) << 31}, // out of int32
		{"c": "x"},            // not a number
		{"e": 3},              // not an array
		{"d": 7},              // not a string
		{"b": 1.5},            // not an integer
	} {
		if _, err := s.Encode(bad, false); err == nil {
			t.Fatalf("Encode(%v) succeeded", bad)
		}
	}
	bs, err := Parse("t/B", []byte("string<=3 s\nint8[<=2] q\nint8[2] f\n"))
	if err != nil {
		t.Fatal(err)
	}
	for _, bad := range []map[string]any{{"s": "four"}, {"q": []int{1, 2, 3}}, {"f": []int{1}}} {
		if _, err := bs.Encode(bad, false); err == nil {
			t.Fatalf("Encode(%v) beyond a bound succeeded", bad)
		}
	}
}

// TestDecodeValueModel checks the Go types of the value model for each kind.
func TestDecodeValueModel(t *testing.T) {
	s, err := Parse("t/V", []byte("bool a\nchar b\nbyte c\nint8 d\nfloat32 e\nchar[2] f\nbyte[2] g\nint8[2] h\nfloat32[1] i\nbool[1] j\nT[1] k\n===\nMSG: t/T\nuint8 x\n"))
	if err != nil {
		t.Fatal(err)
	}
	b, err := s.Encode(map[string]any{"a": true, "b": 65, "c": 66, "d": -3, "e": 0.5,
		"f": []uint64{1, 2}, "g": []byte{3, 4}, "h": []int64{-1, 1}, "i": []float64{0.25}, "j": []bool{true},
		"k": []any{map[string]any{"x": 9}}}, false)
	if err != nil {
		t.Fatal(err)
	}
	v, err := s.Decode(b)
	if err != nil {
		t.Fatal(err)
	}
	want := map[string]any{"a": true, "b": uint64(65), "c": uint64(66), "d": int64(-3), "e": 0.5,
		"f": []uint64{1, 2}, "g": []byte{3, 4}, "h": []int64{-1, 1}, "i": []float64{0.25}, "j": []bool{true},
		"k": []any{map[string]any{"x": uint64(9)}}}
	if !reflect.DeepEqual(v, want) {
		t.Fatalf("got %#v\nwant %#v", v, want)
	}
	// uint8[] aliases the payload: no copy per message.
	g := v["g"].([]byte)
	if &g[0] != &b[bytes.Index(b, []byte{3, 4})] || cap(g) != 2 {
		t.Fatal("uint8[] does not alias the payload (or its capacity reaches beyond it)")
	}
}

// TestHostileCounts: a count larger than the bytes left is an error, found
// before any allocation for the elements.
func TestHostileCounts(t *testing.T) {
	fs := loadFixtures(t)
	var js fixture
	for _, f := range fs {
		if f.File == "joint_state" {
			js = f
		}
	}
	s, err := Parse(js.Schema, js.text)
	if err != nil {
		t.Fatal(err)
	}
	// The name count of JointState is the first uint32 after header.frame_id
	// ("base_link": 4+4+4+10 bytes, then 2 of padding): offset 4+24.
	const countAt = 4 + 24
	p := bytes.Clone(js.payload)
	if got := p[countAt]; got != 7 {
		t.Fatalf("fixture layout moved: name count byte %d, want 7", got)
	}
	for _, c := range []uint32{math.MaxUint32, 1 << 28, 1000} {
		p[countAt], p[countAt+1], p[countAt+2], p[countAt+3] = byte(c), byte(c>>8), byte(c>>16), byte(c>>24)
		var before, after runtime.MemStats
		runtime.ReadMemStats(&before)
		_, err := s.Decode(p)
		runtime.ReadMemStats(&after)
		if err == nil || !strings.Contains(err.Error(), "field name") {
			t.Fatalf("count %d: err %v, want an error on field name", c, err)
		}
		if d := after.TotalAlloc - before.TotalAlloc; d > 16<<10 {
			t.Fatalf("count %d: allocated %d bytes before failing", c, d)
		}
	}
	// A fixed array longer than the payload, and a string longer than it.
	fx, err := Parse("t/F", []byte("float64[1000000] big\n"))
	if err != nil {
		t.Fatal(err)
	}
	if _, err := fx.Decode([]byte{0, 1, 0, 0, 1, 2, 3, 4, 5, 6, 7, 8}); err == nil {
		t.Fatal("fixed array of 8 MB decoded from 8 bytes")
	}
	st, err := Parse("t/S", []byte("string s\n"))
	if err != nil {
		t.Fatal(err)
	}
	if _, err := st.Decode([]byte{0, 1, 0, 0, 0xff, 0xff, 0xff, 0x7f, 'a'}); err == nil {
		t.Fatal("string longer than the payload decoded")
	}
}

func TestDecodeRefusals(t *testing.T) {
	s, err := Parse("t/W", []byte("int32 a\nwstring w\n"))
	if err != nil {
		t.Fatalf("a wstring field must parse: %v", err)
	}
	if _, err := s.Decode([]byte{0, 1, 0, 0, 1, 0, 0, 0, 0, 0, 0, 0}); !errors.Is(err, ErrUnsupported) {
		t.Fatalf("wstring decode: %v, want ErrUnsupported", err)
	}
	if _, err := s.Encode(nil, false); !errors.Is(err, ErrUnsupported) {
		t.Fatalf("wstring encode: %v, want ErrUnsupported", err)
	}
	h, err := Parse("t/H", []byte(handSchema))
	if err != nil {
		t.Fatal(err)
	}
	for _, p := range [][]byte{nil, {0}, {0, 1, 0}, {1, 1, 0, 0}, {0, 0x12, 0, 0}} {
		if _, err := h.Decode(p); err == nil {
			t.Fatalf("header %x accepted", p)
		}
	}
}

// TestDecodeBounds: a string or sequence longer than its declared bound is
// an error, as Encode refuses to write one.
func TestDecodeBounds(t *testing.T) {
	loose, err := Parse("t/B", []byte("string s\nint8[] q\n"))
	if err != nil {
		t.Fatal(err)
	}
	tight, err := Parse("t/B", []byte("string<=3 s\nint8[<=2] q\n"))
	if err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		v    map[string]any
		want string
	}{
		{map[string]any{"s": "abc", "q": []int{1, 2}}, ""},
		{map[string]any{"s": "abcd"}, "field s: string of 4 bytes longer than its bound 3"},
		{map[string]any{"q": []int{1, 2, 3}}, "field q: 3 elements in a sequence bounded to 2"},
	} {
		b, err := loose.Encode(tc.v, false)
		if err != nil {
			t.Fatal(err)
		}
		_, err = tight.Decode(b)
		if tc.want == "" && err != nil || tc.want != "" && (err == nil || !strings.Contains(err.Error(), tc.want)) {
			t.Fatalf("%v: err %v, want %q", tc.v, err, tc.want)
		}
	}
}

// TestConcurrentDecode: one Schema decodes from several goroutines at once
// (run with -race); every goroutine gets the single-threaded result.
func TestConcurrentDecode(t *testing.T) {
	fs := loadFixtures(t)
	type job struct {
		s    *Schema
		p    []byte
		want map[string]any
	}
	var jobs []job
	for _, f := range fs {
		s, err := Parse(f.Schema, f.text)
		if err != nil {
			t.Fatal(err)
		}
		v, err := s.Decode(f.payload)
		if err != nil {
			t.Fatal(err)
		}
		jobs = append(jobs, job{s, f.payload, v})
	}
	errs := make(chan error, 4)
	for g := range 4 {
		go func() {
			for i := range 50 {
				j := jobs[(i+g)%len(jobs)]
				v, err := j.s.Decode(j.p)
				if err == nil && !reflect.DeepEqual(v, j.want) {
					err = errors.New(j.s.Name + ": differs when decoded concurrently")
				}
				if err != nil {
					errs <- err
					return
				}
			}
			errs <- nil
		}()
	}
	for range 4 {
		if err := <-errs; err != nil {
			t.Fatal(err)
		}
	}
}
