package mcapread

import (
	"bytes"
	"context"
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
