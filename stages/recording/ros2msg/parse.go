package ros2msg

import (
	"bytes"
	"fmt"
	"strconv"
	"strings"
)

// kind is the wire type of a field's elements.
type kind uint8

const (
	kBool kind = iota + 1
	kInt8
	kInt16
	kInt32
	kInt64
	kUint8 // uint8 and byte
	kChar  // char: a uint8 on the wire, decoded as uint64 (arrays as []uint64)
	kUint16
	kUint32
	kUint64
	kFloat32
	kFloat64
	kString
	kWString
	kMessage
)

// size is the wire size of a fixed-size primitive (0 for strings, messages).
func (k kind) size() int {
	switch k {
	case kBool, kInt8, kUint8, kChar:
		return 1
	case kInt16, kUint16:
		return 2
	case kInt32, kUint32, kFloat32:
		return 4
	case kInt64, kUint64, kFloat64:
		return 8
	}
	return 0
}

var primitives = map[string]kind{
	"bool": kBool, "byte": kUint8, "char": kChar,
	"int8": kInt8, "int16": kInt16, "int32": kInt32, "int64": kInt64,
	"uint8": kUint8, "uint16": kUint16, "uint32": kUint32, "uint64": kUint64,
	"float32": kFloat32, "float64": kFloat64,
	"string": kString, "wstring": kWString,
}

// arrayKind says whether a field is one value, a fixed array or a sequence.
type arrayKind uint8

const (
	single   arrayKind = iota
	fixed              // T[N]: N elements, no count on the wire
	sequence           // T[] or T[<=N]: a uint32 count, then the elements
)

type field struct {
	name  string
	kind  kind
	msg   *msgType // for kMessage
	arr   arrayKind
	n     int // fixed: the length; sequence: the bound (0 = unbounded)
	strN  int // string<=N: the bound (0 = unbounded)
	ftype string
}

type msgType struct {
	name   string // "package/Type"
	fields []field
	// minSize is the smallest wire size of one value of this type (padding
	// left out), at least 1: the bound used against hostile counts.
	minSize int
	depth   int
}

// rawType is one section of the schema text before resolution.
type rawType struct {
	name  string // "package/Type"
	pkg   string
	lines []rawField
}

type rawField struct {
	typ  string
	name string
	arr  arrayKind
	n    int
	strN int
	base string // type name without bounds and array suffix
}

// builtinFallback holds the builtin_interfaces types, used only when a schema
// refers to them without carrying them as dependencies (MCAP writers normally
// include them; some hand-made schemas do not). Their layout is fixed by ROS 2.
var builtinFallback = map[string]string{
	"builtin_interfaces/Time":     "int32 sec\nuint32 nanosec\n",
	"builtin_interfaces/Duration": "int32 sec\nuint32 nanosec\n",
}

// Parse parses a ros2msg schema: name is the MCAP schema name
// ("sensor_msgs/msg/JointState" or "sensor_msgs/JointState"), data its text.
//
// Type names resolve as in ROS 2 .msg files: "Type" alone is of the referring
// message's package; "pkg/Type" and "pkg/msg/Type" are the same type; "Header"
// alone is the referring package's Header if the schema defines one, else
// std_msgs/Header (the long-standing .msg convention). A type neither
// primitive nor defined is an error naming it, except
// builtin_interfaces/Time and Duration, whose fixed layout is supplied when
// the schema leaves them out.
func Parse(name string, data []byte) (*Schema, error) {
	rootName := normalizeName(strings.TrimSpace(name))
	raws, err := splitSections(rootName, data)
	if err != nil {
		return nil, fmt.Errorf("parse ros2msg schema %q: %w", name, err)
	}
	r := resolver{raws: raws, done: map[string]*msgType{}, visiting: map[string]bool{}}
	root, err := r.resolve(rootName, 1)
	if err != nil {
		return nil, fmt.Errorf("parse ros2msg schema %q: %w", name, err)
	}
	s := &Schema{Name: rootName, root: root, cdr2: true}
	s.scan(root, map[*msgType]bool{})
	return s, nil
}

// scan sets the schema-wide flags from the types reachable from t.
func (s *Schema) scan(t *msgType, seen map[*msgType]bool) {
	if seen[t] {
		return
	}
	seen[t] = true
	for i := range t.fields {
		f := &t.fields[i]
		if f.kind == kWString {
			s.wstring = true
		}
		if f.arr != single && (f.kind == kString || f.kind == kWString || f.kind == kMessage) {
			s.cdr2 = false
		}
		if f.kind == kMessage {
			s.scan(f.msg, seen)
		}
	}
}

// normalizeName turns "pkg/msg/Type" into "pkg/Type".
func normalizeName(n string) string {
	if parts := strings.Split(n, "/"); len(parts) == 3 && parts[1] == "msg" {
		return parts[0] + "/" + parts[2]
	}
	return n
}

func pkgOf(n string) string {
	if i := strings.IndexByte(n, '/'); i >= 0 {
		return n[:i]
	}
	return ""
}

// splitSections cuts the text into the main definition and its dependencies
// and parses each line's syntax.
func splitSections(rootName string, data []byte) (map[string]*rawType, error) {
	raws := map[string]*rawType{}
	cur := &rawType{name: rootName, pkg: pkgOf(rootName)}
	raws[rootName] = cur
	expectMSG := false
	lineNo := 0
	for len(data) > 0 {
		var line []byte
		if i := bytes.IndexByte(data, '\n'); i >= 0 {
			line, data = data[:i], data[i+1:]
		} else {
			line, data = data, nil
		}
		lineNo++
		text := strings.TrimSpace(string(line))
		if text == "" {
			continue
		}
		if strings.Trim(text, "=") == "" {
			expectMSG = true
			continue
		}
		if expectMSG {
			if strings.HasPrefix(text, "#") {
				continue
			}
			rest, ok := strings.CutPrefix(text, "MSG:")
			if !ok {
				return nil, fmt.Errorf("line %d: want \"MSG: package/Type\" after a line of '=', got %q", lineNo, clip(text))
			}
			n := normalizeName(strings.TrimSpace(rest))
			if !validTypeName(n) {
				return nil, fmt.Errorf("line %d: bad dependency name %q", lineNo, clip(n))
			}
			if _, dup := raws[n]; dup {
				return nil, fmt.Errorf("line %d: type %s defined twice", lineNo, n)
			}
			cur = &rawType{name: n, pkg: pkgOf(n)}
			raws[n] = cur
			expectMSG = false
			continue
		}
		if strings.HasPrefix(text, "#") {
			continue
		}
		f, skip, err := parseLine(text)
		if err != nil {
			return nil, fmt.Errorf("line %d (%s): %w", lineNo, cur.name, err)
		}
		if skip {
			continue
		}
		cur.lines = append(cur.lines, f)
	}
	if expectMSG {
		return nil, fmt.Errorf("line %d: a line of '=' with no \"MSG:\" line after it", lineNo)
	}
	return raws, nil
}

// parseLine parses "type name", "type name default" or "type NAME=value"
// (a constant: skip). Comments start at '#', except inside a constant's value.
func parseLine(text string) (f rawField, skip bool, err error) {
	i := strings.IndexAny(text, " \t")
	if i < 0 {
		return f, false, fmt.Errorf("want \"type name\", got %q", clip(text))
	}
	typ := text[:i]
	if j := strings.IndexByte(typ, '#'); j >= 0 {
		return f, false, fmt.Errorf("want \"type name\", got %q", clip(text))
	}
	rest := strings.TrimLeft(text[i:], " \t")
	j := 0
	for j < len(rest) && isIdent(rest[j]) {
		j++
	}
	name := rest[:j]
	after := strings.TrimLeft(rest[j:], " \t")
	if name == "" || !isLetter(name[0]) {
		return f, false, fmt.Errorf("bad field name in %q", clip(text))
	}
	if strings.HasPrefix(after, "=") {
		// A constant: its value is not on the wire.
		return f, true, nil
	}
	// Anything else after the name, up to a comment, is a default value;
	// defaults are not on the wire either.
	if j < len(rest) {
		if c := rest[j]; c != ' ' && c != '\t' && c != '#' {
			return f, false, fmt.Errorf("bad field name in %q", clip(text))
		}
	}
	f.name = name
	f.typ = typ
	base := typ
	if k := strings.IndexByte(typ, '['); k >= 0 {
		base = typ[:k]
		spec := typ[k:]
		if !strings.HasSuffix(spec, "]") || strings.Count(spec, "[") != 1 {
			return f, false, fmt.Errorf("bad array type %q", clip(typ))
		}
		inner := spec[1 : len(spec)-1]
		switch {
		case inner == "":
			f.arr = sequence
		case strings.HasPrefix(inner, "<="):
			n, err := parseBound(inner[2:])
			if err != nil {
				return f, false, fmt.Errorf("bad sequence bound in %q: %w", clip(typ), err)
			}
			f.arr, f.n = sequence, n
		default:
			n, err := parseBound(inner)
			if err != nil {
				return f, false, fmt.Errorf("bad array length in %q: %w", clip(typ), err)
			}
			f.arr, f.n = fixed, n
		}
	}
	if k := strings.Index(base, "<="); k >= 0 {
		b := base[:k]
		if b != "string" && b != "wstring" {
			return f, false, fmt.Errorf("a bound <= on %q: only strings have one", clip(base))
		}
		n, err := parseBound(base[k+2:])
		if err != nil {
			return f, false, fmt.Errorf("bad string bound in %q: %w", clip(typ), err)
		}
		base, f.strN = b, n
	}
	if base == "" {
		return f, false, fmt.Errorf("empty type in %q", clip(text))
	}
	f.base = base
	return f, false, nil
}

func parseBound(s string) (int, error) {
	n, err := strconv.Atoi(s)
	if err != nil || n <= 0 || n > maxFixedLen {
		return 0, fmt.Errorf("want an integer in 1..%d, got %q", maxFixedLen, clip(s))
	}
	return n, nil
}

func isLetter(c byte) bool { return c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z' }
func isIdent(c byte) bool  { return isLetter(c) || c >= '0' && c <= '9' || c == '_' }

func validTypeName(n string) bool {
	parts := strings.Split(n, "/")
	if len(parts) > 2 {
		return false
	}
	for _, p := range parts {
		if p == "" || !isLetter(p[0]) {
			return false
		}
		for i := 0; i < len(p); i++ {
			if !isIdent(p[i]) {
				return false
			}
		}
	}
	return true
}

// clip shortens text quoted in errors.
func clip(s string) string {
	if len(s) > 80 {
		return s[:80] + "…"
	}
	return s
}

type resolver struct {
	raws     map[string]*rawType
	done     map[string]*msgType
	visiting map[string]bool
}

// resolve builds the type named n (already normalized) at nesting depth d.
func (r *resolver) resolve(n string, d int) (*msgType, error) {
	if t, ok := r.done[n]; ok {
		if d+t.depth-1 > maxDepth {
			return nil, fmt.Errorf("message types nest deeper than %d levels", maxDepth)
		}
		return t, nil
	}
	if d > maxDepth {
		return nil, fmt.Errorf("message types nest deeper than %d levels", maxDepth)
	}
	if r.visiting[n] {
		return nil, fmt.Errorf("type %s contains itself", n)
	}
	raw, ok := r.raws[n]
	if !ok {
		text, builtin := builtinFallback[n]
		if !builtin {
			return nil, fmt.Errorf("unknown type %s", n)
		}
		raw = &rawType{name: n, pkg: pkgOf(n)}
		for _, l := range strings.Split(strings.TrimSpace(text), "\n") {
			f, _, err := parseLine(l)
			if err != nil {
				return nil, err
			}
			raw.lines = append(raw.lines, f)
		}
	}
	r.visiting[n] = true
	t := &msgType{name: n, fields: make([]field, 0, len(raw.lines)), depth: 1}
	seen := map[string]bool{}
	size := 0
	for _, rf := range raw.lines {
		if seen[rf.name] {
			return nil, fmt.Errorf("%s: field %s defined twice", n, rf.name)
		}
		seen[rf.name] = true
		f := field{name: rf.name, arr: rf.arr, n: rf.n, strN: rf.strN, ftype: rf.typ}
		elemMin := 0
		if k, ok := primitives[rf.base]; ok {
			f.kind = k
			if rf.strN > 0 && k != kString && k != kWString {
				return nil, fmt.Errorf("%s: field %s: a bound on %s", n, rf.name, rf.base)
			}
			elemMin = k.size()
			if elemMin == 0 {
				elemMin = 4 // a string's length
			}
		} else {
			dep := r.typeName(raw.pkg, rf.base)
			if !validTypeName(dep) {
				return nil, fmt.Errorf("%s: field %s: bad type name %q", n, rf.name, clip(rf.base))
			}
			m, err := r.resolve(dep, d+1)
			if err != nil {
				return nil, fmt.Errorf("%s: field %s: %w", n, rf.name, err)
			}
			f.kind, f.msg = kMessage, m
			elemMin = m.minSize
			if m.depth+1 > t.depth {
				t.depth = m.depth + 1
			}
		}
		switch f.arr {
		case single:
			size = satAdd(size, elemMin)
		case fixed:
			size = satAdd(size, satMul(elemMin, f.n))
		case sequence:
			size = satAdd(size, 4)
		}
		t.fields = append(t.fields, f)
	}
	if len(t.fields) == 0 {
		// ROS 2 puts one uint8 on the wire for a message without fields
		// (structure_needs_at_least_one_member, in the ROS 2 design article
		// "Legacy interface definition"; noted from memory).
		size = 1
	}
	t.minSize = size
	delete(r.visiting, n)
	r.done[n] = t
	return t, nil
}

// typeName resolves a field's type name as written in a message of package
// pkg.
func (r *resolver) typeName(pkg, base string) string {
	base = normalizeName(base)
	if strings.IndexByte(base, '/') >= 0 {
		return base
	}
	own := base
	if pkg != "" {
		own = pkg + "/" + base
	}
	if base == "Header" {
		if _, ok := r.raws[own]; !ok {
			return "std_msgs/Header"
		}
	}
	return own
}

const satMax = 1 << 30

func satAdd(a, b int) int {
	if a+b > satMax {
		return satMax
	}
	return a + b
}

func satMul(a, b int) int {
	if b != 0 && a > satMax/b {
		return satMax
	}
	return a * b
}
