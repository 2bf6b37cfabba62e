// Package ros2msg reads ROS 2 message definitions (the MCAP "ros2msg" schema
// encoding: a .msg text, then each dependency after a line of "=" and a
// "MSG: package/Type" line) and decodes and encodes CDR payloads with them.
// No maintained Go library does this, so it is kept small, fuzzed, and
// checked against payloads written by an independent implementation.
//
// CONTRACT STUB: the signatures below are fixed; the bodies are filled in by
// the package's own change.
package ros2msg

import "errors"

// ErrNotImplemented is returned by the stub.
var ErrNotImplemented = errors.New("ros2msg: not implemented")

// Schema is a parsed message definition, with its dependencies resolved. It
// is immutable and safe for concurrent use, so a caller parses a channel's
// schema once and decodes every message of the topic with it.
type Schema struct {
	Name string // "package/Type" (a "package/msg/Type" name is normalized)
}

// Parse parses a ros2msg schema: name is the MCAP schema name
// ("sensor_msgs/msg/JointState" or "sensor_msgs/JointState"), data its text.
func Parse(name string, data []byte) (*Schema, error) { return nil, ErrNotImplemented }

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
func (s *Schema) Decode(payload []byte) (map[string]any, error) { return nil, ErrNotImplemented }

// Encode writes v (the shape Decode returns; numbers may be any Go integer or
// float type) as a CDR payload with its encapsulation header, little-endian
// unless bigEndian. Missing fields are written as their zero value.
func (s *Schema) Encode(v map[string]any, bigEndian bool) ([]byte, error) {
	return nil, ErrNotImplemented
}
