package pipeline

import (
	"path"
	"strings"
)

// MatchGlob reports whether key matches pattern: path.Match per "/"-separated
// segment, with a "**" segment matching any number of segments (none
// included), so "**/*.jsonl" matches "a.jsonl" and "day=1/unit=7/a.jsonl".
func MatchGlob(pattern, key string) bool {
	return matchSegs(strings.Split(pattern, "/"), strings.Split(key, "/"))
}

func matchSegs(pat, key []string) bool {
	for len(pat) > 0 {
		if pat[0] == "**" {
			rest := pat[1:]
			for i := 0; i <= len(key); i++ {
				if matchSegs(rest, key[i:]) {
					return true
				}
			}
			return false
		}
		if len(key) == 0 {
			return false
		}
		if ok, err := path.Match(pat[0], key[0]); err != nil || !ok {
			return false
		}
		pat, key = pat[1:], key[1:]
	}
	return len(key) == 0
}

// Selected reports whether key is taken by the include and exclude patterns.
func Selected(key string, include, exclude []string) bool {
	in := false
	for _, p := range include {
		if MatchGlob(p, key) {
			in = true
			break
		}
	}
	if !in {
		return false
	}
	for _, p := range exclude {
		if MatchGlob(p, key) {
			return false
		}
	}
	return true
}
