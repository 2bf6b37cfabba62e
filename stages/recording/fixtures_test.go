package recording

import (
	"context"
	"encoding/base64"
	"encoding/json"
	"io"
	"os"
	"path/filepath"
	"reflect"
	"testing"
	"time"

	"hindcast/pipeline"
	"hindcast/stages/recording/mcapread"
)

// expectedFile is testdata/recordings/expected.json, written by
// testdata/node/recording-fixtures.mjs.
type expectedFile struct {
	Schemas map[string]struct {
		Name, Encoding, Text string
	} `json:"schemas"`
	Messages []struct {
		Topic           string `json:"topic"`
		LogTime         string `json:"log_time"`
		MessageEncoding string `json:"message_encoding"`
		Schema          string `json:"schema"`
		DataB64         string `json:"data_b64"`
		Decoded         any    `json:"decoded"`
	} `json:"messages"`
}

func loadExpected(t testing.TB) *expectedFile {
	t.Helper()
	b, err := os.ReadFile("../../testdata/recordings/expected.json")
	if err != nil {
		t.Fatal(err)
	}
	var e expectedFile
	if err := json.Unmarshal(b, &e); err != nil {
		t.Fatal(err)
	}
	return &e
}

// plainTree turns a decoded tree into the shape expected.json uses: numbers
// as float64, bytes as {"bytes_b64": ...}, every array as []any.
func plainTree(v any) any {
	switch x := v.(type) {
	case map[string]any:
		m := make(map[string]any, len(x))
		for k, e := range x {
			m[k] = plainTree(e)
		}
		return m
	case []byte:
		return map[string]any{"bytes_b64": base64.StdEncoding.EncodeToString(x)}
	case []any:
		out := make([]any, len(x))
		for i, e := range x {
			out[i] = plainTree(e)
		}
		return out
	case []float64:
		out := make([]any, len(x))
		for i, e := range x {
			out[i] = e
		}
		return out
	case []int64:
		out := make([]any, len(x))
		for i, e := range x {
			out[i] = float64(e)
		}
		return out
	case []uint64:
		out := make([]any, len(x))
		for i, e := range x {
			out[i] = float64(e)
		}
		return out
	case []string:
		out := make([]any, len(x))
		for i, e := range x {
			out[i] = e
		}
		return out
	case int64:
		return float64(x)
	case uint64:
		return float64(x)
	}
	return v
}

// TestDecodeFixtures decodes every payload of the fixture recording and
// compares it with the value the independent writer read back: CDR
// payloads written and read by npm @foxglove/rosmsg2-serialization from
// .msg definitions parsed by npm @foxglove/rosmsg; JSON by JSON.stringify /
// JSON.parse. Each channel's decoder is built once, as Assemble does.
func TestDecodeFixtures(t *testing.T) {
	e := loadExpected(t)
	decs := map[string]decoder{}
	counts := map[string]int{}
	for i, m := range e.Messages {
		dec, ok := decs[m.Topic]
		if !ok {
			ch := &mcapread.Channel{Topic: m.Topic, MessageEncoding: m.MessageEncoding}
			if m.Schema != "" {
				s := e.Schemas[m.Schema]
				ch.Schema = &mcapread.Schema{Name: s.Name, Encoding: s.Encoding, Data: []byte(s.Text)}
			}
			var err error
			if dec, err = newDecoder(ch); err != nil {
				t.Fatalf("%s: %v", m.Topic, err)
			}
			decs[m.Topic] = dec
		}
		data, err := base64.StdEncoding.DecodeString(m.DataB64)
		if err != nil {
			t.Fatal(err)
		}
		v, err := dec(data)
		if err != nil {
			t.Fatalf("message %d on %s: %v", i, m.Topic, err)
		}
		if got := plainTree(v); !reflect.DeepEqual(got, m.Decoded) {
			t.Fatalf("message %d on %s:\n got %#v\nwant %#v", i, m.Topic, got, m.Decoded)
		}
		counts[m.Topic]++
	}
	// 31 joint states (0..300 ms every 10 ms), 16 commands, 7 images,
	// 1 task, 2 events, as the fixture script writes them.
	want := map[string]int{"/arm/joints": 31, "/arm/command": 16, "/wrist/image": 7, "/session/task": 1, "/session/event": 2}
	if !reflect.DeepEqual(counts, want) {
		t.Fatalf("counts %v", counts)
	}
}

// TestAssembleFixtureMessages runs the fixture recording's messages (as
// written by the node script, in time order) through the aligner: 10 Hz
// ticks over joints (CDR), commands (JSON, next) and the wrist camera (CDR).
// Every tick falls on a joints message, so obs is that message's position as
// npm @foxglove/rosmsg2-serialization read it back.
// armFixture feeds the messages of expected.json (as npm @mcap/core wrote
// them) to the aligner in memory, under the frames config the fixture was
// written for.
func armFixture(t *testing.T) (*expectedFile, []*mcapread.Message, *pipeline.Embodiment, []Tick, Stats) {
	e := loadExpected(t)
	chans := map[string]*mcapread.Channel{}
	var msgs []*mcapread.Message
	for i, m := range e.Messages {
		ch := chans[m.Topic]
		if ch == nil {
			ch = &mcapread.Channel{ID: uint16(len(chans) + 1), Topic: m.Topic, MessageEncoding: m.MessageEncoding}
			if m.Schema != "" {
				s := e.Schemas[m.Schema]
				ch.Schema = &mcapread.Schema{Name: s.Name, Encoding: s.Encoding, Data: []byte(s.Text)}
			}
			chans[m.Topic] = ch
		}
		data, _ := base64.StdEncoding.DecodeString(m.DataB64)
		var tm int64
		if err := json.Unmarshal([]byte(m.LogTime), &tm); err != nil {
			t.Fatal(err)
		}
		msgs = append(msgs, &mcapread.Message{Channel: ch, Time: tm, Seq: int64(i), Data: data})
	}
	emb := &pipeline.Embodiment{Obs: 7, Act: 7, Cameras: []string{"wrist"}, Frames: &pipeline.FramesConfig{
		Rate: 10, MaxAge: pipeline.Duration(30 * time.Millisecond),
		Obs:     []pipeline.FieldSource{{Topic: "/arm/joints", Field: "position"}},
		Act:     []pipeline.FieldSource{{Topic: "/arm/command", Field: "velocity", Align: pipeline.AlignNext}},
		Cameras: map[string]pipeline.FieldSource{"wrist": {Topic: "/wrist/image", Field: "data"}},
		Events:  &pipeline.FieldRef{Topic: "/session/event", Field: "kind"},
		Task:    &pipeline.FieldRef{Topic: "/session/task", Field: "name"},
	}}
	var ticks []Tick
	st, err := run(context.Background(), emb, func(fn func(*mcapread.Message) error) error {
		for _, m := range msgs {
			if err := fn(m); err != nil {
				return err
			}
		}
		return nil
	}, func(k *Tick) error {
		c := *k
		c.Obs = append([]float64(nil), k.Obs...)
		c.Act = append([]float64(nil), k.Act...)
		c.Images = [][]byte{append([]byte(nil), k.Images[0]...)}
		ticks = append(ticks, c)
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	return e, msgs, emb, ticks, st
}

func TestAssembleFixtureMessages(t *testing.T) {
	e, msgs, _, ticks, st := armFixture(t)
	// Expected values, taken from expected.json at each tick's time.
	at := func(topic string, tm int64) map[string]any {
		for i, m := range e.Messages {
			if m.Topic == topic && msgs[i].Time == tm {
				return m.Decoded.(map[string]any)
			}
		}
		t.Fatalf("no %s message at %d", topic, tm)
		return nil
	}
	floats := func(v any) []float64 {
		var out []float64
		for _, x := range v.([]any) {
			out = append(out, x.(float64))
		}
		return out
	}
	if len(ticks) != 4 || st.Ticks != 4 {
		t.Fatalf("%d ticks", len(ticks))
	}
	base := msgs[0].Time
	wantEv := []string{"start", "", "", "end"}
	for i, k := range ticks {
		tm := base + int64(i)*100e6
		if k.T != tm || k.Reason != "" || k.Index != int64(i+1) {
			t.Fatalf("tick %d: %+v", i, k)
		}
		if want := floats(at("/arm/joints", tm)["position"]); !reflect.DeepEqual(k.Obs, want) {
			t.Errorf("tick %d obs %v want %v", i, k.Obs, want)
		}
		if want := floats(at("/arm/command", tm)["velocity"]); !reflect.DeepEqual(k.Act, want) {
			t.Errorf("tick %d act %v want %v", i, k.Act, want)
		}
		img := at("/wrist/image", tm)["data"].(map[string]any)["bytes_b64"].(string)
		if base64.StdEncoding.EncodeToString(k.Images[0]) != img {
			t.Errorf("tick %d image", i)
		}
		if k.Ev != wantEv[i] || k.Task != "stack blocks" {
			t.Errorf("tick %d labels %q %q", i, k.Ev, k.Task)
		}
	}
	if st.Messages["/arm/joints"] != 31 || st.Messages["/wrist/image"] != 7 || len(st.Undecodable) != 0 {
		t.Fatalf("stats %+v", st)
	}
}

// fileSource is a local file as an mcapread.Source.
type fileSource struct{ path string }

func (f fileSource) Size() int64 {
	st, err := os.Stat(f.path)
	if err != nil {
		return 0
	}
	return st.Size()
}

func (f fileSource) Open(_ context.Context, off int64) (io.ReadCloser, error) {
	fh, err := os.Open(f.path)
	if err != nil {
		return nil, err
	}
	if _, err := fh.Seek(off, io.SeekStart); err != nil {
		fh.Close()
		return nil, err
	}
	return fh, nil
}

// The files written by npm @mcap/core — one chunked with its index and
// summary, one without — read through the MCAP reader give exactly the
// ticks of the same messages fed in memory (checked against the values
// @foxglove/rosmsg2-serialization wrote in TestAssembleFixtureMessages), and
// the recording's identity from its Metadata record.
func TestAssembleFixtureFiles(t *testing.T) {
	_, _, emb, want, wantSt := armFixture(t)
	cfg := &pipeline.Config{
		Embodiments: map[string]*pipeline.Embodiment{"picker6": emb},
		Recordings: &pipeline.RecordingsConfig{
			Unit:       pipeline.IdentityRule{Metadata: "robot", Key: "unit"},
			Embodiment: pipeline.IdentityRule{Metadata: "robot", Key: "model"},
			Time:       "log_time",
		},
	}
	for _, name := range []string{"arm.mcap", "arm-unindexed.mcap"} {
		t.Run(name, func(t *testing.T) {
			src := fileSource{filepath.Join("..", "..", "testdata", "recordings", name)}
			id, err := Identify(context.Background(), src, "fleet/"+name, cfg)
			if err != nil {
				t.Fatal(err)
			}
			if id.Unit != "arm-07" || id.Embodiment != "picker6" || id.Skip != "" {
				t.Fatalf("identity %+v, want arm-07 / picker6 (the fixture's Metadata record)", id)
			}
			var got []Tick
			st, err := Assemble(context.Background(), src, id, cfg, Options{ScratchDir: t.TempDir()}, func(k *Tick) error {
				c := *k
				c.Obs = append([]float64(nil), k.Obs...)
				c.Act = append([]float64(nil), k.Act...)
				c.Images = [][]byte{append([]byte(nil), k.Images[0]...)}
				got = append(got, c)
				return nil
			})
			if err != nil {
				t.Fatal(err)
			}
			if !reflect.DeepEqual(got, want) {
				t.Errorf("%d ticks from the file differ from the %d ticks of the same messages in memory", len(got), len(want))
			}
			if st.Ticks != wantSt.Ticks || st.Incomplete || !reflect.DeepEqual(st.Messages, wantSt.Messages) {
				t.Errorf("stats %+v, want %+v", st, wantSt)
			}
		})
	}
}
