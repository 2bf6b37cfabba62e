package fleet

import (
	"bytes"
	"encoding/json"
	"errors"
	"io"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"

	"github.com/foxglove/mcap/go/mcap"
	"google.golang.org/protobuf/proto"
	"google.golang.org/protobuf/reflect/protodesc"
	"google.golang.org/protobuf/reflect/protoreflect"
	"google.golang.org/protobuf/types/descriptorpb"
	"google.golang.org/protobuf/types/dynamicpb"
	"gopkg.in/yaml.v3"

	"hindcast/pipeline"
	"hindcast/stages/recording/ros2msg"
)

// inWindow counts the multiples of period in [from, to): the messages of a
// periodic topic that a fault window covers (arithmetic, independent of
// topicTimes).
func inWindow(period, from, to int64) int {
	ceil := func(x int64) int64 { return (x + period - 1) / period }
	return int(ceil(to) - ceil(from))
}

// perSecs is the number of messages a periodic topic writes in secs seconds.
func perSecs(period int64, secs int) int { return inWindow(period, 0, int64(secs)*1e9) }

// readBack is what the mcap library's reader finds in a recording.
type readBack struct {
	counts map[string]int // messages per topic
	faults map[string]int // fault name → damaged messages found by decoding
	meta   map[string]string
	behind int   // messages whose log_time is before the previous message's
	err    error // the error that ended reading, if any
}

// read decodes every message of a recording with the schemas stored in it:
// CDR with ros2msg, protobuf with protodesc + dynamicpb, JSON with
// encoding/json; and classifies each one as the §7.4 checks would.
func read(t *testing.T, data []byte) readBack { return readCRC(t, data, true) }

func readCRC(t *testing.T, data []byte, validate bool) readBack {
	t.Helper()
	rb := readBack{counts: map[string]int{}, faults: map[string]int{}}
	lex, err := mcap.NewLexer(bytes.NewReader(data), &mcap.LexerOptions{ValidateChunkCRCs: validate})
	if err != nil {
		rb.err = err
		return rb
	}
	defer lex.Close()
	schemas := map[uint16]*mcap.Schema{}
	channels := map[uint16]*mcap.Channel{}
	ros := map[uint16]*ros2msg.Schema{}
	pb := map[uint16]protoreflect.MessageDescriptor{}
	buf := make([]byte, 1<<20)
	var prev uint64
	for {
		tok, rec, err := lex.Next(buf)
		if err != nil {
			if !errors.Is(err, io.EOF) {
				rb.err = err
			}
			return rb
		}
		if len(rec) > len(buf) {
			buf = rec
		}
		switch tok {
		case mcap.TokenSchema:
			s, err := mcap.ParseSchema(rec)
			if err != nil {
				t.Fatal(err)
			}
			schemas[s.ID] = s
		case mcap.TokenChannel:
			c, err := mcap.ParseChannel(rec)
			if err != nil {
				t.Fatal(err)
			}
			channels[c.ID] = c
			s := schemas[c.SchemaID]
			switch c.MessageEncoding {
			case "cdr":
				if ros[c.ID], err = ros2msg.Parse(s.Name, s.Data); err != nil {
					t.Fatalf("parsing %s: %v", s.Name, err)
				}
			case "protobuf":
				var set descriptorpb.FileDescriptorSet
				if err := proto.Unmarshal(s.Data, &set); err != nil {
					t.Fatal(err)
				}
				files, err := protodesc.NewFiles(&set)
				if err != nil {
					t.Fatal(err)
				}
				d, err := files.FindDescriptorByName(protoreflect.FullName(s.Name))
				if err != nil {
					t.Fatal(err)
				}
				pb[c.ID] = d.(protoreflect.MessageDescriptor)
			}
		case mcap.TokenMetadata:
			m, err := mcap.ParseMetadata(rec)
			if err != nil {
				t.Fatal(err)
			}
			if m.Name == "robot" {
				rb.meta = m.Metadata
			}
		case mcap.TokenMessage:
			m, err := mcap.ParseMessage(rec)
			if err != nil {
				t.Fatal(err)
			}
			if m.LogTime < prev {
				rb.behind++
			}
			prev = m.LogTime
			c := channels[m.ChannelID]
			rb.counts[c.Topic]++
			rb.classify(t, c, m.Data, ros[c.ID], pb[c.ID])
		}
	}
}

func (rb *readBack) classify(t *testing.T, c *mcap.Channel, data []byte, rs *ros2msg.Schema, md protoreflect.MessageDescriptor) {
	switch c.MessageEncoding {
	case "cdr":
		v, err := rs.Decode(data)
		if err != nil {
			rb.faults[faultUndecodable]++
			return
		}
		if c.Topic == topicCamera {
			// JPEG ends with the EOI marker FF D9 (ITU-T T.81); PNG with
			// the 12-byte IEND chunk (PNG spec, W3C).
			img := v["data"].([]byte)
			iend := []byte{0, 0, 0, 0, 'I', 'E', 'N', 'D', 0xAE, 0x42, 0x60, 0x82}
			if !bytes.HasSuffix(img, []byte{0xFF, 0xD9}) && !bytes.HasSuffix(img, iend) {
				rb.faults[faultImage]++
			}
		}
	case "protobuf":
		m := dynamicpb.NewMessage(md)
		if err := proto.Unmarshal(data, m); err != nil {
			rb.faults[faultUndecodable]++
			return
		}
		if fd := md.Fields().ByName("position"); fd != nil {
			l := m.Get(fd).List()
			for i := range l.Len() {
				if math.IsNaN(l.Get(i).Float()) {
					rb.faults[faultNonFinite]++
					break
				}
			}
		}
	case "json":
		var v map[string]any
		if err := json.Unmarshal(data, &v); err != nil {
			rb.faults[faultUndecodable]++
			return
		}
		if c.Topic != topicCommand {
			return
		}
		vel, ok := v["velocity"].([]any)
		switch {
		case !ok:
			rb.faults[faultMalformed]++
		case len(vel) != p6Act:
			rb.faults[faultDim]++
		default:
			for _, x := range vel {
				if math.Abs(x.(float64)) > 1 {
					rb.faults[faultOutOfRange]++
					break
				}
			}
		}
	}
}

// wantCounts is the messages per topic p's plan writes, stale windows left out.
func wantCounts(p *recPlan) map[string]int {
	want := map[string]int{topicEvent: 2, topicTask: 1, topicOutcome: 1}
	periods := map[string]int64{topicJoints: jointsPeriod, topicPose: posePeriod, topicCommand: commandPeriod, topicCamera: cameraPeriod}
	if p.emb == cart2 {
		periods = map[string]int64{topicOdom: odomPeriod, topicDrive: drivePeriod}
	}
	for topic, period := range periods {
		want[topic] = perSecs(period, p.secs)
		if p.fault == faultStale && p.topic == topic {
			want[topic] -= inWindow(period, p.from, p.to)
		}
	}
	return want
}

func TestDemoRecordings(t *testing.T) {
	dir := t.TempDir()
	if err := DemoWith(dir, DemoOptions{Recordings: true}); err != nil {
		t.Fatal(err)
	}
	periods := map[string]int64{topicJoints: jointsPeriod, topicPose: posePeriod, topicCommand: commandPeriod,
		topicCamera: cameraPeriod, topicDrive: drivePeriod}
	plans := demoRecordings()
	seen := map[string]int{}
	files := map[string][]byte{}
	for i := range plans {
		p := &plans[i]
		seen[p.fault]++
		data, err := os.ReadFile(filepath.Join(dir, "logs", filepath.FromSlash(p.key)))
		if err != nil {
			t.Fatal(err)
		}
		files[p.key] = data
		// MCAP spec (mcap.dev): every recording starts with the 8-byte magic.
		if !bytes.HasPrefix(data, []byte{0x89, 'M', 'C', 'A', 'P', '0', '\r', '\n'}) {
			t.Errorf("%s: no MCAP magic", p.key)
		}
		rb := read(t, data)
		switch p.fault {
		case faultUnreadable:
			if rb.err == nil || len(rb.counts) != 0 {
				t.Errorf("%s: want a header that cannot be read, got err %v, %v", p.key, rb.err, rb.counts)
			}
			continue
		case faultDuplicate:
			if !bytes.Equal(data, files[p.dupOf]) {
				t.Errorf("%s: not the bytes of %s", p.key, p.dupOf)
			}
			continue
		case faultCut:
			full := 0
			for _, n := range wantCounts(p) {
				full += n
			}
			got := 0
			for _, n := range rb.counts {
				got += n
			}
			if !errors.Is(rb.err, io.ErrUnexpectedEOF) && !errors.Is(rb.err, io.EOF) && rb.err == nil || got == 0 || got >= full {
				t.Errorf("%s: want a cut-short read of part of %d messages, got %d (err %v)", p.key, full, got, rb.err)
			}
			continue
		case faultBadChunk:
			// Only the chunk's CRC is wrong: read without checking it,
			// every planned message is there; checked, reading stops at
			// that chunk after the messages of the chunks before it.
			got := 0
			for _, n := range rb.counts {
				got += n
			}
			if rb.err == nil || !strings.Contains(rb.err.Error(), "invalid chunk CRC") || got == 0 {
				t.Errorf("%s: want a chunk CRC mismatch after some messages, got %d messages, err %v", p.key, got, rb.err)
			}
			all := readCRC(t, data, false)
			for topic, n := range wantCounts(p) {
				if all.counts[topic] != n {
					t.Errorf("%s unchecked: %d messages on %s, want %d", p.key, all.counts[topic], topic, n)
				}
			}
			continue
		}
		if rb.err != nil || rb.behind != 0 {
			t.Errorf("%s: %v, %d messages out of time order", p.key, rb.err, rb.behind)
			continue
		}
		for topic, n := range wantCounts(p) {
			if rb.counts[topic] != n {
				t.Errorf("%s: %d messages on %s, want %d", p.key, rb.counts[topic], topic, n)
			}
		}
		wantFaults := map[string]int{}
		switch p.fault {
		case faultMalformed, faultDim, faultNonFinite, faultOutOfRange, faultImage, faultUndecodable:
			wantFaults[p.fault] = inWindow(periods[p.topic], p.from, p.to)
		}
		if len(rb.faults) != len(wantFaults) || rb.faults[p.fault] != wantFaults[p.fault] {
			t.Errorf("%s: damaged messages %v, want %v", p.key, rb.faults, wantFaults)
		}
		switch p.fault {
		case faultNoUnit:
			if rb.meta != nil {
				t.Errorf("%s: has a robot Metadata record %v", p.key, rb.meta)
			}
		default:
			if rb.meta["unit"] != p.unit || rb.meta["model"] != p.model {
				t.Errorf("%s: metadata %v, want unit %s model %s", p.key, rb.meta, p.unit, p.model)
			}
		}
	}
	// Every fault class of SPEC §7 appears.
	for _, f := range []string{faultNone, faultStale, faultMalformed, faultDim, faultNonFinite, faultOutOfRange, faultImage,
		faultUndecodable, faultCut, faultBadChunk, faultUnreadable, faultNoUnit, faultUnknownModel, faultDuplicate} {
		if seen[f] == 0 {
			t.Errorf("no demo recording with fault %q", f)
		}
	}
	// Same call, same bytes.
	again := t.TempDir()
	if err := DemoWith(again, DemoOptions{Recordings: true}); err != nil {
		t.Fatal(err)
	}
	for key, data := range files {
		b, err := os.ReadFile(filepath.Join(again, "logs", filepath.FromSlash(key)))
		if err != nil || !bytes.Equal(b, data) {
			t.Errorf("%s differs between two runs (err %v)", key, err)
		}
	}
}

// The recording config reads every frame topic the generator writes, with
// lengths that add up to the embodiments' obs and act (SPEC §7.3), and keeps
// the JSON Lines part of the demo config as it is.
func TestDemoRecordingConfig(t *testing.T) {
	var c struct {
		Source struct {
			Include []string `yaml:"include"`
		} `yaml:"source"`
		Embodiments map[string]struct {
			Obs, Act int
			Frames   struct {
				Rate    float64 `yaml:"rate"`
				Clock   string  `yaml:"clock"`
				MaxAge  string  `yaml:"max_age"`
				Obs     []struct{ Topic, Field string }
				Act     []struct{ Topic, Field string }
				Cameras map[string]struct{ Topic, Field string }
			} `yaml:"frames"`
		} `yaml:"embodiments"`
		Recordings map[string]any `yaml:"recordings"`
	}
	cfg := demoRecordingConfig()
	if err := yaml.Unmarshal([]byte(cfg), &c); err != nil {
		t.Fatal(err)
	}
	if !slices.Contains(c.Source.Include, "**/*.mcap") || len(c.Recordings) != 3 {
		t.Errorf("include %v, recordings %v", c.Source.Include, c.Recordings)
	}
	// Values per field: JointState.position holds 7, "position[0:3]" 3,
	// the command's velocity 7, Odometry.state 5, throttle and steer 1 each.
	width := map[string]int{topicJoints + " position": 7, topicPose + " position[0:3]": 3, topicCommand + " velocity": 7,
		topicOdom + " state": 5, topicDrive + " throttle": 1, topicDrive + " steer": 1}
	codecs, err := newCodecs()
	if err != nil {
		t.Fatal(err)
	}
	for _, emb := range []string{picker6, cart2} {
		e := c.Embodiments[emb]
		topics := map[string]bool{}
		for _, ch := range recChannels(codecs, emb) {
			topics[ch.topic] = true
		}
		var paths []string
		for _, s := range append(append([]struct{ Topic, Field string }{}, e.Frames.Obs...), e.Frames.Act...) {
			paths = append(paths, s.Field)
		}
		for _, s := range e.Frames.Cameras {
			paths = append(paths, s.Field)
		}
		for _, p := range paths {
			if _, err := pipeline.ParseFieldPath(p); err != nil {
				t.Errorf("%s: field path %q: %v", emb, p, err)
			}
		}
		obs, act := 0, 0
		for _, s := range e.Frames.Obs {
			obs += width[s.Topic+" "+s.Field]
			if !topics[s.Topic] {
				t.Errorf("%s: obs topic %s not recorded", emb, s.Topic)
			}
		}
		for _, s := range e.Frames.Act {
			act += width[s.Topic+" "+s.Field]
			if !topics[s.Topic] {
				t.Errorf("%s: act topic %s not recorded", emb, s.Topic)
			}
		}
		for _, s := range e.Frames.Cameras {
			if !topics[s.Topic] || s.Field != "data" {
				t.Errorf("%s: camera %v not recorded", emb, s)
			}
		}
		if obs != e.Obs || act != e.Act || (e.Frames.Rate == 0) == (e.Frames.Clock == "") {
			t.Errorf("%s: frames give obs %d act %d (want %d, %d), rate %v clock %q", emb, obs, act, e.Obs, e.Act, e.Frames.Rate, e.Frames.Clock)
		}
	}
	// Removing what was added gives back the JSON Lines config.
	back := strings.Replace(cfg, `, "**/*.mcap"]`, "]", 1)
	for _, cut := range []string{"    frames:\n", "recordings:\n"} {
		for {
			i := strings.Index(back, cut)
			if i < 0 {
				break
			}
			j := i + len(cut)
			for j < len(back) && (strings.HasPrefix(back[j:], "      ") || strings.HasPrefix(back[j:], "  ") && cut == "recordings:\n") {
				j += strings.IndexByte(back[j:], '\n') + 1
			}
			back = back[:i] + back[j:]
		}
	}
	if back != demoConfig {
		t.Errorf("the recording config changes the JSON Lines part:\n%s", back)
	}
}
