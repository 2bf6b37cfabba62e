package ros2msg

import (
	"fmt"
	"reflect"
	"strings"
	"testing"
)

// layout describes a parsed type: each field as name:type, message types
// resolved to their full name, recursively in braces.
func layout(t *msgType) string {
	var parts []string
	for _, f := range t.fields {
		typ := f.ftype
		if f.kind == kMessage {
			typ = f.msg.name
			switch f.arr {
			case fixed:
				typ += fmt.Sprintf("[%d]", f.n)
			case sequence:
				if f.n > 0 {
					typ += fmt.Sprintf("[<=%d]", f.n)
				} else {
					typ += "[]"
				}
			}
			typ += "{" + layout(f.msg) + "}"
		}
		parts = append(parts, f.name+":"+typ)
	}
	return strings.Join(parts, " ")
}

func TestParseLines(t *testing.T) {
	text := `# a comment line
   # an indented comment

int32 FOO=1
int32 BAR = -2   # a constant with spaces
string S="x # not a comment"
string T=unquoted text
int32 x 5
float64[] v [1.0, 2.0]   # a default array
string name "default"  # a default string
uint8 plain# a comment right after the name
string<=8 short
string<=4[<=2] shorts
int64[4] four
float32[<=3] three
bool[] flags
	float64	tabbed
`
	s, err := Parse("pkg/msg/Lines", []byte(text))
	if err != nil {
		t.Fatal(err)
	}
	if s.Name != "pkg/Lines" {
		t.Fatalf("name %q, want pkg/Lines", s.Name)
	}
	want := "x:int32 v:float64[] name:string plain:uint8 short:string<=8 shorts:string<=4[<=2] four:int64[4] three:float32[<=3] flags:bool[] tabbed:float64"
	if got := layout(s.root); got != want {
		t.Fatalf("layout\n got %s\nwant %s", got, want)
	}
	f := s.root.fields
	if f[4].strN != 8 || f[4].arr != single {
		t.Fatalf("string<=8: bound %d, array %d", f[4].strN, f[4].arr)
	}
	if f[5].strN != 4 || f[5].arr != sequence || f[5].n != 2 {
		t.Fatalf("string<=4[<=2]: bound %d, array %d of %d", f[5].strN, f[5].arr, f[5].n)
	}
	if f[6].arr != fixed || f[6].n != 4 || f[7].arr != sequence || f[7].n != 3 || f[8].arr != sequence || f[8].n != 0 {
		t.Fatal("array kinds or lengths wrong")
	}
}

func TestParseTypeNames(t *testing.T) {
	text := "Header header\nPoint p\npkg/Point q\npkg/msg/Point r\nother/msg/Thing[2] s\nbuiltin_interfaces/Time t\nbuiltin_interfaces/msg/Duration d\n" +
		strings.Repeat("=", 80) + "\nMSG: std_msgs/Header\nbuiltin_interfaces/Time stamp\nstring frame_id\n" +
		"================\nMSG: pkg/msg/Point\nfloat64 x\n" +
		"===\nMSG: other/Thing\nPart part\n" +
		"===\nMSG: other/Part\nint8 z\n"
	s, err := Parse("pkg/Top", []byte(text))
	if err != nil {
		t.Fatal(err)
	}
	want := "header:std_msgs/Header{stamp:builtin_interfaces/Time{sec:int32 nanosec:uint32} frame_id:string} " +
		"p:pkg/Point{x:float64} q:pkg/Point{x:float64} r:pkg/Point{x:float64} " +
		"s:other/Thing[2]{part:other/Part{z:int8}} " +
		"t:builtin_interfaces/Time{sec:int32 nanosec:uint32} d:builtin_interfaces/Duration{sec:int32 nanosec:uint32}"
	if got := layout(s.root); got != want {
		t.Fatalf("layout\n got %s\nwant %s", got, want)
	}
	// p, q and r are one type, resolved once.
	if s.root.fields[1].msg != s.root.fields[2].msg || s.root.fields[2].msg != s.root.fields[3].msg {
		t.Fatal("Point, pkg/Point and pkg/msg/Point resolved to different types")
	}

	// A package's own Header is preferred to std_msgs/Header.
	own, err := Parse("pkg/Top", []byte("Header h\n===\nMSG: pkg/Header\nuint8 mine\n===\nMSG: std_msgs/Header\nstring frame_id\n"))
	if err != nil {
		t.Fatal(err)
	}
	if got := layout(own.root); got != "h:pkg/Header{mine:uint8}" {
		t.Fatalf("own Header: %s", got)
	}
}

func TestParseErrors(t *testing.T) {
	for _, tc := range []struct{ text, want string }{
		{"Missing m\n", "unknown type pkg/Missing"},
		{"other/Missing m\n", "unknown type other/Missing"},
		{"Header h\n", "unknown type std_msgs/Header"},
		{"A a\n===\nMSG: pkg/A\nB b\n===\nMSG: pkg/B\nfloat128 f\n", "unknown type pkg/float128"},
		{"A a\n===\nMSG: pkg/A\nA again\n", "contains itself"},
		{"A a\n===\nMSG: pkg/A\nB b\n===\nMSG: pkg/B\nA a\n", "contains itself"},
		{"int32[0] z\n", "bad array length"},
		{"int32[-1] z\n", "bad array length"},
		{"int32[<=0] z\n", "bad sequence bound"},
		{"int32[x] z\n", "bad array length"},
		{"int32[3 z\n", "bad array type"},
		{"int32<=3 z\n", "only strings have one"},
		{"string<=x s\n", "bad string bound"},
		{"int32 a\nint32 a\n", "defined twice"},
		{"int32\n", "want \"type name\""},
		{"int32 9lives\n", "bad field name"},
		{"int32 a-b\n", "bad field name"},
		{"int32 a\n===\nnot a msg line\n", "MSG:"},
		{"int32 a\n===\n", "no \"MSG:\" line"},
		{"int32 a\n===\nMSG: pkg/A\n===\nMSG: pkg/A\n", "defined twice"},
		{"int32 a\n===\nMSG: a/b/c/d\n", "bad dependency name"},
	} {
		_, err := Parse("pkg/Top", []byte(tc.text))
		if err == nil || !strings.Contains(err.Error(), tc.want) {
			t.Errorf("%q: err %v, want one containing %q", tc.text, err, tc.want)
		}
	}
}

// TestParseDepth: types nested maxDepth deep parse; one more level is an
// error (this bounds the recursion of Decode and Encode).
func TestParseDepth(t *testing.T) {
	chain := func(levels int) []byte {
		var b strings.Builder
		b.WriteString("T1 next\n")
		for i := 1; i < levels; i++ {
			fmt.Fprintf(&b, "===\nMSG: p/T%d\nT%d next\n", i, i+1)
		}
		fmt.Fprintf(&b, "===\nMSG: p/T%d\nint8 leaf\n", levels)
		return []byte(b.String())
	}
	s, err := Parse("p/Root", chain(maxDepth-1))
	if err != nil {
		t.Fatalf("%d levels: %v", maxDepth, err)
	}
	if s.root.depth != maxDepth {
		t.Fatalf("depth %d, want %d", s.root.depth, maxDepth)
	}
	v, err := s.Decode([]byte{0, 1, 0, 0, 42})
	if err != nil {
		t.Fatal(err)
	}
	for range maxDepth - 1 {
		v = v["next"].(map[string]any)
	}
	if !reflect.DeepEqual(v, map[string]any{"leaf": int64(42)}) {
		t.Fatalf("innermost value %v", v)
	}
	if _, err := Parse("p/Root", chain(maxDepth)); err == nil || !strings.Contains(err.Error(), "deeper than") {
		t.Fatalf("%d levels: err %v, want a depth error", maxDepth+1, err)
	}
}

// TestPkgMsgTypeSamePayload: the all_types fixture's schema with its
// dependency named pkg/msg/Type in the fields decodes its payload alike.
func TestPkgMsgTypeSamePayload(t *testing.T) {
	for _, f := range loadFixtures(t) {
		if f.File != "all_types" {
			continue
		}
		a, err := Parse(f.Schema, f.text)
		if err != nil {
			t.Fatal(err)
		}
		text := strings.ReplaceAll(string(f.text), "hindcast_test/Inner[", "hindcast_test/msg/Inner[")
		text = strings.ReplaceAll(text, "MSG: hindcast_test/Inner", "MSG: hindcast_test/msg/Inner")
		if strings.Count(text, "hindcast_test/msg/Inner") != 3 {
			t.Fatalf("rewrite hit %d places, want 3", strings.Count(text, "hindcast_test/msg/Inner"))
		}
		b, err := Parse("hindcast_test/AllTypes", []byte(text))
		if err != nil {
			t.Fatal(err)
		}
		va, err := a.Decode(f.payload)
		if err != nil {
			t.Fatal(err)
		}
		vb, err := b.Decode(f.payload)
		if err != nil {
			t.Fatal(err)
		}
		if !reflect.DeepEqual(va, vb) {
			t.Fatal("pkg/msg/Type schema decodes differently")
		}
		return
	}
	t.Fatal("no all_types fixture")
}

// TestParseCRLF: a schema saved with Windows line ends parses alike.
func TestParseCRLF(t *testing.T) {
	for _, f := range loadFixtures(t) {
		a, err := Parse(f.Schema, f.text)
		if err != nil {
			t.Fatal(err)
		}
		b, err := Parse(f.Schema, []byte(strings.ReplaceAll(string(f.text), "\n", "\r\n")))
		if err != nil {
			t.Fatalf("%s with CRLF: %v", f.File, err)
		}
		if layout(a.root) != layout(b.root) {
			t.Fatalf("%s: CRLF layout differs", f.File)
		}
	}
}
