// Package ros2msg reads ROS 2 message definitions (the MCAP "ros2msg" schema
// encoding: a .msg text, then each dependency after a line of "=" and a
// "MSG: package/Type" line) and decodes and encodes CDR payloads with them.
//
// It is hand-written because no maintained Go library decodes ros2msg CDR
// from a definition known only at run time: the Go ROS 2 client libraries
// generate code per message type at build time, and the generic CDR packages
// need a Go struct. A recording names its types in its schemas, so hindcast
// has to interpret them. The package is kept small, fuzzed (FuzzParse,
// FuzzDecode), and checked against payloads written by an independent
// implementation (npm @foxglove/rosmsg and @foxglove/rosmsg2-serialization,
// see testdata/node/ros2cdr.mjs).
//
// Parsing does all the work that does not depend on a payload: types are
// resolved, nesting depth and cycles checked, and each type's smallest wire
// size computed, so Decode only walks the bytes. A sequence count or fixed
// array length is checked against the bytes left (count × smallest element
// size) before anything is allocated, so a hostile payload cannot make Decode
// allocate more than a small multiple of its own size.
//
// What is supported: the primitive types bool, byte, char, int8…int64,
// uint8…uint64, float32, float64, string and bounded string<=N; fixed arrays
// T[N], bounded sequences T[<=N] and sequences T[] of any of them and of
// messages; nested and dependency message types; constants and default values
// are accepted and ignored. A string or sequence longer than its declared
// bound is undecodable (a conforming writer never sends one; Encode refuses
// to write one). Encapsulations: plain CDR (XCDR1) in either byte
// order (ids 0x00, 0x01), and plain CDR2 (XCDR2 FINAL, ids 0x06, 0x07, 8-byte
// values aligned to 4) for types without arrays of strings or messages (DDS
// implementations disagree on whether those carry a delimiter header in
// XCDR2, so such payloads are refused rather than guessed). wstring fields
// parse but a type that holds one is refused at Decode and Encode: its wire
// form (2- or 4-byte characters) is implementation-defined.
package ros2msg

import "errors"

// ErrUnsupported is wrapped by the errors of payloads and types this package
// deliberately does not decode (see the package doc).
var ErrUnsupported = errors.New("ros2msg: unsupported")

// maxDepth bounds the nesting of message types (a message inside a message…),
// which bounds the recursion of Decode and Encode. Real ROS 2 types nest a
// handful of levels.
const maxDepth = 64

// maxFixedLen bounds a fixed array length T[N] in a definition.
const maxFixedLen = 1 << 24

// Schema is a parsed message definition, with its dependencies resolved. It
// is immutable and safe for concurrent use, so a caller parses a channel's
// schema once and decodes every message of the topic with it.
type Schema struct {
	Name string // "package/Type" (a "package/msg/Type" name is normalized)

	root *msgType
	// wstring is set when a wstring field is reachable from the root type.
	wstring bool
	// cdr2 is set when the type has no array or sequence of strings or
	// messages, so its XCDR2 plain encoding differs from XCDR1 only by the
	// 4-byte alignment of 8-byte values.
	cdr2 bool
}

// Decode decodes one CDR payload (with its 4-byte encapsulation header) into
// a generic value tree:
//   - a message is map[string]any (field name → value);
//   - bool → bool; int8…int64 → int64; uint8…uint64 (and byte, char) → uint64;
//     float32, float64 → float64; string, wstring → string;
//   - an array or sequence of uint8 or byte → []byte (it may alias payload);
//     of float32/float64 → []float64; of other integers → []int64 or
//     []uint64; of bool → []bool; of string → []string; of messages → []any
//     holding map[string]any.
//
// A payload too short for what the schema asks, or a sequence count larger
// than the bytes left could hold, is an error (never a huge allocation).
// (char[] is an array of "other integers": []uint64.)
func (s *Schema) Decode(payload []byte) (map[string]any, error) {
	return s.decode(payload)
}

// Encode writes v (the shape Decode returns; numbers may be any Go integer or
// float type) as a CDR payload with its encapsulation header, little-endian
// unless bigEndian. Missing fields are written as their zero value.
func (s *Schema) Encode(v map[string]any, bigEndian bool) ([]byte, error) {
	return s.encode(v, bigEndian)
}
