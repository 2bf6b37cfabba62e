package mcapread

import (
	"bytes"
	"context"
	"encoding/binary"
	"hash/crc32"
	"io"
	"testing"

	"github.com/foxglove/mcap/go/mcap"
)

type memSource []byte

func (m memSource) Size() int64 { return int64(len(m)) }
func (m memSource) Open(ctx context.Context, off int64) (io.ReadCloser, error) {
	return io.NopCloser(bytes.NewReader(m[off:])), nil
}

// writeFile writes n messages with log times in reverse file order, using
// the mcap Go writer (github.com/foxglove/mcap/go/mcap).
func writeFile(t *testing.T, n int, chunked bool, compression mcap.CompressionFormat) []byte {
	t.Helper()
	var b bytes.Buffer
	w, err := mcap.NewWriter(&b, &mcap.WriterOptions{Chunked: chunked, ChunkSize: 256, Compression: compression})
	if err != nil {
		t.Fatal(err)
	}
	must := func(err error) {
		if err != nil {
			t.Fatal(err)
		}
	}
	must(w.WriteHeader(&mcap.Header{Profile: "ros2"}))
	must(w.WriteSchema(&mcap.Schema{ID: 1, Name: "s", Encoding: "ros2msg", Data: []byte("int32 a")}))
	must(w.WriteChannel(&mcap.Channel{ID: 1, SchemaID: 1, Topic: "/a", MessageEncoding: "cdr"}))
	for i := 0; i < n; i++ {
		must(w.WriteMessage(&mcap.Message{ChannelID: 1, Sequence: uint32(i), LogTime: uint64(1000 - i/2), PublishTime: uint64(i), Data: []byte{byte(i), 1, 2, 3}}))
	}
	must(w.Close())
	return b.Bytes()
}

func TestReadOrderedWhole(t *testing.T) {
	for _, tc := range []struct {
		name    string
		chunked bool
		comp    mcap.CompressionFormat
	}{{"unchunked", false, ""}, {"zstd", true, mcap.CompressionZSTD}, {"lz4", true, mcap.CompressionLZ4}, {"none", true, mcap.CompressionNone}} {
		t.Run(tc.name, func(t *testing.T) {
			f := writeFile(t, 100, tc.chunked, tc.comp)
			if err := CheckHeader(context.Background(), memSource(f)); err != nil {
				t.Fatal(err)
			}
			var tap bytes.Buffer
			var got []*Message
			res, err := ReadOrdered(context.Background(), memSource(f), Options{Tap: &tap}, func(m *Message) error {
				c := *m
				got = append(got, &c)
				return nil
			})
			if err != nil {
				t.Fatal(err)
			}
			if res.Incomplete || res.Messages != 100 || len(got) != 100 {
				t.Fatalf("res %+v, got %d", res, len(got))
			}
			if !bytes.Equal(tap.Bytes(), f) {
				t.Fatal("tap differs from object")
			}
			for i := 1; i < len(got); i++ {
				a, b := got[i-1], got[i]
				if a.Time > b.Time || (a.Time == b.Time && a.Seq >= b.Seq) {
					t.Fatalf("order broken at %d: %d/%d then %d/%d", i, a.Time, a.Seq, b.Time, b.Seq)
				}
			}
			// equal times keep file order: times 1000-i/2 pair messages 2k, 2k+1.
			if got[0].Time != 1000-49 || got[0].Seq != 98 || got[1].Seq != 99 {
				t.Fatalf("first %d/%d second %d", got[0].Time, got[0].Seq, got[1].Seq)
			}
		})
	}
}

func TestReadOrderedTruncated(t *testing.T) {
	f := writeFile(t, 100, false, "")
	cut := f[:len(f)/2]
	var tap bytes.Buffer
	res, err := ReadOrdered(context.Background(), memSource(cut), Options{Tap: &tap}, func(m *Message) error { return nil })
	if err != nil {
		t.Fatal(err)
	}
	if !res.Incomplete || res.Messages == 0 || res.Messages >= 100 {
		t.Fatalf("res %+v", res)
	}
	if !bytes.Equal(tap.Bytes(), cut) {
		t.Fatal("tap differs")
	}
}

// TestReadOrderedBadChunk flips a byte inside the second chunk's records:
// its CRC (MCAP spec, mcap.dev: chunk uncompressed_crc) no longer matches, so
// exactly that chunk's messages are left out and the rest are kept.
func TestReadOrderedBadChunk(t *testing.T) {
	f := writeFile(t, 100, true, mcap.CompressionNone)
	// Find chunk records from record boundaries.
	type span struct{ start, end int }
	var chunks []span
	off := 8
	for off+9 <= len(f) {
		op := f[off]
		n := int(uint64(f[off+1]) | uint64(f[off+2])<<8 | uint64(f[off+3])<<16 | uint64(f[off+4])<<24)
		if op == byte(mcap.OpChunk) {
			chunks = append(chunks, span{off, off + 9 + n})
		}
		if op == byte(mcap.OpFooter) {
			break
		}
		off += 9 + n
	}
	if len(chunks) < 3 {
		t.Fatalf("%d chunks", len(chunks))
	}
	// Count messages per chunk with the library's own chunk parser.
	countIn := func(s span) int {
		c, err := mcap.ParseChunk(f[s.start+9 : s.end])
		if err != nil {
			t.Fatal(err)
		}
		n, p := 0, 0
		for p < len(c.Records) {
			l := int(uint64(c.Records[p+1]) | uint64(c.Records[p+2])<<8 | uint64(c.Records[p+3])<<16 | uint64(c.Records[p+4])<<24)
			if c.Records[p] == byte(mcap.OpMessage) {
				n++
			}
			p += 9 + l
		}
		return n
	}
	lost := countIn(chunks[1])
	// The Go writer leaves uncompressed_crc 0 for uncompressed chunks; set
	// it (MCAP spec, mcap.dev: CRC-32 of the uncompressed records, at byte
	// 24 of the chunk body) so that the flip below is detectable.
	c, err := mcap.ParseChunk(f[chunks[1].start+9 : chunks[1].end])
	if err != nil {
		t.Fatal(err)
	}
	binary.LittleEndian.PutUint32(f[chunks[1].start+9+24:], crc32.ChecksumIEEE(c.Records))
	bad := append([]byte(nil), f...)
	bad[chunks[1].end-2] ^= 0xff // inside the last message's payload
	var tap bytes.Buffer
	res, err := ReadOrdered(context.Background(), memSource(bad), Options{Tap: &tap}, func(m *Message) error { return nil })
	if err != nil {
		t.Fatal(err)
	}
	if !res.Incomplete || res.Messages != int64(100-lost) {
		t.Fatalf("res %+v, want %d messages", res, 100-lost)
	}
	if !bytes.Equal(tap.Bytes(), bad) {
		t.Fatal("tap differs")
	}
}

// FuzzReadOrdered: arbitrary bytes never panic, and the tap always sees the
// whole object.
func FuzzReadOrdered(f *testing.F) {
	f.Add([]byte{})
	f.Add(Magic[:])
	for _, n := range []int{1, 5} {
		var b bytes.Buffer
		w, _ := mcap.NewWriter(&b, &mcap.WriterOptions{Chunked: true, ChunkSize: 64, Compression: mcap.CompressionZSTD})
		_ = w.WriteHeader(&mcap.Header{})
		_ = w.WriteChannel(&mcap.Channel{ID: 1, Topic: "/a"})
		for i := 0; i < n; i++ {
			_ = w.WriteMessage(&mcap.Message{ChannelID: 1, LogTime: uint64(n - i), Data: []byte{byte(i)}})
		}
		_ = w.Close()
		f.Add(b.Bytes())
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		var tap bytes.Buffer
		_, _ = ReadOrdered(context.Background(), memSource(data), Options{Tap: &tap}, func(*Message) error { return nil })
		if !bytes.Equal(tap.Bytes(), data) {
			t.Fatal("tap differs from object")
		}
		_ = CheckHeader(context.Background(), memSource(data))
		_, _, _ = FindMetadata(context.Background(), memSource(data), "x")
	})
}
