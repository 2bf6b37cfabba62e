package pipeline

import "testing"

// The tests of the key globs of SPEC §3.1: "globs on the key relative to the
// source root, `**` crossing folders". A `*` stays within one folder
// (path.Match semantics, Go standard library), and `**` is special only as
// a whole path segment, where it matches zero or more folders (common
// practice: gitignore, "Other consecutive asterisks are considered regular
// asterisks").

func TestMatchGlob(t *testing.T) {
	for _, c := range []struct {
		pattern, key string
		want         bool
	}{
		// ** crossing zero, one and several folders.
		{"**/*.jsonl", "a.jsonl", true},
		{"**/*.jsonl", "day=1/a.jsonl", true},
		{"**/*.jsonl", "day=1/unit=7/a.jsonl", true},
		{"**/*.jsonl", "a.jsonl.gz", false},
		{"**/*.jsonl", "day=1/a.json", false},
		{"**/*.jsonl.gz", "x/y/z/a.jsonl.gz", true},
		{"**/*.jsonl.gz", "x/y/z/a.jsonl", false},
		{"a/**/b.jsonl", "a/b.jsonl", true},
		{"a/**/b.jsonl", "a/x/b.jsonl", true},
		{"a/**/b.jsonl", "a/x/y/b.jsonl", true},
		{"a/**/b.jsonl", "b.jsonl", false},
		{"a/**/b.jsonl", "xa/b.jsonl", false},
		{"a/**/b.jsonl", "a/x/b.jsonl/c", false},
		{"**/unit=7/**", "day=1/unit=7/a.jsonl", true},
		{"**/unit=7/**", "unit=7/a.jsonl", true},
		{"**/unit=7/**", "day=1/unit=77/a.jsonl", false},
		{"**/unit=7/*", "day=1/unit=7/x/a.jsonl", false},
		{"**", "a.jsonl", true},
		{"**", "a/b/c.jsonl", true},
		{"**/**/*.jsonl", "a.jsonl", true},
		{"**/**/*.jsonl", "a/b/c/d.jsonl", true},
		// * never crosses "/".
		{"*.jsonl", "a.jsonl", true},
		{"*.jsonl", "day=1/a.jsonl", false},
		{"*", "a", true},
		{"*", "a/b", false},
		{"day=*/*.jsonl", "day=1/a.jsonl", true},
		{"day=*/*.jsonl", "day=1/x/a.jsonl", false},
		{"day=*/*.jsonl", "a.jsonl", false},
		{"*/*", "a/b", true},
		{"*/*", "a/b/c", false},
		{"*/*", "a", false},
		// ** inside a segment is two plain stars: it stays in the folder.
		{"**.jsonl", "a.jsonl", true},
		{"**.jsonl", "d/a.jsonl", false},
		{"x/a**b", "x/a/b", false},
		// ? and classes match one character, never "/".
		{"unit?.jsonl", "unit7.jsonl", true},
		{"unit?.jsonl", "unit77.jsonl", false},
		{"a?b", "a/b", false},
		{"[ab].jsonl", "a.jsonl", true},
		{"[ab].jsonl", "c.jsonl", false},
		{"[^ab].jsonl", "c.jsonl", true},
		// Literal text, escapes, and whole-key anchoring.
		{"logs/a.jsonl", "logs/a.jsonl", true},
		{"logs/a.jsonl", "logs/a.jsonl.gz", false},
		{"logs/a.jsonl", "x/logs/a.jsonl", false},
		{`\*.jsonl`, "*.jsonl", true},
		{`\*.jsonl`, "a.jsonl", false},
		{"a.jsonl", "A.jsonl", false},
		// A malformed pattern matches nothing (path.ErrBadPattern).
		{"[", "[", false},
		{"**/[", "a/[", false},
	} {
		if got := MatchGlob(c.pattern, c.key); got != c.want {
			t.Errorf("MatchGlob(%q, %q) = %v, want %v", c.pattern, c.key, got, c.want)
		}
	}
}

func TestSelected(t *testing.T) {
	// The SPEC §2 default include, and excludes for a known-bad unit and a
	// known-bad upload folder.
	include := []string{"**/*.jsonl", "**/*.jsonl.gz", "**/*.jsonl.zst"}
	exclude := []string{"**/unit=13/**", "2026-12-01/bad-upload/**", "**/*.tmp.jsonl"}
	for _, c := range []struct {
		key  string
		want bool
	}{
		{"a.jsonl", true},
		{"2026-12-01/unit=7/a.jsonl.gz", true},
		{"2026-12-01/unit=7/a.jsonl.zst", true},
		{"2026-12-01/unit=7/a.jsonl.bz2", false},     // no include matches
		{"2026-12-01/unit=7/notes.txt", false},       // no include matches
		{"2026-12-01/unit=13/a.jsonl", false},        // excluded unit
		{"unit=13/a.jsonl", false},                   // excluded unit, ** over zero folders
		{"2026-12-01/unit=130/a.jsonl", true},        // another unit
		{"2026-12-01/bad-upload/a.jsonl", false},     // excluded upload
		{"2026-12-01/bad-upload/x/y/a.jsonl", false}, // excluded upload, deeper
		{"2026-12-02/bad-upload/a.jsonl", true},      // the exclude is anchored at the root
		{"2026-12-01/unit=7/a.tmp.jsonl", false},     // excluded by name
	} {
		if got := Selected(c.key, include, exclude); got != c.want {
			t.Errorf("Selected(%q) = %v, want %v", c.key, got, c.want)
		}
	}
	// No include: nothing is taken; no exclude: every included key is.
	if Selected("a.jsonl", nil, nil) {
		t.Error("Selected with no include pattern took a.jsonl")
	}
	if !Selected("a/b.jsonl", include, nil) {
		t.Error("Selected with no exclude pattern left out a/b.jsonl")
	}
	// Exclude wins over include, whatever the order of the lists.
	if Selected("a.jsonl", []string{"a.jsonl", "**"}, []string{"*"}) {
		t.Error("an excluded key was taken")
	}
}
