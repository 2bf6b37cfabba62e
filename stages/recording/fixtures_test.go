package recording

import (
	"encoding/base64"
	"encoding/json"
	"os"
	"reflect"
	"testing"

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
