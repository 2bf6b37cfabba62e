package pipeline

import (
	"reflect"
	"testing"
)

// The field path syntax of SPEC §7.2: names separated by ".", "[i]" for one
// element, "[a:b]" for a slice.
func TestParseFieldPath(t *testing.T) {
	good := map[string][]PathStep{
		"position":        {{Name: "position"}},
		"pose.position.x": {{Name: "pose"}, {Name: "position"}, {Name: "x"}},
		"position[0:3]":   {{Name: "position"}, {Slice: true, Lo: 0, Hi: 3}},
		"joints[2].angle": {{Name: "joints"}, {Index: true, I: 2}, {Name: "angle"}},
		"m[1][0:2]":       {{Name: "m"}, {Index: true, I: 1}, {Slice: true, Lo: 0, Hi: 2}},
		"data":            {{Name: "data"}},
		"a[3:3]":          {{Name: "a"}, {Slice: true, Lo: 3, Hi: 3}},
	}
	for in, want := range good {
		got, err := ParseFieldPath(in)
		if err != nil {
			t.Errorf("%q: %v", in, err)
			continue
		}
		if !reflect.DeepEqual(got, want) {
			t.Errorf("%q: got %+v, want %+v", in, got, want)
		}
	}
	for _, in := range []string{"", ".a", "a.", "a..b", "[0]", "a[", "a[x]", "a[-1]", "a[3:1]", "a[1:]", "a b", "a[0]b", "a[+1]"} {
		if _, err := ParseFieldPath(in); err == nil {
			t.Errorf("%q: accepted", in)
		}
	}
}
