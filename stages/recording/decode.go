package recording

import (
	"encoding/base64"
	"errors"
	"fmt"
	"math"
	"strconv"

	"google.golang.org/protobuf/proto"
	"google.golang.org/protobuf/reflect/protodesc"
	"google.golang.org/protobuf/reflect/protoreflect"
	"google.golang.org/protobuf/types/descriptorpb"
	"google.golang.org/protobuf/types/dynamicpb"

	"hindcast/pipeline"
	"hindcast/stages/jsonl"
	"hindcast/stages/recording/mcapread"
	"hindcast/stages/recording/ros2msg"
)

// A decoder turns one payload into a generic value tree: map[string]any for
// a message, []any / []float64 / []int64 / []uint64 / []bool / []string for
// arrays, []byte for bytes, float64 / int64 / uint64 / bool / string for
// scalars. Bytes in the tree may alias the payload.
type decoder func(payload []byte) (any, error)

// newDecoder builds the decoder of a channel once (SPEC §7.2): the schema is
// parsed here, not per message, so a 100 Hz topic costs one parse.
func newDecoder(ch *mcapread.Channel) (decoder, error) {
	switch ch.MessageEncoding {
	case "json":
		if ch.Schema != nil && ch.Schema.Encoding != "" && ch.Schema.Encoding != "jsonschema" {
			return nil, fmt.Errorf("json message with schema encoding %q", ch.Schema.Encoding)
		}
		return func(p []byte) (any, error) { return parseJSON(p) }, nil
	case "protobuf":
		if ch.Schema == nil || ch.Schema.Encoding != "protobuf" {
			return nil, errors.New("protobuf message without a protobuf schema")
		}
		return protobufDecoder(ch.Schema)
	case "cdr":
		if ch.Schema == nil || ch.Schema.Encoding != "ros2msg" {
			return nil, errors.New("cdr message without a ros2msg schema")
		}
		s, err := ros2msg.Parse(ch.Schema.Name, ch.Schema.Data)
		if err != nil {
			return nil, fmt.Errorf("parse schema %s: %w", ch.Schema.Name, err)
		}
		return func(p []byte) (any, error) {
			m, err := s.Decode(p)
			if err != nil {
				return nil, err
			}
			return m, nil
		}, nil
	}
	return nil, fmt.Errorf("message encoding %q not supported", ch.MessageEncoding)
}

// protobufDecoder resolves the schema's message by its full name in the
// FileDescriptorSet and decodes payloads with dynamicpb (no generated code).
func protobufDecoder(s *mcapread.Schema) (decoder, error) {
	var fds descriptorpb.FileDescriptorSet
	if err := proto.Unmarshal(s.Data, &fds); err != nil {
		return nil, fmt.Errorf("parse FileDescriptorSet %s: %w", s.Name, err)
	}
	files, err := protodesc.NewFiles(&fds)
	if err != nil {
		return nil, fmt.Errorf("resolve FileDescriptorSet %s: %w", s.Name, err)
	}
	d, err := files.FindDescriptorByName(protoreflect.FullName(s.Name))
	if err != nil {
		return nil, fmt.Errorf("find message %s: %w", s.Name, err)
	}
	md, ok := d.(protoreflect.MessageDescriptor)
	if !ok {
		return nil, fmt.Errorf("%s is not a message", s.Name)
	}
	return func(p []byte) (any, error) {
		m := dynamicpb.NewMessage(md)
		if err := proto.Unmarshal(p, m); err != nil {
			return nil, err
		}
		return protoTree(m), nil
	}, nil
}

// protoTree converts a protobuf message to the generic tree; every field of
// the type is present, an unset one as its default (SPEC §7.2).
func protoTree(m protoreflect.Message) map[string]any {
	fields := m.Descriptor().Fields()
	out := make(map[string]any, fields.Len())
	for i := 0; i < fields.Len(); i++ {
		fd := fields.Get(i)
		if fd.IsMap() {
			continue
		}
		v := m.Get(fd)
		if fd.IsList() {
			l := v.List()
			switch fd.Kind() {
			case protoreflect.MessageKind, protoreflect.GroupKind, protoreflect.StringKind,
				protoreflect.BytesKind, protoreflect.EnumKind, protoreflect.BoolKind:
				arr := make([]any, l.Len())
				for j := range arr {
					arr[j] = protoScalar(fd, l.Get(j))
				}
				out[string(fd.Name())] = arr
			default:
				arr := make([]float64, l.Len())
				for j := range arr {
					arr[j] = protoScalar(fd, l.Get(j)).(float64)
				}
				out[string(fd.Name())] = arr
			}
			continue
		}
		out[string(fd.Name())] = protoScalar(fd, v)
	}
	return out
}

func protoScalar(fd protoreflect.FieldDescriptor, v protoreflect.Value) any {
	switch fd.Kind() {
	case protoreflect.MessageKind, protoreflect.GroupKind:
		return protoTree(v.Message())
	case protoreflect.EnumKind:
		if ev := fd.Enum().Values().ByNumber(v.Enum()); ev != nil {
			return string(ev.Name())
		}
		return float64(v.Enum())
	case protoreflect.BoolKind:
		return v.Bool()
	case protoreflect.StringKind:
		return v.String()
	case protoreflect.BytesKind:
		return v.Bytes()
	case protoreflect.FloatKind, protoreflect.DoubleKind:
		return v.Float()
	case protoreflect.Uint32Kind, protoreflect.Fixed32Kind, protoreflect.Uint64Kind, protoreflect.Fixed64Kind:
		return float64(v.Uint())
	default:
		return float64(v.Int())
	}
}

// errField is a used message's field that is missing or of the wrong kind:
// the tick is malformed (SPEC §7.4).
var errField = errors.New("field missing or of the wrong kind")

// walk follows a parsed field path through a value tree.
func walk(v any, path []pipeline.PathStep) (any, error) {
	for _, st := range path {
		switch {
		case st.Name != "":
			m, ok := v.(map[string]any)
			if !ok {
				return nil, errField
			}
			if v, ok = m[st.Name]; !ok {
				return nil, errField
			}
		case st.Index:
			n := arrayLen(v)
			if n < 0 || st.I >= n {
				return nil, errField
			}
			v = arraySlice(v, st.I, st.I+1, true)
		case st.Slice:
			n := arrayLen(v)
			if n < 0 || st.Hi > n || st.Lo > st.Hi {
				return nil, errField
			}
			v = arraySlice(v, st.Lo, st.Hi, false)
		}
	}
	return v, nil
}

func arrayLen(v any) int {
	switch a := v.(type) {
	case []any:
		return len(a)
	case []float64:
		return len(a)
	case []int64:
		return len(a)
	case []uint64:
		return len(a)
	case []bool:
		return len(a)
	case []string:
		return len(a)
	case []byte:
		return len(a)
	}
	return -1
}

// arraySlice takes a[lo:hi], or the element a[lo] when one is set.
func arraySlice(v any, lo, hi int, one bool) any {
	switch a := v.(type) {
	case []any:
		if one {
			return a[lo]
		}
		return a[lo:hi]
	case []float64:
		if one {
			return a[lo]
		}
		return a[lo:hi]
	case []int64:
		if one {
			return a[lo]
		}
		return a[lo:hi]
	case []uint64:
		if one {
			return a[lo]
		}
		return a[lo:hi]
	case []bool:
		if one {
			return a[lo]
		}
		return a[lo:hi]
	case []string:
		if one {
			return a[lo]
		}
		return a[lo:hi]
	case []byte:
		if one {
			return uint64(a[lo])
		}
		return a[lo:hi]
	}
	return nil
}

// numbers appends the numbers a path gave: one number, or an array of numbers.
func numbers(dst []float64, v any) ([]float64, error) {
	switch a := v.(type) {
	case float64:
		return append(dst, a), nil
	case int64:
		return append(dst, float64(a)), nil
	case uint64:
		return append(dst, float64(a)), nil
	case []float64:
		return append(dst, a...), nil
	case []int64:
		for _, x := range a {
			dst = append(dst, float64(x))
		}
		return dst, nil
	case []uint64:
		for _, x := range a {
			dst = append(dst, float64(x))
		}
		return dst, nil
	case []byte:
		for _, x := range a {
			dst = append(dst, float64(x))
		}
		return dst, nil
	case []any:
		for _, e := range a {
			switch x := e.(type) {
			case float64:
				dst = append(dst, x)
			case int64:
				dst = append(dst, float64(x))
			case uint64:
				dst = append(dst, float64(x))
			default:
				return nil, errField
			}
		}
		return dst, nil
	}
	return nil, errField
}

// imageBytes is what a camera path gave: bytes, or a base64 string (JSON).
func imageBytes(v any) ([]byte, error) {
	switch a := v.(type) {
	case []byte:
		return a, nil
	case string:
		b, err := base64.StdEncoding.DecodeString(a)
		if err != nil {
			return nil, errField
		}
		return b, nil
	}
	return nil, errField
}

// parseJSON parses RFC 8259 JSON plus the bare tokens NaN, Infinity and
// -Infinity of SPEC §1. Numbers are float64; arrays of numbers only become
// []float64 so path steps and values share one form.
func parseJSON(p []byte) (any, error) {
	j := jsonParser{p: p}
	j.ws()
	v, err := j.value(0)
	if err != nil {
		return nil, err
	}
	j.ws()
	if j.i != len(j.p) {
		return nil, fmt.Errorf("json: extra data at offset %d", j.i)
	}
	return v, nil
}

type jsonParser struct {
	p []byte
	i int
}

const jsonMaxDepth = 512

func (j *jsonParser) ws() {
	for j.i < len(j.p) {
		switch j.p[j.i] {
		case ' ', '\t', '\n', '\r':
			j.i++
		default:
			return
		}
	}
}

func (j *jsonParser) errf(what string) error {
	return fmt.Errorf("json: %s at offset %d", what, j.i)
}

func (j *jsonParser) lit(s string) bool {
	if len(j.p)-j.i >= len(s) && string(j.p[j.i:j.i+len(s)]) == s {
		j.i += len(s)
		return true
	}
	return false
}

func (j *jsonParser) value(depth int) (any, error) {
	if depth > jsonMaxDepth {
		return nil, j.errf("too deep")
	}
	if j.i >= len(j.p) {
		return nil, j.errf("unexpected end")
	}
	switch c := j.p[j.i]; {
	case c == '{':
		j.i++
		m := map[string]any{}
		j.ws()
		if j.i < len(j.p) && j.p[j.i] == '}' {
			j.i++
			return m, nil
		}
		for {
			j.ws()
			if j.i >= len(j.p) || j.p[j.i] != '"' {
				return nil, j.errf("expected name")
			}
			k, err := j.str()
			if err != nil {
				return nil, err
			}
			j.ws()
			if j.i >= len(j.p) || j.p[j.i] != ':' {
				return nil, j.errf("expected ':'")
			}
			j.i++
			j.ws()
			v, err := j.value(depth + 1)
			if err != nil {
				return nil, err
			}
			m[k] = v
			j.ws()
			if j.i < len(j.p) && j.p[j.i] == ',' {
				j.i++
				continue
			}
			if j.i < len(j.p) && j.p[j.i] == '}' {
				j.i++
				return m, nil
			}
			return nil, j.errf("expected ',' or '}'")
		}
	case c == '[':
		j.i++
		var arr []any
		j.ws()
		if j.i < len(j.p) && j.p[j.i] == ']' {
			j.i++
			return []float64{}, nil
		}
		for {
			j.ws()
			v, err := j.value(depth + 1)
			if err != nil {
				return nil, err
			}
			arr = append(arr, v)
			j.ws()
			if j.i < len(j.p) && j.p[j.i] == ',' {
				j.i++
				continue
			}
			if j.i < len(j.p) && j.p[j.i] == ']' {
				j.i++
				break
			}
			return nil, j.errf("expected ',' or ']'")
		}
		nums := make([]float64, len(arr))
		for k, e := range arr {
			f, ok := e.(float64)
			if !ok {
				return arr, nil
			}
			nums[k] = f
		}
		return nums, nil
	case c == '"':
		return j.str()
	case j.lit("true"):
		return true, nil
	case j.lit("false"):
		return false, nil
	case j.lit("null"):
		return nil, nil
	case j.lit("NaN"):
		return math.NaN(), nil
	case j.lit("Infinity"):
		return math.Inf(1), nil
	case j.lit("-Infinity"):
		return math.Inf(-1), nil
	default:
		return j.num()
	}
}

// num scans an RFC 8259 number (no leading zeros, no '+', no bare '.').
func (j *jsonParser) num() (any, error) {
	s := j.i
	if j.i < len(j.p) && j.p[j.i] == '-' {
		j.i++
	}
	digits := func() int {
		n := 0
		for j.i < len(j.p) && j.p[j.i] >= '0' && j.p[j.i] <= '9' {
			j.i++
			n++
		}
		return n
	}
	if j.i < len(j.p) && j.p[j.i] == '0' {
		j.i++
	} else if digits() == 0 {
		return nil, j.errf("bad value")
	}
	if j.i < len(j.p) && j.p[j.i] == '.' {
		j.i++
		if digits() == 0 {
			return nil, j.errf("bad number")
		}
	}
	if j.i < len(j.p) && (j.p[j.i] == 'e' || j.p[j.i] == 'E') {
		j.i++
		if j.i < len(j.p) && (j.p[j.i] == '+' || j.p[j.i] == '-') {
			j.i++
		}
		if digits() == 0 {
			return nil, j.errf("bad number")
		}
	}
	f, err := strconv.ParseFloat(string(j.p[s:j.i]), 64)
	if err != nil && !errors.Is(err, strconv.ErrRange) {
		return nil, j.errf("bad number")
	}
	return f, nil
}

func (j *jsonParser) str() (string, error) {
	j.i++ // opening quote
	var b []byte
	for {
		if j.i >= len(j.p) {
			return "", j.errf("unterminated string")
		}
		c := j.p[j.i]
		switch {
		case c == '"':
			j.i++
			return string(b), nil
		case c < 0x20:
			return "", j.errf("control character in string")
		case c == '\\':
			j.i++
			if j.i >= len(j.p) {
				return "", j.errf("unterminated string")
			}
			var ok bool
			if b, j.i, ok = jsonl.AppendEscape(b, j.p, j.i); !ok {
				return "", j.errf("bad escape")
			}
		default:
			b = append(b, c)
			j.i++
		}
	}
}
