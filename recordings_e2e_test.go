package main

// End-to-end tests of recordings (SPEC §7): small MCAP files written here
// with the MCAP project's own Go writer (github.com/foxglove/mcap/go/mcap,
// "MCAP spec, mcap.dev"), CDR payloads written by stages/recording/ros2msg's
// encoder (itself checked against npm @foxglove/rosmsg2-serialization),
// JSON payloads by encoding/json, PNG images by Go's image/png, mixed with
// JSON Lines, run through the whole pipeline; counts per source, in the
// funnel and in the manifest's recording entries are exact, worked out by
// hand from §7.3 and §7.4 beside each fixture. The same corpus from a bucket
// (versitygw on 127.0.0.1) gives the same digest.

import (
	"bytes"
	"encoding/json"
	"image"
	"image/color"
	"image/png"
	"maps"
	"math"
	"os"
	"path/filepath"
	"slices"
	"testing"

	"github.com/foxglove/mcap/go/mcap"

	"hindcast/internal/s3test"
	"hindcast/pipeline"
	"hindcast/stages/recording/ros2msg"
)

// recT0 is the first message time of every fixture: 2026-11-30T10:00:00Z
// in nanoseconds, a multiple of the 100 ms period, far from midnight (SPEC
// §3.2 cuts episodes at UTC midnight).
const recT0 = int64(1796032800) * 1_000_000_000

const recMs = int64(1_000_000)

// recMsg is one message of a fixture: topic, time after recT0 in ms, and
// its payload value (a map for CDR and JSON).
type recMsg struct {
	topic string
	ms    int64
	value map[string]any
}

type recTopic struct{ topic, schema, def, encoding string }

// recTopics are the fixtures' topics: joints (CDR, ros2msg), commands
// (JSON, no schema) and a wrist camera (CDR, uint8[]).
func recTopics() []recTopic {
	return []recTopic{
		{"/arm/joints", "hc_msgs/Joints", "float64[] position\n", "cdr"},
		{"/arm/cmd", "", "", "json"},
		{"/wrist/image", "hc_msgs/Image", "uint8[] data\n", "cdr"},
	}
}

// writeRecording writes one MCAP file (chunked, zstd, with CRCs and the
// summary and index the writer adds) holding the metadata record "robot"
// (when md is not nil) and msgs in the order given.
func writeRecording(t *testing.T, md map[string]string, msgs []recMsg) []byte {
	t.Helper()
	var buf bytes.Buffer
	w, err := mcap.NewWriter(&buf, &mcap.WriterOptions{Chunked: true, ChunkSize: 4096,
		Compression: mcap.CompressionZSTD, IncludeCRC: true})
	if err != nil {
		t.Fatal(err)
	}
	must := func(err error) {
		t.Helper()
		if err != nil {
			t.Fatalf("write MCAP: %v", err)
		}
	}
	must(w.WriteHeader(&mcap.Header{Profile: "ros2", Library: "hindcast test"}))
	topics := recTopics()
	schemas := map[string]*ros2msg.Schema{}
	for i, tp := range topics {
		id := uint16(i + 1)
		var sid uint16
		if tp.schema != "" {
			sid = id
			must(w.WriteSchema(&mcap.Schema{ID: sid, Name: tp.schema, Encoding: "ros2msg", Data: []byte(tp.def)}))
			s, err := ros2msg.Parse(tp.schema, []byte(tp.def))
			if err != nil {
				t.Fatal(err)
			}
			schemas[tp.topic] = s
		}
		must(w.WriteChannel(&mcap.Channel{ID: id, SchemaID: sid, Topic: tp.topic, MessageEncoding: tp.encoding}))
	}
	if md != nil {
		must(w.WriteMetadata(&mcap.Metadata{Name: "robot", Metadata: md}))
	}
	for i, m := range msgs {
		ch := slices.IndexFunc(topics, func(x recTopic) bool { return x.topic == m.topic })
		if ch < 0 {
			t.Fatalf("no topic %s", m.topic)
		}
		var data []byte
		if s := schemas[m.topic]; s != nil {
			data, err = s.Encode(m.value, false)
		} else {
			data, err = json.Marshal(m.value)
		}
		if err != nil {
			t.Fatal(err)
		}
		tm := uint64(recT0 + m.ms*recMs)
		must(w.WriteMessage(&mcap.Message{ChannelID: uint16(ch + 1), Sequence: uint32(i), LogTime: tm, PublishTime: tm, Data: data}))
	}
	must(w.Close())
	return buf.Bytes()
}

// armMessages gives joints and commands every 50 ms from 0 to 950 ms
// (20 of each), with edit applied to each message (nil: drop it).
func armMessages(edit func(m recMsg) *recMsg) []recMsg {
	var out []recMsg
	for ms := int64(0); ms <= 950; ms += 50 {
		for _, m := range []recMsg{
			{"/arm/joints", ms, map[string]any{"position": []float64{0.1, 0.2, 0.3}}},
			{"/arm/cmd", ms, map[string]any{"velocity": []float64{0.5, -0.5}}},
		} {
			if edit != nil {
				e := edit(m)
				if e == nil {
					continue
				}
				m = *e
			}
			out = append(out, m)
		}
	}
	return out
}

// at changes the message of topic at ms.
func at(topic string, ms int64, value map[string]any) func(m recMsg) *recMsg {
	return func(m recMsg) *recMsg {
		if m.topic == topic && m.ms == ms {
			m.value = value
		}
		return &m
	}
}

func recPNG(t *testing.T) []byte {
	t.Helper()
	img := image.NewGray(image.Rect(0, 0, 4, 4))
	img.Set(1, 1, color.Gray{200})
	var b bytes.Buffer
	if err := png.Encode(&b, img); err != nil {
		t.Fatal(err)
	}
	return b.Bytes()
}

const recConfig = `dataset: rec-e2e
source:
  uri: src
work: work
output: out
partitions: 2
seed: 7
recordings:
  unit: {metadata: robot, key: unit}
  embodiment: {metadata: robot, key: model}
embodiments:
  arm:
    obs: 3
    act: 2
    obs_low: -10
    obs_high: 10
    goal_tolerance: 0.1
    frames:
      rate: 10
      max_age: 150ms
      obs:
        - {topic: /arm/joints, field: position}
      act:
        - {topic: /arm/cmd, field: velocity}
  cam:
    obs: 3
    act: 2
    cameras: [wrist]
    goal_tolerance: 0.1
    frames:
      rate: 10
      max_age: 150ms
      obs:
        - {topic: /arm/joints, field: position}
      cameras:
        wrist: {topic: /wrist/image, field: data}
episodes: {max_gap: 500ms, min_steps: 2, max_steps: 100}
goals: {future: 1, geometric: 0, final: 0, negative: 0}
`

type recWant struct {
	lines, kept int64
	dropped     map[string]int64
	staleBy     map[string]int64
	skipped     string
	// messages counts the decodable messages per topic (SPEC §7.6); nil
	// means 20 joints and 20 commands (armMessages).
	messages map[string]int64
}

// recCorpus writes the fixtures under dir/src and returns what each source
// must give. Ticks (SPEC §7.3, rate 10: period 100 ms) run from the
// earliest to the latest message time on the frame topics, both ends
// included: messages at 0…950 ms give ticks at 0, 100, …, 900 ms (10).
func recCorpus(t *testing.T, dir string) map[string]recWant {
	t.Helper()
	md := func(unit, model string) map[string]string { return map[string]string{"unit": unit, "model": model} }
	pngB := recPNG(t)
	files := map[string][]byte{
		// Every tick's sources have a message at the tick (age 0): 10 kept.
		"rec/ok.mcap": writeRecording(t, md("r-ok", "arm"), armMessages(nil)),
		// No joints message in (300, 650) ms: hold at tick 400 takes 300 (age
		// 100 ≤ 150), at 500 and 600 it is 200 and 300 old (> 150): 2 stale,
		// by /arm/joints; 700 has its own message.
		"rec/stale.mcap": writeRecording(t, md("r-stale", "arm"), armMessages(func(m recMsg) *recMsg {
			if m.topic == "/arm/joints" && m.ms > 300 && m.ms < 650 {
				return nil
			}
			return &m
		})),
		// The command at 500 ms lacks velocity: tick 500 is malformed.
		"rec/malformed.mcap": writeRecording(t, md("r-mal", "arm"), armMessages(at("/arm/cmd", 500, map[string]any{"speed": 1}))),
		// Joints at 300 ms has 2 positions: tick 300 is dim_mismatch.
		"rec/dim.mcap": writeRecording(t, md("r-dim", "arm"), armMessages(at("/arm/joints", 300, map[string]any{"position": []float64{0.1, 0.2}}))),
		// Joints at 300 ms holds a NaN: non_finite.
		"rec/nan.mcap": writeRecording(t, md("r-nan", "arm"), armMessages(at("/arm/joints", 300, map[string]any{"position": []float64{0.1, math.NaN(), 0.3}}))),
		// Joints at 300 ms holds 50 > obs_high 10: out_of_range.
		"rec/range.mcap": writeRecording(t, md("r-range", "arm"), armMessages(at("/arm/joints", 300, map[string]any{"position": []float64{0.1, 50, 0.3}}))),
		// Skips (SPEC §7.1): no metadata record: no_unit; a model the config
		// does not declare: unknown_embodiment; the magic and no header:
		// unreadable.
		"rec/skip-nounit.mcap": writeRecording(t, nil, armMessages(nil)),
		"rec/skip-emb.mcap":    writeRecording(t, md("r-emb", "forklift"), armMessages(nil)),
		"rec/skip-bad.mcap":    append(append([]byte{}, mcap.Magic...), "not a header"...),
		// JSON Lines beside them: 3 lines of unit j1, one malformed.
		"logs/j1.jsonl": []byte(`{"unit":"j1","embodiment":"arm","t":1796032800000000000,"obs":[1,2,3],"act":[0,0]}` + "\n" +
			`{"unit":"j1",` + "\n" +
			`{"unit":"j1","embodiment":"arm","t":1796032800100000000,"obs":[1,2,3],"act":[0,0]}` + "\n"),
	}
	// Camera: wrist images at 0…950 ms every 50 ms, joints likewise; the
	// image at 300 ms is cut short: tick 300 is image_corrupt.
	var cam []recMsg
	for ms := int64(0); ms <= 950; ms += 50 {
		img := pngB
		if ms == 300 {
			img = pngB[:len(pngB)-6]
		}
		cam = append(cam, recMsg{"/arm/joints", ms, map[string]any{"position": []float64{1, 2, 3}}},
			recMsg{"/wrist/image", ms, map[string]any{"data": img}})
	}
	files["rec/cam.mcap"] = writeRecording(t, md("r-cam", "cam"), cam)
	// A byte-identical copy: a duplicate object, no recording entry.
	files["rec/zz-copy.mcap"] = files["rec/ok.mcap"]
	for k, b := range files {
		p := filepath.Join(dir, "src", filepath.FromSlash(k))
		if err := os.MkdirAll(filepath.Dir(p), 0o755); err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(p, b, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	if err := os.WriteFile(filepath.Join(dir, "hindcast.yaml"), []byte(recConfig), 0o644); err != nil {
		t.Fatal(err)
	}
	one := func(reason string) map[string]int64 { return map[string]int64{reason: 1} }
	return map[string]recWant{
		"rec/ok.mcap": {lines: 10, kept: 10},
		// Joints at 0…300 (7) and 650…950 (7).
		"rec/stale.mcap": {lines: 10, kept: 8, dropped: map[string]int64{pipeline.Stale: 2}, staleBy: map[string]int64{"/arm/joints": 2},
			messages: map[string]int64{"/arm/joints": 14, "/arm/cmd": 20}},
		"rec/malformed.mcap": {lines: 10, kept: 9, dropped: one(pipeline.Malformed)},
		"rec/dim.mcap":       {lines: 10, kept: 9, dropped: one(pipeline.DimMismatch)},
		"rec/nan.mcap":       {lines: 10, kept: 9, dropped: one(pipeline.NonFinite)},
		"rec/range.mcap":     {lines: 10, kept: 9, dropped: one(pipeline.OutOfRange)},
		"rec/cam.mcap": {lines: 10, kept: 9, dropped: one(pipeline.ImageCorrupt),
			messages: map[string]int64{"/arm/joints": 20, "/wrist/image": 20}},
		"rec/skip-nounit.mcap": {skipped: pipeline.SkipNoUnit},
		"rec/skip-emb.mcap":    {skipped: pipeline.SkipUnknownEmbodiment},
		"rec/skip-bad.mcap":    {skipped: pipeline.SkipUnreadable},
		"rec/zz-copy.mcap":     {},
		"logs/j1.jsonl":        {lines: 3, kept: 2, dropped: one(pipeline.Malformed)},
	}
}

func TestRecordingsEndToEnd(t *testing.T) {
	dir := t.TempDir()
	want := recCorpus(t, dir)
	cfg := filepath.Join(dir, "hindcast.yaml")
	if code, out, errOut := s3Run("run", "--config", cfg, "--version", "a", "--parallel", "2"); code != exitOK {
		t.Fatalf("run: exit %d\n%s\n%s", code, out, errOut)
	}
	raw, err := os.ReadFile(filepath.Join(dir, "out", "rec-e2e", "a", pipeline.ManifestName))
	if err != nil {
		t.Fatal(err)
	}
	var m pipeline.Manifest
	if err := json.Unmarshal(raw, &m); err != nil {
		t.Fatal(err)
	}
	if len(m.Sources) != len(want) {
		t.Fatalf("%d sources, want %d", len(m.Sources), len(want))
	}
	var lines, kept int64
	dropped := map[string]int64{}
	for _, s := range m.Sources {
		w := want[s.Key]
		nz := map[string]int64{}
		for r, n := range s.Dropped {
			if n != 0 {
				nz[r] = n
			}
		}
		if s.Lines != w.lines || s.Kept != w.kept || !maps.Equal(nz, nonNil(w.dropped)) || s.Skipped != w.skipped {
			t.Errorf("%s: lines %d kept %d dropped %v skipped %q; want %d, %d, %v, %q",
				s.Key, s.Lines, s.Kept, nz, s.Skipped, w.lines, w.kept, w.dropped, w.skipped)
		}
		lines += s.Lines
		kept += s.Kept
		for r, n := range nz {
			dropped[r] += n
		}
		isRec := s.Key != "logs/j1.jsonl" && s.Key != "rec/zz-copy.mcap" && w.skipped == ""
		switch {
		case isRec && s.Recording == nil:
			t.Errorf("%s: no recording entry", s.Key)
		case !isRec && s.Recording != nil:
			t.Errorf("%s: a recording entry %+v, want none", s.Key, *s.Recording)
		case isRec:
			r := s.Recording
			if r.Ticks != s.Lines || !maps.Equal(r.StaleBy, nonNil(w.staleBy)) {
				t.Errorf("%s: ticks %d stale_by %v; want %d, %v", s.Key, r.Ticks, r.StaleBy, s.Lines, w.staleBy)
			}
			// Every message decodes (a command without velocity is JSON
			// that decodes, lacking a field: malformed, not undecodable).
			msgs := w.messages
			if msgs == nil {
				msgs = map[string]int64{"/arm/joints": 20, "/arm/cmd": 20}
			}
			if !maps.Equal(r.Messages, msgs) || len(r.Undecodable) != 0 {
				t.Errorf("%s: messages %v undecodable %v; want %v and none", s.Key, r.Messages, r.Undecodable, msgs)
			}
		}
	}
	if c := sourceOf(m.Sources, "rec/zz-copy.mcap"); c == nil || c.DuplicateOf == nil || *c.DuplicateOf != "rec/ok.mcap" {
		t.Errorf("rec/zz-copy.mcap is not a duplicate of rec/ok.mcap")
	}
	f := m.Funnel
	wantSkipped := map[string]int64{pipeline.SkipUnreadable: 1, pipeline.SkipNoUnit: 1, pipeline.SkipUnknownEmbodiment: 1}
	if !maps.Equal(f.SkippedObjects, wantSkipped) {
		t.Errorf("skipped_objects %v, want %v", f.SkippedObjects, wantSkipped)
	}
	// 7 recordings × 10 ticks + 3 lines; every kept tick is a frame (each
	// unit's frames form one episode of ≥ 2 steps: no episode-stage drop).
	if f.Lines != 73 || lines != 73 || f.Frames != kept || f.Frames != 65 {
		t.Errorf("funnel lines %d (Σ sources %d) frames %d (Σ kept %d); want 73 and 65", f.Lines, lines, f.Frames, kept)
	}
	wantDropped := map[string]int64{pipeline.Stale: 2, pipeline.Malformed: 2, pipeline.DimMismatch: 1,
		pipeline.NonFinite: 1, pipeline.OutOfRange: 1, pipeline.ImageCorrupt: 1}
	nz := map[string]int64{}
	for r, n := range f.Dropped {
		if n != 0 {
			nz[r] = n
		}
	}
	if !maps.Equal(nz, wantDropped) || !maps.Equal(dropped, wantDropped) {
		t.Errorf("funnel dropped %v (Σ sources %v), want %v", nz, dropped, wantDropped)
	}
	// 8 units with frames (r-ok, r-stale, r-mal, r-dim, r-nan, r-range,
	// r-cam, j1), one episode each.
	if f.Episodes != 8 || f.Pairs != f.Frames-f.Episodes {
		t.Errorf("episodes %d pairs %d; want 8 and %d (future 1: one per step but the last)", f.Episodes, f.Pairs, f.Frames-8)
	}
}

// TestRecordingsOnS3MatchLocal runs the recording corpus from a bucket
// (recordings read by ranged GETs) and from a local folder: same digest.
func TestRecordingsOnS3MatchLocal(t *testing.T) {
	const bucket = "hc-rec"
	srv := s3test.Start(t, bucket)
	s3SetEnv(t, srv)
	dir := t.TempDir()
	recCorpus(t, dir)
	cfgA := filepath.Join(dir, "hindcast.yaml")
	s3MustRun(t, srv.SecretKey, "run", "--config", cfgA, "--version", "a", "--parallel", "2")
	rawA, err := os.ReadFile(filepath.Join(dir, "out", "rec-e2e", "a", pipeline.ManifestName))
	if err != nil {
		t.Fatal(err)
	}
	c := srv.Client()
	s3Upload(t, c, bucket, filepath.Join(dir, "src"), "src/")
	yb := s3Replace(t, recConfig, `(?m)^  uri: src$`, "  uri: s3://"+bucket+"/src/")
	yb = s3Replace(t, yb, `(?m)^work: work$`, "work: s3://"+bucket+"/work/")
	yb = s3Replace(t, yb, `(?m)^output: out$`, "output: s3://"+bucket+"/out/")
	yb += "storage:\n  endpoint: " + srv.Endpoint + "\n"
	cfgB := filepath.Join(t.TempDir(), "hindcast-s3.yaml")
	if err := os.WriteFile(cfgB, []byte(yb), 0o644); err != nil {
		t.Fatal(err)
	}
	s3MustRun(t, srv.SecretKey, "run", "--config", cfgB, "--version", "b", "--parallel", "2")
	rawB := s3Get(t, c, bucket, "out/rec-e2e/b/manifest.json")
	var mA, mB pipeline.Manifest
	if err := json.Unmarshal(rawA, &mA); err != nil {
		t.Fatal(err)
	}
	if err := json.Unmarshal(rawB, &mB); err != nil {
		t.Fatal(err)
	}
	if mA.Digest != mB.Digest || mA.Digest == "" {
		t.Errorf("digest local %s, on S3 %s", mA.Digest, mB.Digest)
	}
	a, _ := json.Marshal(mA.Funnel)
	b, _ := json.Marshal(mB.Funnel)
	if !bytes.Equal(a, b) {
		t.Errorf("funnel local %s\non S3 %s", a, b)
	}
}

func nonNil(m map[string]int64) map[string]int64 {
	if m == nil {
		return map[string]int64{}
	}
	return m
}

func sourceOf(srcs []pipeline.Source, key string) *pipeline.Source {
	for i := range srcs {
		if srcs[i].Key == key {
			return &srcs[i]
		}
	}
	return nil
}
