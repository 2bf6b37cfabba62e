package mcapread

// Damage from an independent writer (SPEC §7.5): the files of
// testdata/recordings/damage/ were written by npm @mcap/core (McapWriter;
// zstd chunks by npm @foxglove/wasm-zstd, lz4 chunks by the lz4 reference
// tool) and damage.json says where each of their records lies, as npm
// @mcap/core's McapStreamReader read them back
// (testdata/node/damage-fixtures.mjs). The tests cut every file at every
// record boundary and one byte into every record, and corrupt every chunk in
// turn, and check exactly which messages come out, in which order, and the
// incomplete mark.

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"testing"
)

// damageRecord is one top-level record of a fixture (or its opening or
// closing magic), as damage.json gives it: [Offset, End) in the file, and
// the messages it holds (indexes into damageFixture.Messages).
type damageRecord struct {
	Offset        int64    `json:"offset"`
	End           int64    `json:"end"`
	Op            string   `json:"op"`
	Messages      []int    `json:"messages"`
	Channels      []string `json:"channels"`
	Compression   string   `json:"compression"`
	RecordsOffset int64    `json:"records_offset"`
	RecordsLength int64    `json:"records_length"`
}

type damageFixture struct {
	Messages []struct {
		Topic       string `json:"topic"`
		LogTime     string `json:"log_time"`
		PublishTime string `json:"publish_time"`
		Data        []byte `json:"data_b64"`
	} `json:"messages"`
	Files map[string]struct {
		Size    int64          `json:"size"`
		Records []damageRecord `json:"records"`
	} `json:"files"`
}

// damageDir is where damage-fixtures.mjs writes.
var damageDir = filepath.Join("..", "..", "..", "testdata", "recordings", "damage")

// The fixture files, by how their chunks are compressed.
var damageFiles = []string{"damage-zstd.mcap", "damage-lz4.mcap", "damage-none.mcap", "damage-zstd-nosummary.mcap", "damage-unchunked.mcap"}

func loadDamage(t *testing.T) *damageFixture {
	t.Helper()
	b, err := os.ReadFile(filepath.Join(damageDir, "damage.json"))
	if err != nil {
		t.Fatal(err)
	}
	var fx damageFixture
	if err := json.Unmarshal(b, &fx); err != nil {
		t.Fatalf("damage.json: %v", err)
	}
	return &fx
}

// damageKey names a message by what ReadOrdered hands over; the fixture's
// messages are told apart by it (checked in damageIndex).
func damageKey(topic string, logTime uint64, data []byte) string {
	return fmt.Sprintf("%s|%d|%x", topic, logTime, data)
}

// damageIndex maps each fixture message's key to its index in file order.
func damageIndex(t *testing.T, fx *damageFixture) (map[string]int, []uint64) {
	t.Helper()
	idx := map[string]int{}
	times := make([]uint64, len(fx.Messages))
	for i, m := range fx.Messages {
		lt, err := strconv.ParseUint(m.LogTime, 10, 64)
		if err != nil {
			t.Fatal(err)
		}
		times[i] = lt
		k := damageKey(m.Topic, lt, m.Data)
		if _, dup := idx[k]; dup {
			t.Fatalf("fixture messages %d and %d cannot be told apart", idx[k], i)
		}
		idx[k] = i
	}
	return idx, times
}

// damageRead reads data and returns the fixture indexes of the messages in
// the order they were handed over.
func damageRead(t *testing.T, data []byte, idx map[string]int) ([]int, Result, error) {
	t.Helper()
	return damageReadTopics(t, data, idx, nil)
}

// damageReadTopics is damageRead of the selected topics only.
func damageReadTopics(t *testing.T, data []byte, idx map[string]int, topics func(string) bool) ([]int, Result, error) {
	t.Helper()
	var tap []byte
	var got []int
	res, err := ReadOrdered(context.Background(), memSource(data), Options{Topics: topics, Tap: tapFunc(func(p []byte) { tap = append(tap, p...) })}, func(m *Message) error {
		i, ok := idx[damageKey(m.Channel.Topic, m.LogTime, m.Data)]
		if !ok {
			return fmt.Errorf("message not in the fixture: %s at %d", m.Channel.Topic, m.LogTime)
		}
		got = append(got, i)
		return nil
	})
	if string(tap) != string(data) {
		t.Errorf("tap saw %d bytes, the object has %d", len(tap), len(data))
	}
	return got, res, err
}

type tapFunc func([]byte)

func (f tapFunc) Write(p []byte) (int, error) { f(p); return len(p), nil }

// damageWant is what SPEC §7.5 keeps: the messages of the whole records
// (chunks, or plain message records) for which keep is true, in order of
// time and then file position (§7.2) — of those whose topic some kept
// record defines with a Channel record (a message on a channel never
// defined has no topic; the summary repeats the Channel records when the
// file has one).
func damageWant(fx *damageFixture, recs []damageRecord, times []uint64, keep func(damageRecord) bool) []int {
	defined := map[string]bool{}
	for _, r := range recs {
		if keep(r) {
			for _, c := range r.Channels {
				defined[c] = true
			}
		}
	}
	var want []int
	for _, r := range recs {
		if keep(r) {
			for _, m := range r.Messages {
				if defined[fx.Messages[m].Topic] {
					want = append(want, m)
				}
			}
		}
	}
	slices.SortStableFunc(want, func(a, b int) int {
		if times[a] != times[b] {
			if times[a] < times[b] {
				return -1
			}
			return 1
		}
		return a - b
	})
	return want
}

// TestDamageFixtures checks the fixtures against what damage.json says of
// them (written by npm @mcap/core): sizes, records end to end, every message
// in exactly one record, and the whole files read back in full.
func TestDamageFixtures(t *testing.T) {
	fx := loadDamage(t)
	idx, times := damageIndex(t, fx)
	if len(fx.Messages) != 70 {
		t.Fatalf("%d messages in damage.json, want 70 (damage-fixtures.mjs)", len(fx.Messages))
	}
	for _, name := range damageFiles {
		f, ok := fx.Files[name]
		if !ok {
			t.Fatalf("damage.json has no %s", name)
		}
		data, err := os.ReadFile(filepath.Join(damageDir, name))
		if err != nil {
			t.Fatal(err)
		}
		if int64(len(data)) != f.Size {
			t.Fatalf("%s: %d bytes, damage.json says %d", name, len(data), f.Size)
		}
		var at int64
		seen := map[int]bool{}
		for _, r := range f.Records {
			if r.Offset != at || r.End <= r.Offset {
				t.Fatalf("%s: record %s at [%d, %d) after %d", name, r.Op, r.Offset, r.End, at)
			}
			at = r.End
			for _, m := range r.Messages {
				if seen[m] {
					t.Fatalf("%s: message %d in two records", name, m)
				}
				seen[m] = true
			}
		}
		if at != f.Size || len(seen) != len(fx.Messages) {
			t.Fatalf("%s: records end at %d of %d, hold %d of %d messages", name, at, f.Size, len(seen), len(fx.Messages))
		}
		got, res, err := damageRead(t, data, idx)
		if err != nil {
			t.Fatal(err)
		}
		want := damageWant(fx, f.Records, times, func(damageRecord) bool { return true })
		if res.Incomplete || res.Messages != 70 || !slices.Equal(got, want) {
			t.Errorf("%s whole: incomplete %v, %d messages %v; want complete, 70 messages %v", name, res.Incomplete, res.Messages, got, want)
		}
	}
}

// TestDamageCutEverywhere truncates each fixture (written by npm
// @mcap/core) at every record boundary and one byte into every record. A
// cut inside the opening magic makes the object unreadable; any other cut
// keeps exactly the messages of the records that end at or before it
// (chunks for chunked files, message records otherwise), in time order,
// and is incomplete: the object is whole only when nothing is cut (SPEC
// §7.5).
func TestDamageCutEverywhere(t *testing.T) {
	fx := loadDamage(t)
	idx, times := damageIndex(t, fx)
	for _, name := range damageFiles {
		t.Run(name, func(t *testing.T) {
			f := fx.Files[name]
			data, err := os.ReadFile(filepath.Join(damageDir, name))
			if err != nil {
				t.Fatal(err)
			}
			var cuts []int64
			for _, r := range f.Records {
				cuts = append(cuts, r.Offset, r.Offset+1)
			}
			cuts = append(cuts, f.Size)
			checked := 0
			sizes := map[int]bool{} // how many messages a cut keeps
			for _, c := range cuts {
				got, res, err := damageRead(t, data[:c], idx)
				if c < 8 {
					if !errors.Is(err, ErrUnreadable) {
						t.Errorf("cut at %d (inside the magic): err %v, want ErrUnreadable", c, err)
					}
					checked++
					continue
				}
				if err != nil {
					t.Fatalf("cut at %d: %v", c, err)
				}
				want := damageWant(fx, f.Records, times, func(r damageRecord) bool { return r.End <= c })
				if !slices.Equal(got, want) || res.Messages != int64(len(want)) {
					t.Errorf("cut at %d of %d: %d messages %v, want %d %v", c, f.Size, res.Messages, got, len(want), want)
				}
				if res.Incomplete != (c < f.Size) {
					t.Errorf("cut at %d of %d: incomplete %v, want %v", c, f.Size, res.Incomplete, c < f.Size)
				}
				sizes[len(got)] = true
				checked++
			}
			// 2 cuts per record and the uncut file; each record that holds
			// messages adds one more size of what survives (0 before the
			// first such record is whole).
			holding := 0
			for _, r := range f.Records {
				if len(r.Messages) > 0 {
					holding++
				}
			}
			if checked != 2*len(f.Records)+1 || len(sizes) != holding+1 {
				t.Errorf("checked %d cuts (want %d), %d sizes of what survives (want %d)", checked, 2*len(f.Records)+1, len(sizes), holding+1)
			}
		})
	}
}

// TestDamageBadChunkEach flips one byte in the middle of each chunk's
// compressed records in turn (files written by npm @mcap/core): the chunk no
// longer decompresses or its CRC no longer matches, so exactly the
// messages of the other chunks come out, in time order, and the recording
// is incomplete (SPEC §7.5: "a chunk counts only when it is whole and its
// CRC matches"; "reading goes on after it").
func TestDamageBadChunkEach(t *testing.T) {
	fx := loadDamage(t)
	idx, times := damageIndex(t, fx)
	for _, name := range []string{"damage-zstd.mcap", "damage-lz4.mcap", "damage-none.mcap", "damage-zstd-nosummary.mcap"} {
		t.Run(name, func(t *testing.T) {
			f := fx.Files[name]
			data, err := os.ReadFile(filepath.Join(damageDir, name))
			if err != nil {
				t.Fatal(err)
			}
			chunks := 0
			for k, r := range f.Records {
				if r.Op != "Chunk" {
					continue
				}
				chunks++
				bad := slices.Clone(data)
				bad[r.RecordsOffset+r.RecordsLength/2] ^= 0x5a
				got, res, err := damageRead(t, bad, idx)
				if err != nil {
					t.Fatalf("chunk at %d: %v", r.Offset, err)
				}
				want := damageWant(fx, f.Records, times, func(o damageRecord) bool { return o.Offset != f.Records[k].Offset })
				lost := len(r.Messages)
				if name == "damage-zstd-nosummary.mcap" && len(r.Channels) > 0 {
					// Counted by hand from damage.json: the first chunk
					// defines every topic but /session/event (1 message, in
					// the last chunk); the last chunk defines only that one.
					lost = map[int]int{1: 69, 12: 6}[chunks]
				}
				if !slices.Equal(got, want) || !res.Incomplete || len(want) != len(fx.Messages)-lost {
					t.Errorf("chunk %d at %d bad: incomplete %v, %d messages %v; want incomplete, %d %v",
						chunks, r.Offset, res.Incomplete, res.Messages, got, len(want), want)
				}
				// The first chunk holds the Channel records; the summary
				// repeats them, so later chunks' messages still have their
				// topics, and a topic not selected stays out.
				joints := func(topic string) bool { return topic == "/arm/joints" }
				got, res, err = damageReadTopics(t, bad, idx, joints)
				if err != nil {
					t.Fatalf("chunk at %d, joints only: %v", r.Offset, err)
				}
				want = slices.DeleteFunc(want, func(i int) bool { return !joints(fx.Messages[i].Topic) })
				if !slices.Equal(got, want) || !res.Incomplete || res.Messages != int64(len(want)) {
					t.Errorf("chunk %d at %d bad, joints only: %d messages %v; want %d %v", chunks, r.Offset, res.Messages, got, len(want), want)
				}
			}
			if chunks != 12 {
				t.Errorf("%d chunks, want 12 (damage.json)", chunks)
			}
		})
	}
}
