package mcapread

import (
	"bytes"
	"context"
	"errors"
	"os"
	"testing"

	"github.com/foxglove/mcap/go/mcap"
)

type seen struct {
	t, seq int64
	data   string
}

func readAll(t *testing.T, f []byte, opts Options) ([]seen, Result) {
	t.Helper()
	var out []seen
	res, err := ReadOrdered(context.Background(), memSource(f), opts, func(m *Message) error {
		out = append(out, seen{m.Time, m.Seq, string(m.Data)})
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	return out, res
}

// Spilling sorted runs to the scratch folder and merging them gives
// exactly the order of an in-memory sort, and leaves no scratch file.
func TestReadOrderedSpillsAndMerges(t *testing.T) {
	for _, comp := range []mcap.CompressionFormat{mcap.CompressionZSTD, ""} {
		f := writeFile(t, 2000, comp != "", comp)
		want, wres := readAll(t, f, Options{})
		scratch := t.TempDir()
		// 4-byte messages count 68 bytes each: a 1000-byte buffer spills a
		// run about every 15 messages, so the merge takes about 130 runs.
		got, gres := readAll(t, f, Options{SortBufferBytes: 1000, ScratchDir: scratch})
		if len(want) != 2000 || len(got) != len(want) || gres != wres {
			t.Fatalf("%q: %d messages spilled vs %d in memory (%+v vs %+v)", comp, len(got), len(want), gres, wres)
		}
		for i := range want {
			if got[i] != want[i] {
				t.Fatalf("%q: message %d: %+v spilled, %+v in memory", comp, i, got[i], want[i])
			}
		}
		if ents, _ := os.ReadDir(scratch); len(ents) != 0 {
			t.Errorf("%q: %d scratch files left", comp, len(ents))
		}
	}
}

// An error of the callback in the middle of a merge leaves no scratch file.
func TestReadOrderedSpillCleansUpOnError(t *testing.T) {
	f := writeFile(t, 500, true, mcap.CompressionNone)
	scratch := t.TempDir()
	stop := errors.New("stop")
	n := 0
	_, err := ReadOrdered(context.Background(), memSource(f), Options{SortBufferBytes: 500, ScratchDir: scratch}, func(*Message) error {
		n++
		if n == 10 {
			return stop
		}
		return nil
	})
	if !errors.Is(err, stop) || n != 10 {
		t.Fatalf("err %v after %d messages, want stop after 10", err, n)
	}
	if ents, _ := os.ReadDir(scratch); len(ents) != 0 {
		t.Errorf("%d scratch files left after an error", len(ents))
	}
}

// The bytes held for reordering never exceed the buffer by more than one
// message, however many messages pass: 10,000 messages of 1 KiB (about
// 10 MiB) through a 64 KiB buffer.
func TestSorterHoldsAtMostItsBuffer(t *testing.T) {
	const limit = 64 << 10
	s := newSorter(Options{SortBufferBytes: limit, ScratchDir: t.TempDir()})
	defer s.close()
	ch := &Channel{ID: 1, Topic: "/cam"}
	data := bytes.Repeat([]byte{7}, 1024)
	var most int64
	for i := range 10000 {
		if err := s.add(held{ch: ch, t: int64(10000 - i), seq: int64(i), data: data}); err != nil {
			t.Fatal(err)
		}
		most = max(most, s.bytes)
	}
	if most > limit+1024+64 {
		t.Fatalf("held %d bytes, buffer %d", most, limit)
	}
	if len(s.runs) < 150 {
		t.Fatalf("%d runs spilled, want at least 150 (10 MiB through 64 KiB)", len(s.runs))
	}
	var res Result
	prev := int64(-1)
	err := s.emit(context.Background(), map[uint16]*Channel{1: ch}, func(m *Message) error {
		if m.Time <= prev || len(m.Data) != 1024 || m.Channel != ch {
			t.Fatalf("message out of order or damaged: time %d after %d", m.Time, prev)
		}
		prev = m.Time
		return nil
	}, &res)
	if err != nil || res.Messages != 10000 {
		t.Fatalf("emit: %v, %d messages", err, res.Messages)
	}
}

// With UsePublishTime, messages are ordered by publish_time (SPEC §7.2,
// recordings.time): writeFile's publish times rise in file order while its
// log times fall, so the order is the file's, and Time is publish_time.
func TestReadOrderedByPublishTime(t *testing.T) {
	f := writeFile(t, 100, true, mcap.CompressionZSTD)
	var got []seen
	_, err := ReadOrdered(context.Background(), memSource(f), Options{UsePublishTime: true}, func(m *Message) error {
		if uint64(m.Time) != m.PublishTime {
			t.Fatalf("time %d, publish_time %d", m.Time, m.PublishTime)
		}
		got = append(got, seen{m.Time, m.Seq, ""})
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	if len(got) != 100 {
		t.Fatalf("%d messages, want 100", len(got))
	}
	for i, s := range got {
		if s.t != int64(i) || s.seq != int64(i) {
			t.Fatalf("message %d: publish time %d, seq %d; want %d, %d", i, s.t, s.seq, i, i)
		}
	}
}
