package jsonl

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"regexp"
	"runtime"
	"strconv"
	"strings"
	"testing"
	"unicode/utf8"
)

// benchLine is one frame of the benchmark fleet (about 215 bytes).
const benchLine = `{"unit":"picker-007","embodiment":"picker6","t":1764489600123456789,"obs":[0.123456,-1.234567,2.345678,-3.456789,4.567891,-5.678912,6.789123,0.012345,-0.123456,0.234567],"act":[0.1234,-0.2345,0.3456,-0.4567,0.5678,-0.6789,0.789],"task":"pick-tote"}`

// base is a line with every required field; cases append members to it.
const base = `{"unit":"u1","embodiment":"e","t":5,"obs":[1]`

// baseLine is what base decodes to.
func baseLine() Line {
	return Line{Unit: "u1", Embodiment: "e", T: 5, Obs: []float64{1}}
}

func with(f func(*Line)) Line {
	l := baseLine()
	f(&l)
	return l
}

// sameFloats compares bit patterns, so that -0 differs from 0 and NaN equals
// the NaN the parser stores (math.NaN()).
func sameFloats(a, b []float64) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if math.Float64bits(a[i]) != math.Float64bits(b[i]) {
			return false
		}
	}
	return true
}

func sameCameras(a, b []Camera) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if a[i] != b[i] {
			return false
		}
	}
	return true
}

// diffLine returns "" when got equals want field by field (slices by
// content, not by capacity or nil-ness).
func diffLine(got, want Line) string {
	var d []string
	add := func(field string, g, w any) { d = append(d, fmt.Sprintf("%s = %#v, want %#v", field, g, w)) }
	if got.Unit != want.Unit {
		add("Unit", got.Unit, want.Unit)
	}
	if got.Embodiment != want.Embodiment {
		add("Embodiment", got.Embodiment, want.Embodiment)
	}
	if got.T != want.T {
		add("T", got.T, want.T)
	}
	if !sameFloats(got.Obs, want.Obs) {
		add("Obs", got.Obs, want.Obs)
	}
	if !sameFloats(got.Act, want.Act) {
		add("Act", got.Act, want.Act)
	}
	if got.HasAct != want.HasAct {
		add("HasAct", got.HasAct, want.HasAct)
	}
	if got.NonFinite != want.NonFinite {
		add("NonFinite", got.NonFinite, want.NonFinite)
	}
	if got.Ev != want.Ev {
		add("Ev", got.Ev, want.Ev)
	}
	if got.Task != want.Task {
		add("Task", got.Task, want.Task)
	}
	if got.HasTask != want.HasTask {
		add("HasTask", got.HasTask, want.HasTask)
	}
	if got.Success != want.Success {
		add("Success", got.Success, want.Success)
	}
	if got.HasSuccess != want.HasSuccess {
		add("HasSuccess", got.HasSuccess, want.HasSuccess)
	}
	if !sameCameras(got.Img, want.Img) {
		add("Img", got.Img, want.Img)
	}
	return strings.Join(d, "; ")
}

func TestParseAccept(t *testing.T) {
	manyCams := func() (string, []Camera) {
		// More cameras than smallImg, with a replaced, a removed and a re-added name.
		var sb strings.Builder
		var want []Camera
		sb.WriteString(base + `,"img":{`)
		for i := 0; i < 20; i++ {
			fmt.Fprintf(&sb, `"c%d":"r%d",`, i, i)
			want = append(want, Camera{fmt.Sprintf("c%d", i), fmt.Sprintf("r%d", i)})
		}
		sb.WriteString(`"c3":"x3","c5":null,"c19":null,"c5":"y5","none":null}}`)
		want[3].Ref = "x3"
		want = append(want[:5], want[6:19]...)
		want = append(want, Camera{"c5", "y5"})
		return sb.String(), want
	}
	manyIn, manyWant := manyCams()
	deep := func(n int) string { // an unknown field nested so the line has depth n
		return base + `,"x":` + strings.Repeat("[", n-1) + strings.Repeat("]", n-1) + `}`
	}

	tests := []struct {
		name string
		in   string
		want Line
	}{
		{"benchmark line", benchLine, Line{
			Unit: "picker-007", Embodiment: "picker6", T: 1764489600123456789,
			Obs:    []float64{0.123456, -1.234567, 2.345678, -3.456789, 4.567891, -5.678912, 6.789123, 0.012345, -0.123456, 0.234567},
			Act:    []float64{0.1234, -0.2345, 0.3456, -0.4567, 0.5678, -0.6789, 0.789},
			HasAct: true, Task: "pick-tote", HasTask: true,
		}},
		{"required fields only", base + `}`, baseLine()},
		{"members in any order", `{"obs":[1],"t":5,"embodiment":"e","unit":"u1"}`, baseLine()},
		{"all optional fields", base + `,"act":[-1,0.5],"ev":"start","task":"pick","success":true,"img":{"wrist":"a/b.png","top":"s3://b/k"}}`,
			with(func(l *Line) {
				l.Act, l.HasAct, l.Ev, l.Task, l.HasTask, l.Success, l.HasSuccess = []float64{-1, 0.5}, true, "start", "pick", true, true, true
				l.Img = []Camera{{"wrist", "a/b.png"}, {"top", "s3://b/k"}}
			})},
		{"success false", base + `,"success":false}`, with(func(l *Line) { l.HasSuccess = true })},
		{"ev end", base + `,"ev":"end"}`, with(func(l *Line) { l.Ev = "end" })},
		{"ev other string ignored", base + `,"ev":"pause"}`, baseLine()},
		{"ev wrong case ignored", base + `,"ev":"Start"}`, baseLine()},
		{"ev number ignored", base + `,"ev":1}`, baseLine()},
		{"ev object ignored", base + `,"ev":{"a":[1,{"b":null}]}}`, baseLine()},
		{"ev escaped start", base + `,"ev":"st\u0061rt"}`, with(func(l *Line) { l.Ev = "start" })},
		{"null optional fields are absent", base + `,"act":null,"ev":null,"task":null,"success":null,"img":null}`, baseLine()},
		{"empty obs", `{"unit":"u1","embodiment":"e","t":5,"obs":[]}`, with(func(l *Line) { l.Obs = nil })},
		{"empty act is present", base + `,"act":[ ]}`, with(func(l *Line) { l.HasAct = true })},
		{"empty img", base + `,"img":{}}`, baseLine()},
		{"img null member skipped, order kept", base + `,"img":{"b":"1","a":null,"c":""}}`,
			with(func(l *Line) { l.Img = []Camera{{"b", "1"}, {"c", ""}} })},
		{"img escaped name and ref", base + `,"img":{"w\u0072ist":"a\/b\u00e9"}}`,
			with(func(l *Line) { l.Img = []Camera{{"wrist", "a/bé"}} })},
		{"img repeated name keeps first position", base + `,"img":{"a":"1","b":"2","a":"3"}}`,
			with(func(l *Line) { l.Img = []Camera{{"a", "3"}, {"b", "2"}} })},
		{"img later null removes", base + `,"img":{"a":"1","b":"2","a":null}}`,
			with(func(l *Line) { l.Img = []Camera{{"b", "2"}} })},
		{"img earlier null overridden", base + `,"img":{"a":null,"a":"1"}}`,
			with(func(l *Line) { l.Img = []Camera{{"a", "1"}} })},
		{"img with many cameras and repeats", manyIn, with(func(l *Line) { l.Img = manyWant })},
		{"img repeated top-level key replaces", base + `,"img":{"a":"1"},"img":{"b":"2"}}`,
			with(func(l *Line) { l.Img = []Camera{{"b", "2"}} })},
		{"img object then null", base + `,"img":{"a":"1"},"img":null}`, baseLine()},

		// RFC 8259 §2: insignificant whitespace is space, tab, LF, CR around any structural token.
		{"RFC 8259 §2 whitespace everywhere", " \t\n\r{ \"unit\" :\t\"u1\" ,\n\"embodiment\"\r:\"e\", \"t\" : 5 , \"obs\" : [ 1 ] } \t\n\r", baseLine()},
		{"RFC 8259 §2 trailing CR is whitespace", base + "}\r", baseLine()},

		// Unknown fields: any valid JSON (RFC 8259 §3 values), ignored.
		{"unknown fields of every type", base + `,"s":"x","n":-1.5e-3,"z":0,"b":true,"f":false,"nu":null,"a":[1,"2",[{}],{"k":[]}],"o":{"p":{"q":[null]}},"":1}`, baseLine()},
		{"unknown field named like a field but other case", base + `,"Unit":5,"T":"x","OBS":null}`, baseLine()},
		{"nesting at the depth limit", deep(maxDepth), baseLine()},

		// Keys are compared after unescaping (RFC 8259 §7).
		{"escaped keys", `{"\u0075nit":"u1","embodim\u0065nt":"e","\u0074":5,"o\u0062s":[1]}`, baseLine()},

		// Duplicate keys: the last one wins (RFC 8259 §4 leaves it open).
		{"duplicate unit", base + `,"unit":"u2"}`, with(func(l *Line) { l.Unit = "u2" })},
		{"duplicate t, first of wrong type", `{"t":"x","unit":"u1","embodiment":"e","t":5,"obs":[1]}`, baseLine()},
		{"duplicate unit, first invalid", `{"unit":"a b","unit":"u1","embodiment":"e","t":5,"obs":[1]}`, baseLine()},
		{"duplicate obs, first non-finite", `{"unit":"u1","embodiment":"e","t":5,"obs":[NaN],"obs":[1]}`, baseLine()},
		{"duplicate act, array then null", base + `,"act":[Infinity],"act":null}`, baseLine()},
		{"duplicate task, string then null", base + `,"task":"x","task":null}`, baseLine()},
		{"duplicate success, true then null", base + `,"success":true,"success":null}`, baseLine()},
		{"duplicate ev, start then other", base + `,"ev":"start","ev":7}`, baseLine()},
		{"duplicate task, wrong type then string", base + `,"task":1,"task":"x"}`, with(func(l *Line) { l.Task, l.HasTask = "x", true })},

		// unit: ^[A-Za-z0-9._-]{1,64}$ (SPEC §1).
		{"unit of every allowed character", `{"unit":"AZaz09._-","embodiment":"e","t":5,"obs":[1]}`, with(func(l *Line) { l.Unit = "AZaz09._-" })},
		{"unit of 64 characters", `{"unit":"` + strings.Repeat("a", 64) + `","embodiment":"e","t":5,"obs":[1]}`, with(func(l *Line) { l.Unit = strings.Repeat("a", 64) })},
		{"unit escaped", `{"unit":"u\u0031","embodiment":"e","t":5,"obs":[1]}`, baseLine()},

		// Strings (RFC 8259 §7, §8.1).
		{"RFC 8259 §7 every short escape", `{"unit":"u1","embodiment":"\"\\\/\b\f\n\r\t","t":5,"obs":[1]}`, with(func(l *Line) { l.Embodiment = "\"\\/\b\f\n\r\t" })},
		{"RFC 8259 §7 \\u escapes, both hex cases", `{"unit":"u1","embodiment":"\u0041\u00e9\u00E9\u20ac\u0000","t":5,"obs":[1]}`, with(func(l *Line) { l.Embodiment = "Aéé€\x00" })},
		{"RFC 8259 §7 surrogate pair", `{"unit":"u1","embodiment":"\ud83d\ude00","t":5,"obs":[1]}`, with(func(l *Line) { l.Embodiment = "😀" })},
		{"lone high surrogate is U+FFFD", `{"unit":"u1","embodiment":"a\ud83db","t":5,"obs":[1]}`, with(func(l *Line) { l.Embodiment = "a\uFFFDb" })},
		{"lone low surrogate is U+FFFD", `{"unit":"u1","embodiment":"\ude00","t":5,"obs":[1]}`, with(func(l *Line) { l.Embodiment = "\uFFFD" })},
		{"high surrogate before a non-surrogate escape", `{"unit":"u1","embodiment":"\ud83d\u0041","t":5,"obs":[1]}`, with(func(l *Line) { l.Embodiment = "\uFFFDA" })},
		{"two high surrogates", `{"unit":"u1","embodiment":"\ud83d\ud83d\ude00","t":5,"obs":[1]}`, with(func(l *Line) { l.Embodiment = "\uFFFD😀" })},
		{"RFC 8259 §8.1 raw UTF-8 of 2, 3 and 4 bytes", `{"unit":"u1","embodiment":"é€😀` + "\uFFFD" + `","t":5,"obs":[1]}`, with(func(l *Line) { l.Embodiment = "é€😀\uFFFD" })},
		{"DEL is not a control character to escape", "{\"unit\":\"u1\",\"embodiment\":\"\x7f\",\"t\":5,\"obs\":[1]}", with(func(l *Line) { l.Embodiment = "\x7f" })},
		{"empty embodiment", `{"unit":"u1","embodiment":"","t":5,"obs":[1]}`, with(func(l *Line) { l.Embodiment = "" })},

		// Numbers (RFC 8259 §6), converted as strconv.ParseFloat(s, 64).
		{"RFC 8259 §6 number forms", `{"unit":"u1","embodiment":"e","t":5,"obs":[0,-0,1.5,-2.25,1e2,1E2,1e+2,1e-2,0.0,10,1.0e1,0e999999]}`,
			with(func(l *Line) {
				l.Obs = []float64{0, math.Copysign(0, -1), 1.5, -2.25, 100, 100, 100, 0.01, 0, 10, 10, 0}
			})},
		{"decimal fractions round as strconv", `{"unit":"u1","embodiment":"e","t":5,"obs":[0.1,0.2,0.3,2.2250738585072014e-308,5e-324,1.7976931348623157e308]}`,
			with(func(l *Line) { l.Obs = []float64{0.1, 0.2, 0.3, 2.2250738585072014e-308, 5e-324, math.MaxFloat64} })},
		{"more digits than the fast path", `{"unit":"u1","embodiment":"e","t":5,"obs":[9007199254740993,123456789012345678901234567890,0.1000000000000000055511151231257827]}`,
			with(func(l *Line) { l.Obs = []float64{9007199254740992, 1.2345678901234568e29, 0.1} })},
		{"underflow is zero, not non-finite", `{"unit":"u1","embodiment":"e","t":5,"obs":[1e-400,-1e-400]}`,
			with(func(l *Line) { l.Obs = []float64{0, math.Copysign(0, -1)} })},
		{"overflow is non-finite", `{"unit":"u1","embodiment":"e","t":5,"obs":[1e400,-1e400]}`,
			with(func(l *Line) { l.Obs, l.NonFinite = []float64{math.Inf(1), math.Inf(-1)}, true })},
		{"overflow in act is non-finite", base + `,"act":[1.8e308]}`,
			with(func(l *Line) { l.Act, l.HasAct, l.NonFinite = []float64{math.Inf(1)}, true, true })},

		// NaN / Infinity tokens inside obs/act only (SPEC §1).
		{"NaN in obs", `{"unit":"u1","embodiment":"e","t":5,"obs":[1,NaN]}`,
			with(func(l *Line) { l.Obs, l.NonFinite = []float64{1, math.NaN()}, true })},
		{"Infinity and -Infinity in obs", `{"unit":"u1","embodiment":"e","t":5,"obs":[Infinity, -Infinity ]}`,
			with(func(l *Line) { l.Obs, l.NonFinite = []float64{math.Inf(1), math.Inf(-1)}, true })},
		{"NaN, Infinity, -Infinity in act", base + `,"act":[NaN,Infinity,-Infinity]}`,
			with(func(l *Line) {
				l.Act, l.HasAct, l.NonFinite = []float64{math.NaN(), math.Inf(1), math.Inf(-1)}, true, true
			})},

		// t: an exact int64 JSON integer (SPEC §1).
		{"t nanoseconds exact", `{"unit":"u1","embodiment":"e","t":1764489600123456789,"obs":[1]}`, with(func(l *Line) { l.T = 1764489600123456789 })},
		{"t negative", `{"unit":"u1","embodiment":"e","t":-5,"obs":[1]}`, with(func(l *Line) { l.T = -5 })},
		{"t zero", `{"unit":"u1","embodiment":"e","t":0,"obs":[1]}`, with(func(l *Line) { l.T = 0 })},
		{"t minus zero", `{"unit":"u1","embodiment":"e","t":-0,"obs":[1]}`, with(func(l *Line) { l.T = 0 })},
		{"t int64 max", `{"unit":"u1","embodiment":"e","t":9223372036854775807,"obs":[1]}`, with(func(l *Line) { l.T = math.MaxInt64 })},
		{"t int64 min", `{"unit":"u1","embodiment":"e","t":-9223372036854775808,"obs":[1]}`, with(func(l *Line) { l.T = math.MinInt64 })},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			var l Line
			if err := Parse([]byte(tc.in), &l); err != nil {
				t.Fatalf("Parse(%q) = %v, want nil", tc.in, err)
			}
			if d := diffLine(l, tc.want); d != "" {
				t.Errorf("Parse(%q): %s", tc.in, d)
			}
		})
	}
}

func TestParseReject(t *testing.T) {
	line := func(field, value string) string { // base with one field replaced
		m := map[string]string{"unit": `"u1"`, "embodiment": `"e"`, "t": "5", "obs": "[1]"}
		m[field] = value
		return `{"unit":` + m["unit"] + `,"embodiment":` + m["embodiment"] + `,"t":` + m["t"] + `,"obs":` + m["obs"] + `}`
	}
	tests := []struct {
		name, in, want string
	}{
		// RFC 8259 §2: a JSON text is one value; here it must be an object.
		{"RFC 8259 §2 empty", ``, `offset 0: unexpected end of line, want '{' starting the line's object`},
		{"RFC 8259 §2 only whitespace", " \t", `offset 2: unexpected end of line, want '{' starting the line's object`},
		{"RFC 8259 §2 array", `[1]`, `offset 0: unexpected byte '[', want '{' starting the line's object`},
		{"RFC 8259 §2 string", `"x"`, `offset 0: unexpected byte '"', want '{' starting the line's object`},
		{"RFC 8259 §2 null", `null`, `offset 0: unexpected byte 'n', want '{' starting the line's object`},
		{"RFC 8259 §2 trailing bytes", base + `} x`, `offset 47: unexpected byte 'x', want end of line after the object`},
		{"RFC 8259 §2 second object", base + `}{}`, `offset 46: unexpected byte '{', want end of line after the object`},
		{"RFC 8259 §2 trailing comma after object", base + `},`, `offset 46: unexpected byte ',', want end of line after the object`},
		{"RFC 8259 §2 form feed is not whitespace", base + "}\f", `offset 46: unexpected byte '\f', want end of line after the object`},
		{"RFC 8259 §2 NBSP is not whitespace", "\u00a0" + base + "}", `offset 0: unexpected byte 0xc2, want '{' starting the line's object`},
		{"BOM is the caller's business", "\uFEFF" + base + "}", `offset 0: unexpected byte 0xef, want '{' starting the line's object`},

		// RFC 8259 §4 objects.
		{"RFC 8259 §4 unclosed object", base, `offset 45: unexpected end of line, want ',' or '}' after an object member`},
		{"RFC 8259 §4 trailing comma", base + `,}`, `offset 46: unexpected byte '}', want a string key`},
		{"RFC 8259 §4 missing colon", base + `,"x" 1}`, `offset 50: unexpected byte '1', want ':' after an object key`},
		{"RFC 8259 §4 unquoted key", base + `,x:1}`, `offset 46: unexpected byte 'x', want a string key`},
		{"RFC 8259 §4 single-quoted key", base + `,'x':1}`, `offset 46: unexpected byte '\'', want a string key`},
		{"RFC 8259 §4 missing value", base + `,"x":}`, `offset 50: unexpected byte '}', want a JSON value`},
		{"RFC 8259 §4 missing comma", base + ` "x":1}`, `offset 46: unexpected byte '"', want ',' or '}' after an object member`},
		{"RFC 8259 §4 nested trailing comma", base + `,"x":{"a":1,}}`, `offset 57: unexpected byte '}', want a string key`},
		// RFC 8259 §5 arrays.
		{"RFC 8259 §5 trailing comma in obs", line("obs", "[1,]"), `offset 45: unexpected byte ']', want a JSON value`},
		{"RFC 8259 §5 trailing comma in unknown array", base + `,"x":[1,]}`, `offset 53: unexpected byte ']', want a JSON value`},
		{"RFC 8259 §5 missing comma in obs", line("obs", "[1 2]"), `offset 45: unexpected byte '2', want ',' or ']' in an array`},
		{"RFC 8259 §5 unclosed obs", `{"unit":"u1","embodiment":"e","t":5,"obs":[1`, `offset 44: unexpected end of line, want ',' or ']' in an array`},
		{"RFC 8259 §5 leading comma", line("obs", "[,1]"), `offset 43: unexpected byte ',', want a JSON value`},
		// RFC 8259 §3 literals are lower case and exact.
		{"RFC 8259 §3 True", base + `,"success":True}`, `offset 56: unexpected byte 'T', want a JSON value`},
		{"RFC 8259 §3 tru", base + `,"success":tru}`, `offset 56: unexpected byte 't', want the literal true`},
		{"RFC 8259 §3 nulll", base + `,"task":nulll}`, `offset 57: unexpected byte 'l', want ',' or '}' after an object member`},
		{"RFC 8259 §3 undefined", base + `,"x":undefined}`, `offset 50: unexpected byte 'u', want a JSON value`},

		// RFC 8259 §6 number grammar, in obs and elsewhere.
		{"RFC 8259 §6 leading zero", line("obs", "[01]"), `offset 44: unexpected byte '1', want ',' or ']' in an array`},
		{"RFC 8259 §6 plus sign", line("obs", "[+1]"), `offset 43: unexpected byte '+', want a JSON value`},
		{"RFC 8259 §6 no integer part", line("obs", "[.5]"), `offset 43: unexpected byte '.', want a JSON value`},
		{"RFC 8259 §6 no fraction digits", line("obs", "[1.]"), `offset 45: unexpected byte ']', want a digit after '.'`},
		{"RFC 8259 §6 no exponent digits", line("obs", "[1e]"), `offset 45: unexpected byte ']', want a digit in the exponent`},
		{"RFC 8259 §6 no exponent digits after sign", line("obs", "[1e+]"), `offset 46: unexpected byte ']', want a digit in the exponent`},
		{"RFC 8259 §6 lone minus", line("obs", "[-]"), `offset 44: unexpected byte ']', want a digit`},
		{"RFC 8259 §6 double minus", line("obs", "[--1]"), `offset 44: unexpected byte '-', want a digit`},
		{"RFC 8259 §6 hex", line("obs", "[0x10]"), `offset 44: unexpected byte 'x', want ',' or ']' in an array`},
		{"RFC 8259 §6 leading zero in unknown field", base + `,"x":00}`, `offset 51: unexpected byte '0', want ',' or '}' after an object member`},
		{"RFC 8259 §6 fraction without digits in unknown field", base + `,"x":-1.e5}`, `offset 53: unexpected byte 'e', want a digit after '.'`},

		// NaN / Infinity are not JSON outside obs/act (RFC 8259 §6: "not permitted").
		{"NaN in unknown field", base + `,"x":NaN}`, `offset 50: unexpected byte 'N', want a JSON value`},
		{"Infinity in unknown array", base + `,"x":[Infinity]}`, `offset 51: unexpected byte 'I', want a JSON value`},
		{"-Infinity in unknown field", base + `,"x":-Infinity}`, `offset 51: unexpected byte 'I', want a digit`},
		{"NaN as t", line("t", "NaN"), `offset 34: unexpected byte 'N', want a JSON value`},
		{"Infinity as t", line("t", "Infinity"), `offset 34: unexpected byte 'I', want a JSON value`},
		{"-Infinity as t", line("t", "-Infinity"), `offset 35: unexpected byte 'I', want a digit`},
		{"NaN as unit", line("unit", "NaN"), `offset 8: unexpected byte 'N', want a JSON value`},
		{"NaN nested in obs", line("obs", "[[NaN]]"), `offset 44: unexpected byte 'N', want a JSON value`},
		{"NaN in img", base + `,"img":{"w":NaN}}`, `offset 57: unexpected byte 'N', want a JSON value`},
		{"nan lower case in obs", line("obs", "[nan]"), `offset 43: unexpected byte 'n', want the literal null`},
		{"Inf in obs", line("obs", "[Inf]"), `offset 43: unexpected byte 'I', want a JSON value`},
		{"+Infinity in obs", line("obs", "[+Infinity]"), `offset 43: unexpected byte '+', want a JSON value`},
		{"NaN followed by letters", line("obs", "[NaNa]"), `offset 46: unexpected byte 'a', want ',' or ']' in an array`},
		{"quoted NaN in obs", line("obs", `["NaN"]`), `field "obs": element 0 is not a number`},

		// RFC 8259 §7 strings.
		{"RFC 8259 §7 raw tab in string", line("embodiment", "\"a\tb\""), `offset 28: unexpected byte '\t', want no unescaped control character in a string`},
		{"RFC 8259 §7 raw NUL in key", base + ",\"\x00\":1}", `offset 47: unexpected byte '\x00', want no unescaped control character in a string`},
		{"RFC 8259 §7 raw LF after an escape", line("embodiment", "\"\\n\n\""), `offset 29: unexpected byte '\n', want no unescaped control character in a string`},
		{"RFC 8259 §7 unknown escape", line("embodiment", `"\x41"`), `offset 28: unexpected byte 'x', want an escape character`},
		{"RFC 8259 §7 upper-case U escape", line("embodiment", `"\U0041"`), `offset 28: unexpected byte 'U', want an escape character`},
		{"RFC 8259 §7 short \\u escape", line("embodiment", `"\u12"`), `offset 31: unexpected byte '"', want four hex digits after \u`},
		{"RFC 8259 §7 bad hex in \\u", line("embodiment", `"\u12G4"`), `offset 31: unexpected byte 'G', want four hex digits after \u`},
		{"RFC 8259 §7 bad second half of a pair", line("embodiment", `"\ud83d\uZZZZ"`), `offset 35: unexpected byte 'Z', want four hex digits after \u`},
		{"RFC 8259 §7 unterminated string", `{"unit":"u1`, `offset 11: unexpected end of line, want '"' closing a string`},
		{"RFC 8259 §7 backslash at the end", `{"unit":"u1\`, `offset 12: unexpected end of line, want an escape character`},
		{"RFC 8259 §7 single-quoted string", line("embodiment", `'e'`), `offset 26: unexpected byte '\'', want a JSON value`},

		// RFC 8259 §8.1: the text is UTF-8; RFC 3629 §4 gives the valid byte sequences.
		{"RFC 3629 §4 invalid byte in embodiment", line("embodiment", "\"\xff\""), `offset 27: invalid UTF-8 in a string`},
		{"RFC 3629 §4 invalid byte after an escape", line("embodiment", "\"\\n\xff\""), `offset 29: invalid UTF-8 in a string`},
		{"RFC 3629 §4 overlong NUL", line("embodiment", "\"\xc0\x80\""), `offset 27: invalid UTF-8 in a string`},
		{"RFC 3629 §4 UTF-8 encoded surrogate", line("embodiment", "\"\xed\xa0\x80\""), `offset 27: invalid UTF-8 in a string`},
		{"RFC 3629 §4 truncated sequence", line("embodiment", "\"\xe2\x82\""), `offset 27: invalid UTF-8 in a string`},
		{"RFC 3629 §4 invalid UTF-8 in key", base + ",\"\xfe\":1}", `offset 47: invalid UTF-8 in a string`},
		{"RFC 3629 §4 invalid UTF-8 in unknown field", base + ",\"x\":[\"\x80\"]}", `offset 52: invalid UTF-8 in a string`},
		{"RFC 3629 §4 invalid UTF-8 outside strings", base + ",\"x\":\xc3\xa9}", `offset 50: unexpected byte 0xc3, want a JSON value`},

		// Nesting bound.
		{"nesting beyond the limit", base + `,"x":` + strings.Repeat("[", maxDepth) + strings.Repeat("]", maxDepth) + `}`,
			fmt.Sprintf("offset %d: nesting deeper than %d", 50+maxDepth-1, maxDepth)},

		// Required fields (SPEC §1).
		{"empty object", `{}`, `field "unit": missing`},
		{"unit missing", `{"embodiment":"e","t":5,"obs":[1]}`, `field "unit": missing`},
		{"embodiment missing", `{"unit":"u1","t":5,"obs":[1]}`, `field "embodiment": missing`},
		{"t missing", `{"unit":"u1","embodiment":"e","obs":[1]}`, `field "t": missing`},
		{"obs missing", `{"unit":"u1","embodiment":"e","t":5}`, `field "obs": missing`},
		{"unit number", line("unit", "5"), `field "unit": not a string`},
		{"unit null", line("unit", "null"), `field "unit": not a string`},
		{"unit empty", line("unit", `""`), `field "unit": does not match [A-Za-z0-9._-]{1,64}`},
		{"unit with space", line("unit", `"a b"`), `field "unit": does not match [A-Za-z0-9._-]{1,64}`},
		{"unit with slash", line("unit", `"a/b"`), `field "unit": does not match [A-Za-z0-9._-]{1,64}`},
		{"unit non-ASCII", line("unit", `"é"`), `field "unit": does not match [A-Za-z0-9._-]{1,64}`},
		{"unit of 65 characters", line("unit", `"`+strings.Repeat("a", 65)+`"`), `field "unit": does not match [A-Za-z0-9._-]{1,64}`},
		{"unit valid then invalid", `{"unit":"u1","unit":"a b","embodiment":"e","t":5,"obs":[1]}`, `field "unit": does not match [A-Za-z0-9._-]{1,64}`},
		{"embodiment number", line("embodiment", "1"), `field "embodiment": not a string`},
		{"embodiment null", line("embodiment", "null"), `field "embodiment": not a string`},
		{"embodiment array", line("embodiment", `["e"]`), `field "embodiment": not a string`},
		{"t fraction", line("t", "1.0"), `field "t": not an integer`},
		{"t exponent", line("t", "1e9"), `field "t": not an integer`},
		{"t negative exponent", line("t", "10E-1"), `field "t": not an integer`},
		{"t above int64 max", line("t", "9223372036854775808"), `field "t": out of int64 range`},
		{"t below int64 min", line("t", "-9223372036854775809"), `field "t": out of int64 range`},
		{"t far out of range", line("t", "123456789012345678901234567890"), `field "t": out of int64 range`},
		{"t string", line("t", `"5"`), `field "t": not an integer`},
		{"t string minus", line("t", `"-"`), `field "t": not an integer`},
		{"t string 01", line("t", `"01"`), `field "t": not an integer`},
		{"t null", line("t", "null"), `field "t": not an integer`},
		{"t bool", line("t", "true"), `field "t": not an integer`},
		{"RFC 8259 §6 t bare minus", line("t", "-"), `offset 35: unexpected byte ',', want a digit`},
		{"RFC 8259 §6 t leading zero", line("t", "01"), `offset 35: unexpected byte '1', want ',' or '}' after an object member`},
		{"RFC 8259 §6 t plus", line("t", "+5"), `offset 34: unexpected byte '+', want a JSON value`},
		{"obs null", line("obs", "null"), `field "obs": not an array`},
		{"obs number", line("obs", "1"), `field "obs": not an array`},
		{"obs object", line("obs", `{"0":1}`), `field "obs": not an array`},
		{"obs string element", line("obs", `[1,"2"]`), `field "obs": element 1 is not a number`},
		{"obs null element", line("obs", `[null]`), `field "obs": element 0 is not a number`},
		{"obs bool element", line("obs", `[1,2,true]`), `field "obs": element 2 is not a number`},
		{"obs nested array", line("obs", `[[1]]`), `field "obs": element 0 is not a number`},
		{"obs first bad element named", line("obs", `[1,{},[]]`), `field "obs": element 1 is not a number`},
		{"obs valid then invalid", `{"unit":"u1","embodiment":"e","t":5,"obs":[1],"obs":null}`, `field "obs": not an array`},

		// Optional fields of the wrong type (SPEC §1).
		{"act string", base + `,"act":"x"}`, `field "act": neither an array nor null`},
		{"act bool element", base + `,"act":[true]}`, `field "act": element 0 is not a number`},
		{"act object", base + `,"act":{}}`, `field "act": neither an array nor null`},
		{"task number", base + `,"task":1}`, `field "task": neither a string nor null`},
		{"task array", base + `,"task":["x"]}`, `field "task": neither a string nor null`},
		{"success string", base + `,"success":"true"}`, `field "success": neither a bool nor null`},
		{"success number", base + `,"success":1}`, `field "success": neither a bool nor null`},
		{"img string", base + `,"img":"w.png"}`, `field "img": neither an object nor null`},
		{"img array", base + `,"img":["w.png"]}`, `field "img": neither an object nor null`},
		{"img member number", base + `,"img":{"w":"a","x":5}}`, `field "img": member "x" is neither a string nor null`},
		{"img member object", base + `,"img":{"w":{"k":"v"}}}`, `field "img": member "w" is neither a string nor null`},
		{"img member bool", base + `,"img":{"w":false}}`, `field "img": member "w" is neither a string nor null`},
		{"img member array", base + `,"img":{"w":[]}}`, `field "img": member "w" is neither a string nor null`},
		{"errors reported in field order", `{"obs":null,"unit":5,"embodiment":"e","t":5}`, `field "unit": not a string`},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			var l Line
			err := Parse([]byte(tc.in), &l)
			if err == nil {
				t.Fatalf("Parse(%q) = nil, want error %q", tc.in, tc.want)
			}
			if err.Error() != tc.want {
				t.Errorf("Parse(%q) = %q, want %q", tc.in, err, tc.want)
			}
		})
	}
}

// TestParseResetsBetweenLines checks that nothing of a previous line leaks
// into the next, though slices and equal strings are reused.
func TestParseResetsBetweenLines(t *testing.T) {
	var l Line
	full := `{"unit":"u1","embodiment":"e","t":5,"obs":[1,2,3],"act":[NaN],"ev":"end","task":"x","success":true,"img":{"w":"a"}}`
	if err := Parse([]byte(full), &l); err != nil {
		t.Fatal(err)
	}
	obs0 := &l.Obs[0]
	if err := Parse([]byte(`{"unit":"u1","embodiment":"e","t":6,"obs":[4]}`), &l); err != nil {
		t.Fatal(err)
	}
	want := Line{Unit: "u1", Embodiment: "e", T: 6, Obs: []float64{4}}
	if d := diffLine(l, want); d != "" {
		t.Error(d)
	}
	if &l.Obs[0] != obs0 {
		t.Error("Obs backing array not reused")
	}
	if cap(l.Act) != 1 || cap(l.Img) != 1 {
		t.Errorf("cap(Act), cap(Img) = %d, %d, want 1, 1 (kept for reuse)", cap(l.Act), cap(l.Img))
	}
	// A malformed line in between leaves l reusable.
	if err := Parse([]byte(`{"unit":"u1","obs":[7,8,9,10]`), &l); err == nil {
		t.Fatal("want error for a cut line")
	}
	if err := Parse([]byte(full), &l); err != nil {
		t.Fatal(err)
	}
	want = Line{Unit: "u1", Embodiment: "e", T: 5, Obs: []float64{1, 2, 3}, Act: []float64{math.NaN()}, HasAct: true,
		NonFinite: true, Ev: "end", Task: "x", HasTask: true, Success: true, HasSuccess: true, Img: []Camera{{"w", "a"}}}
	if d := diffLine(l, want); d != "" {
		t.Error(d)
	}
}

// TestParseAllocs checks the steady state: no allocation for repeated lines,
// one per string that changes.
func TestParseAllocs(t *testing.T) {
	var l Line
	b := []byte(benchLine)
	if err := Parse(b, &l); err != nil {
		t.Fatal(err)
	}
	if n := testing.AllocsPerRun(200, func() { _ = Parse(b, &l) }); n != 0 {
		t.Errorf("allocations per repeated line = %v, want 0", n)
	}
	other := []byte(strings.Replace(benchLine, "picker-007", "picker-008", 1))
	flip := false
	n := testing.AllocsPerRun(200, func() {
		flip = !flip
		if flip {
			_ = Parse(other, &l)
		} else {
			_ = Parse(b, &l)
		}
	})
	if n != 1 {
		t.Errorf("allocations per line with a changed unit = %v, want 1", n)
	}
	cams := []byte(base + `,"img":{"wrist":"u1/000001.png","top":null,"side":"u1/000001s.png"}}`)
	if err := Parse(cams, &l); err != nil {
		t.Fatal(err)
	}
	if n := testing.AllocsPerRun(200, func() { _ = Parse(cams, &l) }); n != 0 {
		t.Errorf("allocations per repeated line with cameras = %v, want 0", n)
	}
}

// TestFloatFastPathMatchesStrconv compares the exact fast path of number
// conversion with strconv.ParseFloat on numbers at and around its limits.
func TestFloatFastPathMatchesStrconv(t *testing.T) {
	nums := []string{
		"9007199254740991", "9007199254740992", "9007199254740993", "-9007199254740993",
		"9007199254740991e22", "9007199254740991e-22", "9007199254740991e23", "1e22", "1e23", "1e-22", "1e-23",
		"1234567890123456789", "12345678901234567890", "0.000000000000000000001", "4.9406564584124654e-324",
		"2.4703282292062327e-324", "2.4703282292062328e-324", "1.7976931348623158e308", "1.7976931348623159e308",
		"0.30000000000000004", "123.456e-5", "-0.0e-0", "100000000000000000000000", "1E-2", "7e0",
	}
	for _, s := range nums {
		want, werr := strconv.ParseFloat(s, 64)
		var l Line
		err := Parse([]byte(`{"unit":"u","embodiment":"e","t":1,"obs":[`+s+`]}`), &l)
		if err != nil {
			t.Errorf("%s: %v", s, err)
			continue
		}
		if math.Float64bits(l.Obs[0]) != math.Float64bits(want) || l.NonFinite != (werr != nil) {
			t.Errorf("%s: got %v (non-finite %v), strconv gives %v (%v)", s, l.Obs[0], l.NonFinite, want, werr)
		}
	}
}

// expectOK decides from encoding/json's decoding whether the line is well
// formed under SPEC §1, independently of Parse. unitPattern is SPEC §1's
// unit rule as a regular expression.
func expectOK(m map[string]any, unitPattern *regexp.Regexp) bool {
	isNums := func(v any) bool {
		a, ok := v.([]any)
		if !ok {
			return false
		}
		for _, e := range a {
			if _, ok := e.(json.Number); !ok {
				return false
			}
		}
		return true
	}
	u, ok := m["unit"].(string)
	if !ok || !unitPattern.MatchString(u) {
		return false
	}
	if _, ok := m["embodiment"].(string); !ok {
		return false
	}
	tn, ok := m["t"].(json.Number)
	if !ok || strings.ContainsAny(string(tn), ".eE") {
		return false
	}
	if _, err := strconv.ParseInt(string(tn), 10, 64); err != nil {
		return false
	}
	if !isNums(m["obs"]) {
		return false
	}
	if v, ok := m["act"]; ok && v != nil && !isNums(v) {
		return false
	}
	if v, ok := m["task"]; ok && v != nil {
		if _, ok := v.(string); !ok {
			return false
		}
	}
	if v, ok := m["success"]; ok && v != nil {
		if _, ok := v.(bool); !ok {
			return false
		}
	}
	if v, ok := m["img"]; ok && v != nil {
		o, ok := v.(map[string]any)
		if !ok {
			return false
		}
		for _, c := range o {
			if _, ok := c.(string); !ok && c != nil {
				return false
			}
		}
	}
	return true
}

// FuzzParse is a differential test against encoding/json, an independent
// decoder: Parse may only accept valid JSON, must agree on every value it
// returns, and must accept every valid, valid-UTF-8 line that follows SPEC §1.
func FuzzParse(f *testing.F) {
	for _, s := range []string{
		benchLine,
		base + `}`,
		base + `,"act":[-1,0.5],"ev":"start","task":"pick","success":true,"img":{"wrist":"a/b.png","top":null}}`,
		base + `,"ev":"end","success":false,"img":{"w":"data:image/png;base64,iVBORw0KGgo="}}`,
		`{"unit":"van-3","embodiment":"van","t":-1,"obs":[1e400,-0,0.1e-2,5E+3],"act":null,"x":{"y":[true,null,"\u00e9"]}}`,
		`{"\u0075nit":"u\u0031","embodiment":"\ud83d\ude00\ud800","t":9223372036854775807,"obs":[],"obs":[2]}`,
		`{"unit":"u","embodiment":"e","t":1,"obs":[NaN,Infinity,-Infinity]}`,
		`{"unit":"u","embodiment":"e","t":1.5,"obs":[1]}`,
		" {\"unit\":\"u\",\"embodiment\":\"\\t\",\"t\":0,\"obs\":[0]}\r",
	} {
		f.Add([]byte(s))
	}
	unitPattern := regexp.MustCompile(`^[A-Za-z0-9._-]{1,64}$`)
	f.Fuzz(func(t *testing.T, b []byte) { differential(t, b, unitPattern) })
}

// differential checks Parse(b) against encoding/json (see FuzzParse).
// unitPattern is SPEC §1's unit rule as a regular expression.
func differential(t *testing.T, b []byte, unitPattern *regexp.Regexp) {
	var l Line
	err := Parse(b, &l)
	if bytes.Contains(b, []byte("NaN")) || bytes.Contains(b, []byte("Infinity")) {
		return // not JSON for encoding/json; covered by the table tests
	}
	if !json.Valid(b) {
		if err == nil {
			t.Fatalf("Parse accepted %q, which encoding/json says is not valid JSON", b)
		}
		return
	}
	dec := json.NewDecoder(bytes.NewReader(b))
	dec.UseNumber()
	var m map[string]any
	if derr := dec.Decode(&m); derr != nil || m == nil {
		if err == nil {
			t.Fatalf("Parse accepted %q; encoding/json into a map: %v", b, derr)
		}
		return
	}
	if err != nil {
		// Parse is stricter than encoding/json only on UTF-8 validity and
		// on nesting depth (bounded by the count of brackets).
		if utf8.Valid(b) && bytes.Count(b, []byte("["))+bytes.Count(b, []byte("{")) <= maxDepth && expectOK(m, unitPattern) {
			t.Fatalf("Parse(%q) = %v; encoding/json finds a well-formed line", b, err)
		}
		return
	}
	if !expectOK(m, unitPattern) {
		t.Fatalf("Parse accepted %q; encoding/json finds it malformed: %#v", b, m)
	}
	if m["unit"] != l.Unit || m["embodiment"] != l.Embodiment {
		t.Fatalf("%q: unit, embodiment = %q, %q; encoding/json %q, %q", b, l.Unit, l.Embodiment, m["unit"], m["embodiment"])
	}
	if want, _ := strconv.ParseInt(string(m["t"].(json.Number)), 10, 64); want != l.T {
		t.Fatalf("%q: t = %d, encoding/json %d", b, l.T, want)
	}
	nonFinite := false
	nums := func(field string, v any, got []float64) {
		a := v.([]any)
		if len(a) != len(got) {
			t.Fatalf("%q: %s has %d elements, encoding/json %d", b, field, len(got), len(a))
		}
		for i, e := range a {
			want, werr := strconv.ParseFloat(string(e.(json.Number)), 64)
			if werr != nil {
				if !errors.Is(werr, strconv.ErrRange) {
					t.Fatalf("%q: %s[%d]: %v", b, field, i, werr)
				}
				nonFinite = true
			}
			if math.Float64bits(want) != math.Float64bits(got[i]) {
				t.Fatalf("%q: %s[%d] = %v, encoding/json %v", b, field, i, got[i], want)
			}
		}
	}
	nums("obs", m["obs"], l.Obs)
	if v := m["act"]; (v != nil) != l.HasAct {
		t.Fatalf("%q: HasAct = %v, encoding/json act %#v", b, l.HasAct, v)
	} else if v != nil {
		nums("act", v, l.Act)
	}
	if nonFinite != l.NonFinite {
		t.Fatalf("%q: NonFinite = %v, want %v", b, l.NonFinite, nonFinite)
	}
	if v, _ := m["task"].(string); v != l.Task || (m["task"] != nil) != l.HasTask {
		t.Fatalf("%q: task = %q (%v), encoding/json %#v", b, l.Task, l.HasTask, m["task"])
	}
	if v, _ := m["success"].(bool); v != l.Success || (m["success"] != nil) != l.HasSuccess {
		t.Fatalf("%q: success = %v (%v), encoding/json %#v", b, l.Success, l.HasSuccess, m["success"])
	}
	wantEv := ""
	if v, _ := m["ev"].(string); v == "start" || v == "end" {
		wantEv = v
	}
	if wantEv != l.Ev {
		t.Fatalf("%q: ev = %q, want %q", b, l.Ev, wantEv)
	}
	img, _ := m["img"].(map[string]any)
	want := map[string]string{}
	for k, v := range img {
		if s, ok := v.(string); ok {
			want[k] = s
		}
	}
	got := map[string]string{}
	for _, c := range l.Img {
		if _, dup := got[c.Name]; dup {
			t.Fatalf("%q: camera %q returned twice", b, c.Name)
		}
		got[c.Name] = c.Ref
	}
	if fmt.Sprint(got) != fmt.Sprint(want) {
		t.Fatalf("%q: img = %v, encoding/json %v", b, got, want)
	}
}

func BenchmarkParse(b *testing.B) {
	line := []byte(benchLine)
	var l Line
	b.SetBytes(int64(len(line)))
	b.ReportAllocs()
	for b.Loop() {
		if err := Parse(line, &l); err != nil {
			b.Fatal(err)
		}
	}
}

// jsonLine is the encoding/json equivalent of Line, for the comparison benchmark.
type jsonLine struct {
	Unit       string             `json:"unit"`
	Embodiment string             `json:"embodiment"`
	T          int64              `json:"t"`
	Obs        []float64          `json:"obs"`
	Act        []float64          `json:"act"`
	Ev         json.RawMessage    `json:"ev"`
	Task       *string            `json:"task"`
	Success    *bool              `json:"success"`
	Img        map[string]*string `json:"img"`
}

func BenchmarkParseEncodingJSON(b *testing.B) {
	line := []byte(benchLine)
	var l jsonLine
	b.SetBytes(int64(len(line)))
	b.ReportAllocs()
	for b.Loop() {
		l = jsonLine{Obs: l.Obs[:0], Act: l.Act[:0]}
		if err := json.Unmarshal(line, &l); err != nil {
			b.Fatal(err)
		}
	}
}

// TestParseKeepsAtMostMaxValues checks the dimension cap: an obs or act of
// 10⁷ numbers keeps MaxValues+1 of them (so it is still longer than any
// embodiment's vector), allocates a bounded amount, and is still read to
// its end: a non-number or a non-finite value past the cap counts as it
// would before it, with its true element index.
func TestParseKeepsAtMostMaxValues(t *testing.T) {
	const n = 10 * MaxValues
	array := func(at int, v string) string {
		var b strings.Builder
		b.Grow(2 * n)
		b.WriteByte('[')
		for i := range n {
			if i > 0 {
				b.WriteByte(',')
			}
			if i == at {
				b.WriteString(v)
			} else {
				b.WriteByte('0')
			}
		}
		b.WriteByte(']')
		return b.String()
	}
	zeros := array(-1, "")
	line := func(obs, act string) []byte {
		return []byte(`{"unit":"u1","embodiment":"e","t":5,"obs":` + obs + `,"act":` + act + `}`)
	}

	var l Line
	big := line(zeros, zeros)
	var before, after runtime.MemStats
	runtime.ReadMemStats(&before)
	if err := Parse(big, &l); err != nil {
		t.Fatalf("10⁷ zeros in obs and act: %v", err)
	}
	runtime.ReadMemStats(&after)
	if len(l.Obs) != MaxValues+1 || len(l.Act) != MaxValues+1 || !l.HasAct || l.NonFinite {
		t.Errorf("10⁷ zeros: %d obs, %d act values (has act %v, non-finite %v), want %d each, true, false",
			len(l.Obs), len(l.Act), l.HasAct, l.NonFinite, MaxValues+1)
	}
	// Two slices of MaxValues+1 float64 are 16 MB; growing them by appends
	// (by a quarter at a time once large, Go runtime's growslice) allocates
	// about five times the final size, 80 MB. Keeping all 2·10⁷ values
	// would hold 160 MB and allocate about 800 MB.
	if got := after.TotalAlloc - before.TotalAlloc; got > 200<<20 {
		t.Errorf("10⁷ zeros in obs and act allocated %d bytes, want at most %d", got, 200<<20)
	}
	if c := cap(l.Obs) + cap(l.Act); c > 3*MaxValues {
		t.Errorf("10⁷ zeros in obs and act: capacity %d values held, want at most %d", c, 3*MaxValues)
	}

	// A non-number past the cap: malformed, naming its true index.
	err := Parse(line(array(5*MaxValues, `"x"`), "null"), &l)
	if want := fmt.Sprintf(`field "obs": element %d is not a number`, 5*MaxValues); err == nil || err.Error() != want {
		t.Errorf("non-number at element %d: error %v, want %q", 5*MaxValues, err, want)
	}
	// A non-finite value past the cap, in act.
	if err := Parse(line("[1]", array(3*MaxValues, "NaN")), &l); err != nil || !l.NonFinite || len(l.Act) != MaxValues+1 {
		t.Errorf("NaN at act element %d: error %v, non-finite %v, %d act values; want nil, true, %d", 3*MaxValues, err, l.NonFinite, len(l.Act), MaxValues+1)
	}
	// A syntax error past the cap is still found.
	cut := zeros[:len(zeros)-1] + ",]"
	if err := Parse(line(cut, "null"), &l); err == nil {
		t.Errorf("trailing comma after 10⁷ elements: no error")
	}
	// Exactly MaxValues elements are all kept.
	exact := "[" + strings.Repeat("1,", MaxValues-1) + "1]"
	if err := Parse(line(exact, "null"), &l); err != nil || len(l.Obs) != MaxValues {
		t.Errorf("%d elements: error %v, %d kept", MaxValues, err, len(l.Obs))
	}
}
