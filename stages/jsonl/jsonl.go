// Package jsonl decodes one fleet log line (SPEC §1) into a reusable Line.
//
// It is hand-written rather than built on encoding/json because the line
// format needs things a general decoder does not give: the bare tokens NaN,
// Infinity and -Infinity must be recognised inside obs/act so that such a
// line is classified non_finite instead of malformed; t must be an exact
// int64 JSON integer, never rounded through float64; every rejection needs a
// reason; and ingest decodes hundreds of megabytes of lines, so the steady
// state must not allocate and must run several times faster than a reflective
// decoder.
package jsonl

import (
	"errors"
	"fmt"
	"math"
	"strconv"
	"unicode/utf16"
	"unicode/utf8"
)

// Line is the decoded content of one fleet log line (SPEC §1). Parse reuses its slices.
type Line struct {
	Unit       string
	Embodiment string
	T          int64
	Obs        []float64 // reused between calls (Obs[:0]); at most MaxValues+1 values
	Act        []float64 // reused; meaningful only when HasAct; at most MaxValues+1 values
	HasAct     bool
	NonFinite  bool   // a NaN, Infinity or -Infinity token, or a number that overflows float64, in obs or act
	Ev         string // "start", "end", or "" (absent, null, or any other value: ignored per SPEC)
	Task       string
	HasTask    bool
	Success    bool
	HasSuccess bool
	Img        []Camera // members of "img" whose value is a string, in written order; reused
}

// Camera is one member of a line's "img" object, as written.
type Camera struct{ Name, Ref string }

// MaxValues bounds the numbers kept of one obs or act array: a longer array
// keeps its first MaxValues+1, enough to tell that it is longer than any
// embodiment's vector (the config loader refuses obs or act above
// MaxValues), so the line is still a dim_mismatch, while a 64 MiB line of
// 3·10⁷ numbers costs 8 MB of floats instead of 256 MB. The rest of the
// array is still read, so syntax errors, non-numbers and non-finite values
// anywhere in it count as before.
const MaxValues = 1_000_000

// maxDepth bounds the nesting of arrays and objects (the line's own object
// counts as 1) so that a hostile line cannot exhaust the stack.
const maxDepth = 1000

// smallImg is the number of cameras up to which duplicate camera names are
// found by a linear scan; beyond it a map keeps a pathological line linear.
const smallImg = 16

// Indices of the fields whose type or presence is checked, in the order their
// errors are reported.
const (
	fUnit = iota
	fEmbodiment
	fT
	fObs
	fAct
	fTask
	fSuccess
	fImg
	nFields
)

// required has a bit set for every field a line must carry.
const required = 1<<fUnit | 1<<fEmbodiment | 1<<fT | 1<<fObs

func fieldName(f int) string {
	switch f {
	case fUnit:
		return "unit"
	case fEmbodiment:
		return "embodiment"
	case fT:
		return "t"
	case fObs:
		return "obs"
	case fAct:
		return "act"
	case fTask:
		return "task"
	case fSuccess:
		return "success"
	default:
		return "img"
	}
}

// pow10 holds the powers of ten that float64 represents exactly; it is a
// read-only lookup table for the exact fast path of number conversion.
var pow10 = [...]float64{
	1e0, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10, 1e11,
	1e12, 1e13, 1e14, 1e15, 1e16, 1e17, 1e18, 1e19, 1e20, 1e21, 1e22,
}

// Parse decodes b (one line, without its line end) into l. A non-nil error means
// the line is malformed; its text says why (e.g. `field "t": not an integer`).
//
// On error the content of l is unspecified, but its slices stay reusable.
// Duplicate keys follow "the last one wins", including for the type check: a
// field whose last occurrence is well typed is accepted. Within "img", a
// repeated camera name keeps its first position and takes the later value; a
// later null removes it.
func Parse(b []byte, l *Line) error {
	p := parser{b: b}
	return p.line(l)
}

// parser is the decoding state of one Parse call.
type parser struct {
	b   []byte
	pos int
	// Unescaped strings are written into these; a result is valid until the
	// next string decoded into the same buffer. Camera names use their own
	// buffer because a name must survive the decoding of its value.
	scratch, nameScratch []byte
}

// line decodes the whole line: the object, its members in written order,
// then the checks that need the last occurrence of every field.
func (p *parser) line(l *Line) error {
	// Optional fields start absent; strings compared for reuse (Unit,
	// Embodiment, Task, Img entries) keep the previous line's value until
	// they are decided.
	l.Obs = l.Obs[:0]
	l.Act = l.Act[:0]
	l.HasAct = false
	l.NonFinite = false
	l.Ev = ""
	l.HasTask = false
	l.Success = false
	l.HasSuccess = false
	l.Img = l.Img[:0]

	var (
		seen         uint
		bad          [nFields]string // why the last occurrence of a field is unusable
		nfObs, nfAct bool
	)

	p.ws()
	if p.peek() != '{' {
		return p.errAt("'{' starting the line's object")
	}
	p.pos++
	p.ws()
	if p.peek() == '}' {
		p.pos++
	} else {
		for {
			p.ws()
			if p.peek() != '"' {
				return p.errAt("a string key")
			}
			key, err := p.str(&p.scratch)
			if err != nil {
				return err
			}
			p.ws()
			if p.peek() != ':' {
				return p.errAt("':' after an object key")
			}
			p.pos++
			p.ws()
			c := p.peek()
			// skip is set when the value is not consumed below (unknown
			// field, or a known field of the wrong type): it must still be
			// valid JSON.
			skip := false
			switch string(key) {
			case "unit":
				seen |= 1 << fUnit
				if c != '"' {
					bad[fUnit] = "not a string"
					skip = true
					break
				}
				s, err := p.str(&p.scratch)
				if err != nil {
					return err
				}
				if !validUnit(s) {
					bad[fUnit] = "does not match [A-Za-z0-9._-]{1,64}"
					break
				}
				setString(&l.Unit, s)
				bad[fUnit] = ""
			case "embodiment":
				seen |= 1 << fEmbodiment
				if c != '"' {
					bad[fEmbodiment] = "not a string"
					skip = true
					break
				}
				s, err := p.str(&p.scratch)
				if err != nil {
					return err
				}
				setString(&l.Embodiment, s)
				bad[fEmbodiment] = ""
			case "t":
				seen |= 1 << fT
				if c != '-' && !isDigit(c) {
					bad[fT] = "not an integer"
					skip = true
					break
				}
				t, why, err := p.integer()
				if err != nil {
					return err
				}
				l.T = t
				bad[fT] = why
			case "obs":
				seen |= 1 << fObs
				if c != '[' {
					bad[fObs] = "not an array"
					skip = true
					break
				}
				var err error
				l.Obs, nfObs, bad[fObs], err = p.floats(l.Obs)
				if err != nil {
					return err
				}
			case "act":
				switch c {
				case '[':
					var err error
					l.Act, nfAct, bad[fAct], err = p.floats(l.Act)
					if err != nil {
						return err
					}
					l.HasAct = true
				case 'n':
					if err := p.lit("null"); err != nil {
						return err
					}
					l.Act, l.HasAct, nfAct, bad[fAct] = l.Act[:0], false, false, ""
				default:
					bad[fAct] = "neither an array nor null"
					skip = true
				}
			case "ev":
				l.Ev = ""
				if c != '"' {
					skip = true
					break
				}
				s, err := p.str(&p.scratch)
				if err != nil {
					return err
				}
				switch string(s) {
				case "start":
					l.Ev = "start"
				case "end":
					l.Ev = "end"
				}
			case "task":
				switch c {
				case '"':
					s, err := p.str(&p.scratch)
					if err != nil {
						return err
					}
					setString(&l.Task, s)
					l.HasTask, bad[fTask] = true, ""
				case 'n':
					if err := p.lit("null"); err != nil {
						return err
					}
					l.HasTask, bad[fTask] = false, ""
				default:
					bad[fTask] = "neither a string nor null"
					skip = true
				}
			case "success":
				switch c {
				case 't', 'f', 'n':
					v, err := p.boolOrNull()
					if err != nil {
						return err
					}
					l.Success, l.HasSuccess, bad[fSuccess] = v == 't', v != 'n', ""
				default:
					bad[fSuccess] = "neither a bool nor null"
					skip = true
				}
			case "img":
				switch c {
				case '{':
					var err error
					l.Img, bad[fImg], err = p.img(l.Img)
					if err != nil {
						return err
					}
				case 'n':
					if err := p.lit("null"); err != nil {
						return err
					}
					l.Img, bad[fImg] = l.Img[:0], ""
				default:
					bad[fImg] = "neither an object nor null"
					skip = true
				}
			default:
				skip = true
			}
			if skip {
				if err := p.skip(2); err != nil {
					return err
				}
			}
			p.ws()
			if p.peek() == ',' {
				p.pos++
				continue
			}
			if p.peek() != '}' {
				return p.errAt("',' or '}' after an object member")
			}
			p.pos++
			break
		}
	}
	p.ws()
	if p.pos != len(p.b) {
		return p.errAt("end of line after the object")
	}

	for f := 0; f < nFields; f++ {
		if bad[f] != "" {
			return fmt.Errorf("field %q: %s", fieldName(f), bad[f])
		}
		if required&(1<<f) != 0 && seen&(1<<f) == 0 {
			return fmt.Errorf("field %q: missing", fieldName(f))
		}
	}
	if !l.HasTask {
		l.Task = ""
	}
	l.NonFinite = nfObs || (l.HasAct && nfAct)
	return nil
}

// setString stores b in *dst, converting (and so allocating) only when the
// bytes differ from the value already there: consecutive lines usually repeat
// the unit, embodiment, task and camera names.
func setString(dst *string, b []byte) {
	if string(b) != *dst {
		*dst = string(b)
	}
}

// validUnit reports whether s matches ^[A-Za-z0-9._-]{1,64}$ (SPEC §1).
// ValidUnit reports whether s matches SPEC §1's unit pattern; recordings
// (SPEC §7.1) check their unit with it too, so both formats hold one rule.
func ValidUnit(s string) bool { return validUnit([]byte(s)) }

func validUnit(s []byte) bool {
	if len(s) == 0 || len(s) > 64 {
		return false
	}
	for _, c := range s {
		switch {
		case 'a' <= c && c <= 'z', 'A' <= c && c <= 'Z', isDigit(c), c == '.', c == '_', c == '-':
		default:
			return false
		}
	}
	return true
}

func isDigit(c byte) bool { return '0' <= c && c <= '9' }

// ws skips JSON whitespace: space, tab, line feed, carriage return (RFC 8259 §2).
func (p *parser) ws() {
	for p.pos < len(p.b) {
		switch p.b[p.pos] {
		case ' ', '\t', '\n', '\r':
			p.pos++
		default:
			return
		}
	}
}

// peek returns the byte at the cursor, or 0 at the end of the line (a NUL
// byte is never valid there either).
func (p *parser) peek() byte {
	if p.pos < len(p.b) {
		return p.b[p.pos]
	}
	return 0
}

// errAt reports a syntax error at the cursor, saying what was expected.
func (p *parser) errAt(want string) error {
	if p.pos >= len(p.b) {
		return fmt.Errorf("offset %d: unexpected end of line, want %s", p.pos, want)
	}
	if c := p.b[p.pos]; c >= utf8.RuneSelf {
		return fmt.Errorf("offset %d: unexpected byte 0x%02x, want %s", p.pos, c, want)
	}
	return fmt.Errorf("offset %d: unexpected byte %q, want %s", p.pos, p.b[p.pos], want)
}

// lit consumes the literal word (true, false or null).
func (p *parser) lit(word string) error {
	if len(p.b)-p.pos < len(word) || string(p.b[p.pos:p.pos+len(word)]) != word {
		return p.errAt("the literal " + word)
	}
	p.pos += len(word)
	return nil
}

// boolOrNull consumes true, false or null and returns its first letter.
func (p *parser) boolOrNull() (byte, error) {
	c := p.peek()
	word := "null"
	switch c {
	case 't':
		word = "true"
	case 'f':
		word = "false"
	}
	return c, p.lit(word)
}

// str decodes the string at the cursor (which is at its opening quote). The
// result aliases the line when the string has no escapes, else *buf.
//
// RFC 8259 §7: control characters below U+0020 must be escaped; the escapes
// are \" \\ \/ \b \f \n \r \t and \uXXXX, with UTF-16 surrogate pairs for
// characters beyond the BMP. A lone surrogate decodes to U+FFFD, as
// encoding/json does. RFC 8259 §8.1: the text must be UTF-8.
func (p *parser) str(buf *[]byte) ([]byte, error) {
	b := p.b
	start := p.pos + 1
	for i := start; i < len(b); {
		c := b[i]
		switch {
		case c == '"':
			p.pos = i + 1
			return b[start:i], nil
		case c == '\\':
			return p.strEscaped(buf, start, i)
		case c < 0x20:
			p.pos = i
			return nil, p.errAt("no unescaped control character in a string")
		case c < utf8.RuneSelf:
			i++
		default:
			r, size := utf8.DecodeRune(b[i:])
			if r == utf8.RuneError && size == 1 {
				p.pos = i
				return nil, fmt.Errorf("offset %d: invalid UTF-8 in a string", i)
			}
			i += size
		}
	}
	p.pos = len(b)
	return nil, p.errAt("'\"' closing a string")
}

// strEscaped continues str from the first backslash at i, unescaping into *buf.
func (p *parser) strEscaped(buf *[]byte, start, i int) ([]byte, error) {
	b := p.b
	out := append((*buf)[:0], b[start:i]...)
	defer func() { *buf = out[:0] }()
	for i < len(b) {
		c := b[i]
		switch {
		case c == '"':
			p.pos = i + 1
			return out, nil
		case c == '\\':
			if i+1 >= len(b) {
				p.pos = len(b)
				return nil, p.errAt("an escape character")
			}
			next, ok := 0, false
			if out, next, ok = AppendEscape(out, b, i+1); !ok {
				if b[i+1] != 'u' {
					p.pos = i + 1
					return nil, p.errAt("an escape character")
				}
				p.pos = i + 2
				for p.pos < len(b) && p.pos < i+6 && hexVal(b[p.pos]) >= 0 {
					p.pos++
				}
				return nil, p.errAt("four hex digits after \\u")
			}
			i = next
		case c < 0x20:
			p.pos = i
			return nil, p.errAt("no unescaped control character in a string")
		case c < utf8.RuneSelf:
			out = append(out, c)
			i++
		default:
			r, size := utf8.DecodeRune(b[i:])
			if r == utf8.RuneError && size == 1 {
				p.pos = i
				return nil, fmt.Errorf("offset %d: invalid UTF-8 in a string", i)
			}
			out = append(out, b[i:i+size]...)
			i += size
		}
	}
	p.pos = len(b)
	return nil, p.errAt("'\"' closing a string")
}

// AppendEscape appends to out what the escape whose letter is b[i] (the
// byte after a backslash) stands for (RFC 8259 §7), and returns the index
// after it; ok is false for an unknown letter or a \u without four hex
// digits. A surrogate pair written as two \u escapes is one character; a
// lone surrogate is U+FFFD, and what follows it is read on its own, as
// encoding/json does. It is exported so that every JSON reader of hindcast
// (JSON Lines, JSON messages in recordings) unescapes strings the same way.
func AppendEscape(out, b []byte, i int) (_ []byte, next int, ok bool) {
	e := b[i]
	i++
	switch e {
	case '"', '\\', '/':
		return append(out, e), i, true
	case 'b':
		return append(out, '\b'), i, true
	case 'f':
		return append(out, '\f'), i, true
	case 'n':
		return append(out, '\n'), i, true
	case 'r':
		return append(out, '\r'), i, true
	case 't':
		return append(out, '\t'), i, true
	case 'u':
		r := hex4(b, i)
		if r < 0 {
			return out, i, false
		}
		i += 4
		if utf16.IsSurrogate(r) {
			r2 := rune(-1)
			if i+1 < len(b) && b[i] == '\\' && b[i+1] == 'u' {
				r2 = hex4(b, i+2)
			}
			if d := utf16.DecodeRune(r, r2); d != utf8.RuneError {
				r = d
				i += 6
			} else {
				r = utf8.RuneError
			}
		}
		return utf8.AppendRune(out, r), i, true
	}
	return out, i, false
}

// hex4 decodes four hex digits at b[i:], or returns -1.
func hex4(b []byte, i int) rune {
	if len(b)-i < 4 {
		return -1
	}
	var r rune
	for _, c := range b[i : i+4] {
		v := hexVal(c)
		if v < 0 {
			return -1
		}
		r = r<<4 | v
	}
	return r
}

// hexVal returns the value of the hex digit c, or -1.
func hexVal(c byte) rune {
	switch {
	case '0' <= c && c <= '9':
		return rune(c - '0')
	case 'a' <= c && c <= 'f':
		return rune(c-'a') + 10
	case 'A' <= c && c <= 'F':
		return rune(c-'A') + 10
	}
	return -1
}

// scanNumber consumes a number per the RFC 8259 §6 grammar
//
//	number = [ minus ] int [ frac ] [ exp ]
//	int    = zero / ( digit1-9 *DIGIT )
//	frac   = decimal-point 1*DIGIT
//	exp    = e [ minus / plus ] 1*DIGIT
//
// and reports whether it is an integer (no frac, no exp).
func (p *parser) scanNumber() (isInt bool, err error) {
	b := p.b
	i := p.pos
	if i < len(b) && b[i] == '-' {
		i++
	}
	switch {
	case i < len(b) && b[i] == '0':
		i++
	case i < len(b) && '1' <= b[i] && b[i] <= '9':
		for i < len(b) && isDigit(b[i]) {
			i++
		}
	default:
		p.pos = i
		return false, p.errAt("a digit")
	}
	isInt = true
	if i < len(b) && b[i] == '.' {
		isInt = false
		i++
		if i >= len(b) || !isDigit(b[i]) {
			p.pos = i
			return false, p.errAt("a digit after '.'")
		}
		for i < len(b) && isDigit(b[i]) {
			i++
		}
	}
	if i < len(b) && (b[i] == 'e' || b[i] == 'E') {
		isInt = false
		i++
		if i < len(b) && (b[i] == '+' || b[i] == '-') {
			i++
		}
		if i >= len(b) || !isDigit(b[i]) {
			p.pos = i
			return false, p.errAt("a digit in the exponent")
		}
		for i < len(b) && isDigit(b[i]) {
			i++
		}
	}
	p.pos = i
	return isInt, nil
}

// integer consumes a number and returns it as an int64 without going through
// float64. A valid number that is not an exact int64 integer is not a syntax
// error: why says what is wrong with it as a value of t.
func (p *parser) integer() (t int64, why string, err error) {
	start := p.pos
	isInt, err := p.scanNumber()
	if err != nil {
		return 0, "", err
	}
	if !isInt {
		return 0, "not an integer", nil
	}
	s := p.b[start:p.pos]
	neg := s[0] == '-'
	if neg {
		s = s[1:]
	}
	limit := uint64(math.MaxInt64)
	if neg {
		limit++ // |math.MinInt64|
	}
	var u uint64
	for _, c := range s {
		d := uint64(c - '0')
		if u > (limit-d)/10 {
			return 0, "out of int64 range", nil
		}
		u = u*10 + d
	}
	if neg {
		return -int64(u-1) - 1, "", nil // no overflow at math.MinInt64
	}
	return int64(u), "", nil
}

// floats decodes the array of numbers at the cursor (at its '[') into dst[:0].
// The bare tokens NaN, Infinity and -Infinity are accepted as elements, and
// like a number beyond float64's range they set nonFinite. An element of
// another type makes why non-empty; it is still checked to be valid JSON.
func (p *parser) floats(dst []float64) (out []float64, nonFinite bool, why string, err error) {
	out = dst[:0]
	p.pos++
	p.ws()
	if p.peek() == ']' {
		p.pos++
		return out, false, "", nil
	}
	// n counts the elements read; out keeps the first MaxValues+1 of them.
	n := 0
	for {
		var f float64
		p.ws()
		switch c := p.peek(); {
		case c == '-' && p.hasPrefix("-Infinity"):
			p.pos += len("-Infinity")
			f = math.Inf(-1)
			nonFinite = true
		case c == '-' || isDigit(c):
			v, inf, err := p.float()
			if err != nil {
				return out, false, "", err
			}
			f = v
			nonFinite = nonFinite || inf
		case c == 'N' && p.hasPrefix("NaN"):
			p.pos += len("NaN")
			f = math.NaN()
			nonFinite = true
		case c == 'I' && p.hasPrefix("Infinity"):
			p.pos += len("Infinity")
			f = math.Inf(1)
			nonFinite = true
		default:
			if err := p.skip(3); err != nil {
				return out, false, "", err
			}
			if why == "" {
				why = "element " + strconv.Itoa(n) + " is not a number"
			}
			// f stays 0: the element keeps its index in later messages.
		}
		if n <= MaxValues {
			out = append(out, f)
		}
		n++
		p.ws()
		switch p.peek() {
		case ',':
			p.pos++
		case ']':
			p.pos++
			return out, nonFinite, why, nil
		default:
			return out, false, "", p.errAt("',' or ']' in an array")
		}
	}
}

func (p *parser) hasPrefix(s string) bool {
	return len(p.b)-p.pos >= len(s) && string(p.b[p.pos:p.pos+len(s)]) == s
}

// float consumes a number (RFC 8259 §6) and converts it exactly as
// strconv.ParseFloat(s, 64) does. Most fleet numbers have few digits and a
// small exponent; for those the decimal mantissa and the power of ten are both
// exact in float64, so one correctly rounded multiplication or division gives
// the correctly rounded result (Clinger's fast path, the same one strconv
// takes). Other numbers go through strconv. inf reports a number beyond
// float64's range, returned as ±Inf.
func (p *parser) float() (f float64, inf bool, err error) {
	b := p.b
	start := p.pos
	i := start
	neg := b[i] == '-'
	if neg {
		i++
	}
	var (
		mant  uint64
		nd    int  // significant digits in mant
		trunc bool // digits did not fit in mant
		exp   int  // decimal exponent applied to mant
	)
	digit := func(c byte, frac bool) {
		if nd >= 19 {
			trunc = true
			return
		}
		mant = mant*10 + uint64(c-'0')
		if mant != 0 {
			nd++
		}
		if frac {
			exp--
		}
	}
	switch {
	case i < len(b) && b[i] == '0':
		i++
	case i < len(b) && '1' <= b[i] && b[i] <= '9':
		for i < len(b) && isDigit(b[i]) {
			digit(b[i], false)
			i++
		}
	default:
		p.pos = i
		return 0, false, p.errAt("a digit")
	}
	if i < len(b) && b[i] == '.' {
		i++
		if i >= len(b) || !isDigit(b[i]) {
			p.pos = i
			return 0, false, p.errAt("a digit after '.'")
		}
		for i < len(b) && isDigit(b[i]) {
			digit(b[i], true)
			i++
		}
	}
	if i < len(b) && (b[i] == 'e' || b[i] == 'E') {
		i++
		eneg := false
		if i < len(b) && (b[i] == '+' || b[i] == '-') {
			eneg = b[i] == '-'
			i++
		}
		if i >= len(b) || !isDigit(b[i]) {
			p.pos = i
			return 0, false, p.errAt("a digit in the exponent")
		}
		e := 0
		for i < len(b) && isDigit(b[i]) {
			if e < 1_000_000 {
				e = e*10 + int(b[i]-'0')
			}
			i++
		}
		if eneg {
			e = -e
		}
		exp += e
	}
	p.pos = i
	if !trunc {
		switch {
		case mant == 0:
			f = 0
		case mant < 1<<53 && exp >= 0 && exp < len(pow10):
			f = float64(mant) * pow10[exp]
		case mant < 1<<53 && exp < 0 && -exp < len(pow10):
			f = float64(mant) / pow10[-exp]
		default:
			return p.floatSlow(start)
		}
		if neg {
			f = -f
		}
		return f, false, nil
	}
	return p.floatSlow(start)
}

// floatSlow converts the already scanned number b[start:p.pos] with strconv.
func (p *parser) floatSlow(start int) (float64, bool, error) {
	f, err := strconv.ParseFloat(string(p.b[start:p.pos]), 64)
	if err != nil {
		if errors.Is(err, strconv.ErrRange) && math.IsInf(f, 0) {
			return f, true, nil
		}
		return 0, false, fmt.Errorf("offset %d: converting number: %w", start, err)
	}
	return f, false, nil
}

// skip consumes any JSON value (RFC 8259 §3), checking it fully. depth is
// the nesting depth an array or object opened here would have.
func (p *parser) skip(depth int) error {
	switch c := p.peek(); {
	case c == '{', c == '[':
		if depth > maxDepth {
			return fmt.Errorf("offset %d: nesting deeper than %d", p.pos, maxDepth)
		}
		end := byte('}')
		if c == '[' {
			end = ']'
		}
		p.pos++
		p.ws()
		if p.peek() == end {
			p.pos++
			return nil
		}
		for {
			p.ws()
			if c == '{' {
				if p.peek() != '"' {
					return p.errAt("a string key")
				}
				if _, err := p.str(&p.scratch); err != nil {
					return err
				}
				p.ws()
				if p.peek() != ':' {
					return p.errAt("':' after an object key")
				}
				p.pos++
				p.ws()
			}
			if err := p.skip(depth + 1); err != nil {
				return err
			}
			p.ws()
			switch p.peek() {
			case ',':
				p.pos++
			case end:
				p.pos++
				return nil
			default:
				return p.errAt("',' or '" + string(end) + "'")
			}
		}
	case c == '"':
		_, err := p.str(&p.scratch)
		return err
	case c == 't':
		return p.lit("true")
	case c == 'f':
		return p.lit("false")
	case c == 'n':
		return p.lit("null")
	case c == '-' || isDigit(c):
		_, err := p.scanNumber()
		return err
	default:
		return p.errAt("a JSON value")
	}
}

// img decodes the object at the cursor (at its '{') into old[:0]: members
// whose value is a string become cameras, null members are absent cameras,
// other values make why non-empty. Strings already in old's backing array at
// the same position are reused.
func (p *parser) img(old []Camera) (img []Camera, why string, err error) {
	img = old[:0]
	var (
		idx  map[string]int // name → index in img, once img is large
		dead []bool         // parallel to img while idx is in use: removed by a later null
	)
	p.pos++
	p.ws()
	if p.peek() == '}' {
		p.pos++
		return img, "", nil
	}
	for {
		p.ws()
		if p.peek() != '"' {
			return img, "", p.errAt("a string key")
		}
		name, err := p.str(&p.nameScratch)
		if err != nil {
			return img, "", err
		}
		p.ws()
		if p.peek() != ':' {
			return img, "", p.errAt("':' after an object key")
		}
		p.pos++
		p.ws()

		j := -1 // an earlier live camera of the same name
		if idx != nil {
			if k, ok := idx[string(name)]; ok {
				j = k
			}
		} else {
			for k := range img {
				if img[k].Name == string(name) {
					j = k
					break
				}
			}
		}

		switch p.peek() {
		case '"':
			ref, err := p.str(&p.scratch)
			if err != nil {
				return img, "", err
			}
			if j >= 0 {
				setString(&img[j].Ref, ref)
				break
			}
			var c Camera
			if len(img) < cap(img) {
				c = img[:len(img)+1][len(img)]
			}
			setString(&c.Name, name)
			setString(&c.Ref, ref)
			img = append(img, c)
			switch {
			case idx != nil:
				idx[c.Name] = len(img) - 1
				dead = append(dead, false)
			case len(img) > smallImg:
				idx = make(map[string]int, 2*len(img))
				for k := range img {
					idx[img[k].Name] = k
				}
				dead = make([]bool, len(img))
			}
		case 'n':
			if err := p.lit("null"); err != nil {
				return img, "", err
			}
			switch {
			case j < 0:
			case idx != nil:
				dead[j] = true
				delete(idx, img[j].Name)
			default:
				img = append(img[:j], img[j+1:]...)
			}
		default:
			if err := p.skip(3); err != nil {
				return img, "", err
			}
			if why == "" {
				why = fmt.Sprintf("member %q is neither a string nor null", name)
			}
		}
		p.ws()
		switch p.peek() {
		case ',':
			p.pos++
		case '}':
			p.pos++
			if idx != nil {
				live := img[:0]
				for k, c := range img {
					if !dead[k] {
						live = append(live, c)
					}
				}
				img = live
			}
			return img, why, nil
		default:
			return img, "", p.errAt("',' or '}' after an object member")
		}
	}
}
