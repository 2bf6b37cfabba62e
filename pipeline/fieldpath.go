package pipeline

import (
	"fmt"
	"strconv"
	"strings"
)

// PathStep is one step of a field path (SPEC §7.2).
type PathStep struct {
	// Name is set for a field step ("a" in "a.b").
	Name string
	// Index is true for "[i]": the element I.
	Index bool
	I     int
	// Slice is true for "[a:b]": the elements from Lo, before Hi.
	Slice  bool
	Lo, Hi int
}

// ParseFieldPath parses a field path of SPEC §7.2: names separated by ".",
// "[i]" for one array element and "[a:b]" for a slice (0-based, from a,
// before b, a ≤ b). The config loader calls it so a bad path is an error at
// load time that names its key; the recording decoder calls it once per
// source, not per message.
func ParseFieldPath(s string) ([]PathStep, error) {
	if s == "" {
		return nil, fmt.Errorf("empty field path")
	}
	var steps []PathStep
	i := 0
	expectName := true
	for i < len(s) {
		switch c := s[i]; {
		case c == '[':
			end := strings.IndexByte(s[i:], ']')
			if end < 0 {
				return nil, fmt.Errorf("field path %q: '[' without ']'", s)
			}
			inner := s[i+1 : i+end]
			st, err := parseBracket(inner)
			if err != nil {
				return nil, fmt.Errorf("field path %q: %w", s, err)
			}
			if len(steps) == 0 {
				return nil, fmt.Errorf("field path %q: must start with a field name", s)
			}
			steps = append(steps, st)
			i += end + 1
			expectName = false
		case c == '.':
			if expectName {
				return nil, fmt.Errorf("field path %q: empty name at offset %d", s, i)
			}
			i++
			expectName = true
			if i == len(s) {
				return nil, fmt.Errorf("field path %q: ends with '.'", s)
			}
		default:
			if !expectName {
				return nil, fmt.Errorf("field path %q: name at offset %d must follow '.'", s, i)
			}
			j := i
			for j < len(s) && s[j] != '.' && s[j] != '[' {
				if !isNameByte(s[j]) {
					return nil, fmt.Errorf("field path %q: character %q at offset %d", s, s[j], j)
				}
				j++
			}
			steps = append(steps, PathStep{Name: s[i:j]})
			i = j
			expectName = false
		}
	}
	return steps, nil
}

func isNameByte(c byte) bool {
	return c == '_' || c == '-' || c == '/' || c == '@' || c == '$' ||
		(c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') || (c >= '0' && c <= '9')
}

func parseBracket(inner string) (PathStep, error) {
	num := func(t string) (int, error) {
		n, err := strconv.Atoi(t)
		if err != nil || n < 0 || strings.HasPrefix(t, "+") {
			return 0, fmt.Errorf("index %q is not a non-negative integer", t)
		}
		return n, nil
	}
	if a, b, ok := strings.Cut(inner, ":"); ok {
		lo, err := num(a)
		if err != nil {
			return PathStep{}, err
		}
		hi, err := num(b)
		if err != nil {
			return PathStep{}, err
		}
		if hi < lo {
			return PathStep{}, fmt.Errorf("slice [%d:%d] ends before it starts", lo, hi)
		}
		return PathStep{Slice: true, Lo: lo, Hi: hi}, nil
	}
	n, err := num(inner)
	if err != nil {
		return PathStep{}, err
	}
	return PathStep{Index: true, I: n}, nil
}
