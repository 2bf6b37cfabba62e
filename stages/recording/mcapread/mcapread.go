// Package mcapread reads MCAP recordings (the open container format of
// mcap.dev, major version 0) as SPEC §7 needs them: messages of chosen
// topics in the order of their time, equal times in file order, whatever the
// file's index says; damaged files (§7.5) keep every whole record and every
// whole chunk whose CRC matches; memory is bounded by Options, not by the
// recording's size.
//
// CONTRACT STUB: the signatures below are fixed; the bodies are filled in by
// the package's own change.
package mcapread

import (
	"context"
	"errors"
	"io"
)

// ErrUnreadable means the object does not start with the MCAP magic and a
// readable Header record (SPEC §7.1 "unreadable").
var ErrUnreadable = errors.New("mcap: header cannot be read")

// Magic is the MCAP file magic (SPEC §7.1): 0x89 "MCAP0" "\r\n".
var Magic = [8]byte{0x89, 'M', 'C', 'A', 'P', '0', '\r', '\n'}

// Source is a stored object: its size, and a reader from any offset (a
// ranged GET on S3, a seek on a local file).
type Source interface {
	Size() int64
	Open(ctx context.Context, offset int64) (io.ReadCloser, error)
}

// Schema is an MCAP Schema record.
type Schema struct {
	ID       uint16
	Name     string
	Encoding string
	Data     []byte
}

// Channel is an MCAP Channel record; Schema is nil for schema id 0.
type Channel struct {
	ID              uint16
	Topic           string
	MessageEncoding string
	Schema          *Schema
}

// Message is one message as ReadOrdered hands it over. Data is valid only
// during the callback.
type Message struct {
	Channel     *Channel
	LogTime     uint64
	PublishTime uint64
	// Time is LogTime or PublishTime, as Options.UsePublishTime says, as
	// nanoseconds since the epoch.
	Time int64
	// Seq is the message's position in file order (0-based, over the whole
	// file's messages of the selected topics).
	Seq  int64
	Data []byte
}

// Options steers ReadOrdered.
type Options struct {
	// UsePublishTime orders by publish_time instead of log_time.
	UsePublishTime bool
	// Topics selects the topics to hand over (nil: all).
	Topics func(topic string) bool
	// SortBufferBytes bounds the message bytes held for reordering
	// (0: a default of 64 MiB); beyond it, sorted runs spill to ScratchDir.
	SortBufferBytes int64
	// ScratchDir is a local folder for spilled runs ("" : os.TempDir()).
	ScratchDir string
	// Tap, when set, is written every byte of the object exactly once, in
	// order, from offset 0 to the end (for the object's SHA-256 and size),
	// even when the file is damaged or read twice.
	Tap io.Writer
}

// Result says how reading went.
type Result struct {
	// Incomplete is SPEC §7.5's mark: cut short, or a chunk left out.
	Incomplete bool
	// Messages counts the messages handed over.
	Messages int64
}

// CheckHeader returns ErrUnreadable unless src starts with the magic and a
// whole Header record.
func CheckHeader(ctx context.Context, src Source) error { return ErrUnreadable }

// FindMetadata returns the first Metadata record named name (in file order)
// as its key/value map, or found=false.
func FindMetadata(ctx context.Context, src Source, name string) (md map[string]string, found bool, err error) {
	return nil, false, errors.New("mcapread: not implemented")
}

// ReadOrdered hands fn every message of the selected topics, in order of
// Time and then Seq. A damaged file is not an error (Result.Incomplete);
// an error is a failure to read the store, of the scratch space, or fn's.
func ReadOrdered(ctx context.Context, src Source, opts Options, fn func(*Message) error) (Result, error) {
	return Result{}, errors.New("mcapread: not implemented")
}
