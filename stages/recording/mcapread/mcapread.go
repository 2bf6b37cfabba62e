// Package mcapread reads MCAP recordings (the open container format of
// mcap.dev, major version 0) as SPEC §7 needs them: messages of chosen
// topics in the order of their time, equal times in file order, whatever the
// file's index says; damaged files (§7.5) keep every whole record and every
// whole chunk whose CRC matches; memory is bounded by Options, not by the
// recording's size.
package mcapread

import (
	"bufio"
	"bytes"
	"context"
	"encoding/binary"
	"errors"
	"fmt"
	"hash/crc32"
	"io"

	"github.com/foxglove/mcap/go/mcap"
	"github.com/klauspost/compress/zstd"
	"github.com/pierrec/lz4/v4"
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
	// pending marks a channel whose messages came before its Channel record
	// could be read (it was in a bad chunk): its messages are held, and
	// handed over only if a later Channel record (the summary repeats
	// them) says what it is.
	pending bool
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

// maxChunkBytes bounds a chunk's declared uncompressed size; a bigger chunk
// is treated as bad rather than allocated (common practice).
const maxChunkBytes = 1 << 30

// CheckHeader returns ErrUnreadable unless src starts with the magic and a
// whole Header record.
func CheckHeader(ctx context.Context, src Source) error {
	rc, err := src.Open(ctx, 0)
	if err != nil {
		return fmt.Errorf("mcap header: %w", err)
	}
	defer rc.Close()
	br := bufio.NewReader(rc)
	var magic [8]byte
	if _, err := io.ReadFull(br, magic[:]); err != nil || magic != Magic {
		return ErrUnreadable
	}
	op, rec, ok := topRecord(br, src.Size()-8)
	if !ok || op != mcap.OpHeader {
		return ErrUnreadable
	}
	if _, err := mcap.ParseHeader(rec); err != nil {
		return ErrUnreadable
	}
	return nil
}

// topRecord reads one whole record; ok=false when it is cut short or its
// length goes beyond the left bytes of the object.
func topRecord(br *bufio.Reader, left int64) (mcap.OpCode, []byte, bool) {
	var hdr [9]byte
	if _, err := io.ReadFull(br, hdr[:]); err != nil {
		return 0, nil, false
	}
	n := binary.LittleEndian.Uint64(hdr[1:])
	if left < 9 || n > uint64(left-9) || n > maxChunkBytes {
		return 0, nil, false
	}
	rec := make([]byte, n)
	if _, err := io.ReadFull(br, rec); err != nil {
		return 0, nil, false
	}
	return mcap.OpCode(hdr[0]), rec, true
}

// FindMetadata returns the first Metadata record named name (in file order)
// as its key/value map, or found=false. Metadata records sit outside chunks
// (MCAP spec, mcap.dev), so only top-level records are scanned.
func FindMetadata(ctx context.Context, src Source, name string) (md map[string]string, found bool, err error) {
	rc, err := src.Open(ctx, 0)
	if err != nil {
		return nil, false, fmt.Errorf("mcap metadata %q: %w", name, err)
	}
	defer rc.Close()
	br := bufio.NewReaderSize(rc, 1<<16)
	var magic [8]byte
	if _, err := io.ReadFull(br, magic[:]); err != nil || magic != Magic {
		return nil, false, ErrUnreadable
	}
	left := src.Size() - 8
	for {
		if err := ctx.Err(); err != nil {
			return nil, false, err
		}
		op, rec, ok := topRecord(br, left)
		if !ok || op == mcap.OpFooter {
			return nil, false, nil
		}
		left -= 9 + int64(len(rec))
		if op == mcap.OpMetadata {
			m, err := mcap.ParseMetadata(rec)
			if err == nil && m.Name == name {
				return m.Metadata, true, nil
			}
		}
	}
}

type held struct {
	ch   *Channel
	log  uint64
	pub  uint64
	t    int64
	seq  int64
	data []byte
}

// ReadOrdered hands fn every message of the selected topics, in order of
// Time and then Seq. A damaged file is not an error (Result.Incomplete);
// an error is a failure to read the store, of the scratch space, or fn's.
func ReadOrdered(ctx context.Context, src Source, opts Options, fn func(*Message) error) (Result, error) {
	var res Result
	rc, err := src.Open(ctx, 0)
	if err != nil {
		return res, fmt.Errorf("mcap read: %w", err)
	}
	defer rc.Close()
	var r io.Reader = rc
	if opts.Tap != nil {
		r = io.TeeReader(rc, opts.Tap)
	}
	br := bufio.NewReaderSize(r, 1<<16)
	var magic [8]byte
	if _, err := io.ReadFull(br, magic[:]); err != nil || magic != Magic {
		if opts.Tap != nil {
			_, _ = io.Copy(io.Discard, br)
		}
		return res, ErrUnreadable
	}
	schemas := map[uint16]*Schema{}
	chans := map[uint16]*Channel{}
	sorter := newSorter(opts)
	defer sorter.close()
	var sortErr error
	var seq int64
	// handle takes one whole record; it reports false for a record whose
	// body does not parse.
	handle := func(op byte, rec []byte) (ok bool) {
		defer func() {
			if recover() != nil {
				ok = false
			}
		}()
		switch mcap.OpCode(op) {
		case mcap.OpSchema:
			s, err := mcap.ParseSchema(rec)
			if err != nil {
				return false
			}
			if _, ok := schemas[s.ID]; !ok {
				schemas[s.ID] = &Schema{ID: s.ID, Name: s.Name, Encoding: s.Encoding, Data: append([]byte(nil), s.Data...)}
			}
		case mcap.OpChannel:
			c, err := mcap.ParseChannel(rec)
			if err != nil {
				return false
			}
			if have, ok := chans[c.ID]; !ok {
				chans[c.ID] = &Channel{ID: c.ID, Topic: c.Topic, MessageEncoding: c.MessageEncoding, Schema: schemas[c.SchemaID]}
			} else if have.pending {
				*have = Channel{ID: c.ID, Topic: c.Topic, MessageEncoding: c.MessageEncoding, Schema: schemas[c.SchemaID]}
			}
		case mcap.OpMessage:
			m, err := mcap.ParseMessage(rec)
			if err != nil {
				return false
			}
			ch := chans[m.ChannelID]
			if ch == nil {
				ch = &Channel{ID: m.ChannelID, pending: true}
				chans[m.ChannelID] = ch
			}
			if !ch.pending && opts.Topics != nil && !opts.Topics(ch.Topic) {
				return true
			}
			t := m.LogTime
			if opts.UsePublishTime {
				t = m.PublishTime
			}
			if err := sorter.add(held{ch: ch, log: m.LogTime, pub: m.PublishTime, t: int64(t), seq: seq, data: append([]byte(nil), m.Data...)}); err != nil && sortErr == nil {
				sortErr = err
			}
			seq++
		}
		return true
	}
	var hdr [9]byte
	// left is what the object still holds: a length beyond it means a
	// record cut short, never an allocation of that size.
	left := src.Size() - 8
	for {
		if err := ctx.Err(); err != nil {
			return res, err
		}
		if sortErr != nil {
			return res, sortErr
		}
		if _, err := io.ReadFull(br, hdr[:]); err != nil {
			res.Incomplete = true
			break
		}
		left -= 9
		n := binary.LittleEndian.Uint64(hdr[1:])
		if n > maxChunkBytes || left < 0 || n > uint64(left) {
			res.Incomplete = true
			break
		}
		left -= int64(n)
		rec := make([]byte, n)
		if _, err := io.ReadFull(br, rec); err != nil {
			res.Incomplete = true
			break
		}
		op := mcap.OpCode(hdr[0])
		if op == mcap.OpFooter {
			// The file ends with the magic again (MCAP spec, mcap.dev): a
			// file cut inside it is cut short too.
			var end [8]byte
			if _, err := io.ReadFull(br, end[:]); err != nil || end != Magic {
				res.Incomplete = true
			}
			break
		}
		if op != mcap.OpChunk {
			if !handle(hdr[0], rec) {
				res.Incomplete = true
			}
			continue
		}
		inner, ok := unchunk(rec)
		if !ok {
			res.Incomplete = true
			continue
		}
		for p := 0; p < len(inner); {
			if p+9 > len(inner) {
				res.Incomplete = true
				break
			}
			l := binary.LittleEndian.Uint64(inner[p+1:])
			if l > uint64(len(inner)-p-9) {
				res.Incomplete = true
				break
			}
			if !handle(inner[p], inner[p+9:p+9+int(l)]) {
				res.Incomplete = true
			}
			p += 9 + int(l)
		}
	}
	if opts.Tap != nil {
		if _, err := io.Copy(io.Discard, br); err != nil {
			return res, fmt.Errorf("mcap read to end: %w", err)
		}
	}
	if sortErr != nil {
		return res, sortErr
	}
	if err := sorter.emit(ctx, chans, fn, &res); err != nil {
		return res, err
	}
	return res, nil
}

// unchunk returns a chunk's records, decompressed and checked against the
// chunk's CRC when it is non-zero (MCAP spec, mcap.dev); ok=false for a bad
// chunk.
func unchunk(rec []byte) (out []byte, ok bool) {
	// The library's parsers may panic on a corrupt length inside a record;
	// such a record is a bad chunk.
	defer func() {
		if recover() != nil {
			out, ok = nil, false
		}
	}()
	c, err := mcap.ParseChunk(rec)
	if err != nil || c.UncompressedSize > maxChunkBytes {
		return nil, false
	}
	switch mcap.CompressionFormat(c.Compression) {
	case mcap.CompressionNone:
		out = c.Records
	case mcap.CompressionZSTD:
		d, err := zstd.NewReader(nil, zstd.WithDecoderConcurrency(1), zstd.WithDecoderMaxMemory(maxChunkBytes))
		if err != nil {
			return nil, false
		}
		defer d.Close()
		out, err = d.DecodeAll(c.Records, make([]byte, 0, c.UncompressedSize))
		if err != nil {
			return nil, false
		}
	case mcap.CompressionLZ4:
		out = make([]byte, c.UncompressedSize)
		if _, err := io.ReadFull(lz4.NewReader(bytes.NewReader(c.Records)), out); err != nil {
			return nil, false
		}
	default:
		return nil, false
	}
	if uint64(len(out)) != c.UncompressedSize {
		return nil, false
	}
	if c.UncompressedCRC != 0 && crc32.ChecksumIEEE(out) != c.UncompressedCRC {
		return nil, false
	}
	return out, true
}
