package fleet

import (
	"bytes"
	"encoding/binary"
	"fmt"
	"image"
	"image/color"
	"image/jpeg"
	"image/png"
	"math"
	"path/filepath"
	"sort"
	"strconv"
	"strings"
	"time"

	"github.com/foxglove/mcap/go/mcap"
)

// DemoOptions chooses what Demo writes beyond the JSON Lines fleet.
type DemoOptions struct {
	// Recordings adds the MCAP recordings of both embodiments (SPEC §7), the
	// config's frames and recordings sections and "**/*.mcap" to its include.
	Recordings bool
}

// Topic periods of the demo's recordings, in nanoseconds: round(1e9 / rate).
const (
	jointsPeriod  = int64(10_000_000) // 100 Hz
	commandPeriod = int64(20_000_000) // 50 Hz
	posePeriod    = int64(33_333_333) // 30 Hz
	cameraPeriod  = int64(66_666_667) // 15 Hz
	odomPeriod    = int64(50_000_000) // 20 Hz: cart2's clock
	drivePeriod   = int64(20_000_000) // 50 Hz
)

// Topics of the demo's recordings.
const (
	topicJoints  = "/arm/joints"    // cdr sensor_msgs/JointState, position = 6 joints + gripper
	topicPose    = "/arm/tool_pose" // protobuf larkspur.fleet.Pose
	topicCommand = "/arm/command"   // json {"velocity": [7]}
	topicCamera  = "/wrist/image"   // cdr sensor_msgs/CompressedImage
	topicOdom    = "/cart/odom"     // protobuf larkspur.fleet.Odometry
	topicDrive   = "/cart/drive"    // cdr larkspur_msgs/Drive
	topicEvent   = "/session/event" // json {"kind": "start"|"end"}
	topicTask    = "/session/task"  // json {"name": ...}
	topicOutcome = "/session/outcome"
)

// Faults a demo recording may carry (SPEC §7.1, §7.4, §7.5). Each damages the
// messages of one topic whose offset from the recording's start is in
// [from, to), except the whole-file faults.
const (
	faultNone         = ""
	faultStale        = "stale"         // the topic's messages are left out: the sensor drops out
	faultMalformed    = "malformed"     // /arm/command without its velocity field
	faultDim          = "dim_mismatch"  // /arm/command with 6 velocities instead of 7
	faultNonFinite    = "non_finite"    // /arm/tool_pose with NaN as position[0]
	faultOutOfRange   = "out_of_range"  // /arm/command with velocity[0] = 1.5 (act_high 1)
	faultImage        = "image_corrupt" // /wrist/image frames cut short (no end marker / missing PNG chunks)
	faultUndecodable  = "undecodable"   // /arm/joints payloads cut to 10 bytes
	faultCut          = "cut"           // the file ends at cutAt of its bytes
	faultBadChunk     = "bad_chunk"     // one byte of chunk badChunk's records flipped: its CRC no longer matches
	faultUnreadable   = "unreadable"    // the magic, then a header record that cannot be read
	faultNoUnit       = "no_unit"       // no Metadata record
	faultUnknownModel = "unknown_embodiment"
	faultDuplicate    = "duplicate" // the same bytes as dupOf
)

// recPlan is one demo recording.
type recPlan struct {
	key      string // relative to dir/logs
	unit     string
	emb      string // picker6 or cart2: which topics it records
	model    string // the embodiment named in its metadata
	start    int64  // time of its first messages
	secs     int    // length
	png      bool   // camera frames as PNG instead of JPEG
	opt      recOptions
	fault    string
	topic    string // the topic the fault damages
	from, to int64  // the damaged offsets from start: [from, to)
	cutAt    float64
	badChunk int // 0-based index of the damaged chunk
	dupOf    string
	success  bool
}

// demoRecordings is the demo's recording plan: clean sessions of both
// embodiments in each layout (zstd, lz4, uncompressed chunks, no chunks and
// no index), then one recording per fault.
func demoRecordings() []recPlan {
	day := func(d int, h int) int64 {
		return day0 + int64(d)*int64(24*time.Hour) + int64(h)*int64(time.Hour)
	}
	sec := int64(time.Second)
	zstdOpt := recOptions{compression: mcap.CompressionZSTD, chunkSize: 64 << 10}
	lz4Opt := recOptions{compression: mcap.CompressionLZ4, chunkSize: 64 << 10}
	rawOpt := recOptions{compression: mcap.CompressionNone, chunkSize: 64 << 10}
	flat := recOptions{unchunked: true}
	key := func(d int, unit string, n int) string {
		return "recordings/" + sessionKey(d, unit, n, ".mcap")
	}
	p6 := func(d, n int, unit string, h int, opt recOptions) recPlan {
		return recPlan{key: key(d, unit, n), unit: unit, emb: picker6, model: picker6, start: day(d, h) + int64(n)*17*sec, secs: 20, opt: opt, success: n%2 == 1}
	}
	c2 := func(d, n int, unit string, h int, opt recOptions) recPlan {
		return recPlan{key: key(d, unit, n), unit: unit, emb: cart2, model: cart2, start: day(d, h) + int64(n)*23*sec, secs: 30, opt: opt, success: true}
	}
	with := func(p recPlan, fault, topic string, from, to int64) recPlan {
		p.fault, p.topic, p.from, p.to = fault, topic, from, to
		return p
	}
	plans := []recPlan{
		// lark-p6-001 and lark-c2-001 also log JSON Lines: their frames from
		// both kinds meet in the episodes stage (SPEC §7).
		p6(0, 1, "lark-p6-001", 9, zstdOpt),
		p6(0, 2, "lark-p6-001", 9, lz4Opt),
		p6(1, 1, "lark-p6-102", 10, rawOpt),
		p6(1, 2, "lark-p6-102", 10, flat),
		with(p6(1, 3, "lark-p6-103", 11, zstdOpt), faultStale, topicCamera, 5*sec, 7*sec),
		with(p6(1, 4, "lark-p6-103", 11, zstdOpt), faultMalformed, topicCommand, 3*sec, 4*sec),
		with(p6(2, 1, "lark-p6-104", 9, lz4Opt), faultDim, topicCommand, 10*sec, 11*sec),
		with(p6(2, 2, "lark-p6-104", 9, zstdOpt), faultNonFinite, topicPose, 2*sec, 3*sec),
		with(p6(2, 3, "lark-p6-105", 10, zstdOpt), faultOutOfRange, topicCommand, 14*sec, 15*sec),
		with(p6(2, 4, "lark-p6-105", 10, zstdOpt), faultImage, topicCamera, 8*sec, 10*sec),
		with(p6(3, 1, "lark-p6-106", 9, zstdOpt), faultUndecodable, topicJoints, 6*sec, 6*sec+500_000_000),
		with(p6(3, 2, "lark-p6-106", 9, zstdOpt), faultCut, "", 0, 0),
		with(p6(3, 3, "lark-p6-107", 9, rawOpt), faultBadChunk, "", 0, 0),
		with(p6(3, 4, "lark-p6-107", 9, zstdOpt), faultUnreadable, "", 0, 0),
		with(p6(3, 5, "lark-p6-108", 9, zstdOpt), faultNoUnit, "", 0, 0),
		with(p6(3, 6, "lark-p7-101", 9, zstdOpt), faultUnknownModel, "", 0, 0),
		c2(0, 1, "lark-c2-001", 13, zstdOpt),
		c2(1, 1, "lark-c2-102", 13, lz4Opt),
		with(c2(2, 1, "lark-c2-103", 14, zstdOpt), faultStale, topicDrive, 12*sec, 13*sec),
		with(c2(2, 2, "lark-c2-103", 14, zstdOpt), faultUndecodable, topicDrive, 20*sec, 21*sec),
	}
	for i := range plans {
		p := &plans[i]
		switch p.fault {
		case faultCut:
			p.cutAt = 0.6
		case faultBadChunk:
			p.badChunk = 2
		case faultUnknownModel:
			p.model = "picker7"
		}
		p.png = i%3 == 2
	}
	dup := plans[0]
	dup.key = "recordings/uploads/retry/" + filepath.Base(dup.key)
	dup.fault, dup.dupOf = faultDuplicate, plans[0].key
	return append(plans, dup)
}

// topicTimes returns the offsets from a recording's start of a periodic
// topic's messages over secs seconds: 0, period, 2·period, … below secs.
func topicTimes(period int64, secs int) []int64 {
	var ts []int64
	for t := int64(0); t < int64(secs)*int64(time.Second); t += period {
		ts = append(ts, t)
	}
	return ts
}

// damaged reports whether a message of topic at offset off carries p's fault.
func (p *recPlan) damaged(topic string, off int64) bool {
	return p.topic == topic && off >= p.from && off < p.to
}

// recChannels lists the channels of an embodiment's recordings.
func recChannels(c *codecs, emb string) []channel {
	labels := []channel{jsonChannel(topicEvent), jsonChannel(topicTask), jsonChannel(topicOutcome)}
	if emb == cart2 {
		return append([]channel{c.protoChannel(topicOdom, c.odom), c.cdrChannel(topicDrive, driveName, driveMsg)}, labels...)
	}
	return append([]channel{
		c.cdrChannel(topicJoints, jointStateName, jointStateMsg),
		c.protoChannel(topicPose, c.pose),
		jsonChannel(topicCommand),
		c.cdrChannel(topicCamera, compressedImageName, compressedImageMsg),
	}, labels...)
}

// recMessages returns p's messages in time order (ties in channel order), with
// its stream faults applied.
func recMessages(c *codecs, p *recPlan, chans []channel) ([]recMessage, error) {
	idx := map[string]int{}
	for i, ch := range chans {
		idx[ch.topic] = i
	}
	var msgs []recMessage
	add := func(topic string, off int64, data []byte) {
		msgs = append(msgs, recMessage{ch: idx[topic], t: p.start + off, data: data})
	}
	// The end event and outcome stand at the last tick (picker6 ticks every
	// 100 ms, cart2 on each odometry message), so they fall in a tick's
	// label window (SPEC §7.3).
	last := int64(100_000_000)
	if p.emb == cart2 {
		last = odomPeriod
	}
	end := int64(p.secs)*int64(time.Second) - last
	add(topicEvent, 0, []byte(`{"kind":"start"}`))
	add(topicTask, 0, []byte(`{"name":"`+taskName(p)+`"}`))
	var err error
	periodic := func(topic string, period int64, payload func(off int64, s float64) ([]byte, error)) {
		for _, off := range topicTimes(period, p.secs) {
			if err != nil {
				return
			}
			if p.fault == faultStale && p.damaged(topic, off) {
				continue
			}
			var b []byte
			if b, err = payload(off, float64(off)/1e9); err != nil {
				return
			}
			if p.fault == faultUndecodable && p.damaged(topic, off) {
				b = b[:10]
			}
			add(topic, off, b)
		}
	}
	if p.emb == cart2 {
		periodic(topicOdom, odomPeriod, func(off int64, s float64) ([]byte, error) {
			th := 0.8 * math.Sin(s/5)
			return c.protoMsg(c.odom, map[string]any{"stamp": p.start + off,
				"state": []float64{3 * math.Cos(s/6), 3 * math.Sin(s/6), th, 0.6 + 0.2*math.Sin(s), 0.16 * math.Cos(s/5)}})
		})
		periodic(topicDrive, drivePeriod, func(off int64, s float64) ([]byte, error) {
			return c.drive.Encode(map[string]any{"header": rosStamp(p.start+off, "base"),
				"throttle": 0.4 + 0.1*math.Sin(s), "steer": 0.3 * math.Cos(s/5)}, false)
		})
	} else {
		names := []string{"j0", "j1", "j2", "j3", "j4", "j5", "gripper"}
		periodic(topicJoints, jointsPeriod, func(off int64, s float64) ([]byte, error) {
			pos, vel := make([]float64, 7), make([]float64, 7)
			for j := range 7 {
				w := 0.3 + 0.1*float64(j)
				pos[j] = math.Sin(w*s + float64(j))
				vel[j] = w * math.Cos(w*s+float64(j))
			}
			return c.joints.Encode(map[string]any{"header": rosStamp(p.start+off, "arm"),
				"name": names, "position": pos, "velocity": vel, "effort": []float64{}}, (off/jointsPeriod)%2 == 1) // both CDR byte orders
		})
		periodic(topicPose, posePeriod, func(off int64, s float64) ([]byte, error) {
			pos := []float64{0.4 + 0.2*math.Sin(s/4), -0.1 + 0.1*math.Cos(s/3), 0.3 + 0.05*s/float64(p.secs)}
			if p.fault == faultNonFinite && p.damaged(topicPose, off) {
				pos[0] = math.NaN()
			}
			return c.protoMsg(c.pose, map[string]any{"stamp": p.start + off, "position": pos,
				"orientation": []float64{0, 0, math.Sin(s / 8), math.Cos(s / 8)}})
		})
		periodic(topicCommand, commandPeriod, func(off int64, s float64) ([]byte, error) {
			v := make([]float64, 7)
			for j := range v {
				v[j] = 0.5 * math.Sin(0.7*s+float64(j))
			}
			bad := p.damaged(topicCommand, off)
			switch {
			case bad && p.fault == faultMalformed:
				return []byte(`{"gripper":` + strconv.FormatFloat(v[6], 'f', 6, 64) + `}`), nil
			case bad && p.fault == faultDim:
				v = v[:6]
			case bad && p.fault == faultOutOfRange:
				v[0] = 1.5
			}
			return append(appendVector([]byte(`{"velocity":`), v), '}'), nil
		})
		var img bytes.Buffer
		periodic(topicCamera, cameraPeriod, func(off int64, s float64) ([]byte, error) {
			img.Reset()
			format, err := demoFrame(&img, s, p.png)
			if err != nil {
				return nil, err
			}
			data := img.Bytes()
			if p.fault == faultImage && p.damaged(topicCamera, off) {
				data = data[:len(data)-20]
			}
			return c.image.Encode(map[string]any{"header": rosStamp(p.start+off, "wrist"), "format": format, "data": data}, false)
		})
	}
	if err != nil {
		return nil, fmt.Errorf("fleet: encoding messages of %s: %w", p.key, err)
	}
	add(topicEvent, end, []byte(`{"kind":"end"}`))
	add(topicOutcome, end, []byte(`{"ok":`+strconv.FormatBool(p.success)+`}`))
	sort.SliceStable(msgs, func(i, j int) bool {
		if msgs[i].t != msgs[j].t {
			return msgs[i].t < msgs[j].t
		}
		return msgs[i].ch < msgs[j].ch
	})
	return msgs, nil
}

func taskName(p *recPlan) string {
	if p.emb == cart2 {
		return "tow to dock"
	}
	return "pick tote to bin"
}

// demoFrame encodes a 32×24 wrist-camera frame at s seconds as JPEG or PNG.
func demoFrame(w *bytes.Buffer, s float64, asPNG bool) (string, error) {
	im := image.NewRGBA(image.Rect(0, 0, 32, 24))
	shift := int(s * 8)
	for y := range 24 {
		for x := range 32 {
			im.Set(x, y, color.RGBA{uint8((x + shift) * 8), uint8(y * 10), uint8(128 + shift), 255})
		}
	}
	if asPNG {
		return "png", (&png.Encoder{CompressionLevel: png.BestSpeed}).Encode(w, im)
	}
	return "jpeg", jpeg.Encode(w, im, &jpeg.Options{Quality: 80})
}

// writeRecording writes p under logs and returns its bytes.
func writeRecording(c *codecs, logs string, p *recPlan, written map[string][]byte) ([]byte, error) {
	var data []byte
	switch p.fault {
	case faultDuplicate:
		data = written[p.dupOf]
	case faultUnreadable:
		// The magic, then a Header record (opcode 0x01) whose length runs
		// far past the end of the file.
		data = append([]byte(mcap.Magic), 0x01)
		data = binary.LittleEndian.AppendUint64(data, 1<<40)
		data = append(data, "ros2"...)
	default:
		chans := recChannels(c, p.emb)
		msgs, err := recMessages(c, p, chans)
		if err != nil {
			return nil, err
		}
		var meta map[string]string
		if p.fault != faultNoUnit {
			meta = map[string]string{"unit": p.unit, "model": p.model, "site": "larkspur-depot"}
		}
		var buf bytes.Buffer
		w, err := newRecWriter(&buf, meta, chans, p.opt)
		if err != nil {
			return nil, err
		}
		for _, m := range msgs {
			if err := w.write(m); err != nil {
				return nil, err
			}
		}
		if err := w.close(); err != nil {
			return nil, err
		}
		data = buf.Bytes()
		switch p.fault {
		case faultCut:
			data = data[:int(float64(len(data))*p.cutAt)]
		case faultBadChunk:
			if data, err = flipInChunk(data, p.badChunk); err != nil {
				return nil, fmt.Errorf("fleet: damaging %s: %w", p.key, err)
			}
		}
	}
	if written != nil {
		written[p.key] = data
	}
	return data, writeFile(filepath.Join(logs, filepath.FromSlash(p.key)), data)
}

// flipInChunk inverts one byte in the middle of the records of chunk n (by
// the file's chunk index), so that chunk's CRC no longer matches.
func flipInChunk(data []byte, n int) ([]byte, error) {
	r, err := mcap.NewReader(bytes.NewReader(data))
	if err != nil {
		return nil, err
	}
	info, err := r.Info()
	if err != nil {
		return nil, err
	}
	if n >= len(info.ChunkIndexes) {
		return nil, fmt.Errorf("chunk %d of %d", n, len(info.ChunkIndexes))
	}
	ci := info.ChunkIndexes[n]
	at := ci.ChunkStartOffset + ci.ChunkLength - ci.CompressedSize/2
	out := bytes.Clone(data)
	out[at] ^= 0xFF
	return out, nil
}

// demoRecordingConfig turns the demo config into one that also reads the
// recordings: "**/*.mcap" in include, frames per embodiment and a recordings
// section (SPEC §7.1, §7.3).
func demoRecordingConfig() string {
	s := demoConfig
	s = strings.Replace(s, `"**/*.jsonl.zst"]`, `"**/*.jsonl.zst", "**/*.mcap"]`, 1)
	s = strings.Replace(s, "    goal_tolerance: 0.03\n", `    goal_tolerance: 0.03
    frames:
      rate: 10
      max_age: 150ms
      obs:
        - {topic: /arm/joints, field: position}
        - {topic: /arm/tool_pose, field: "position[0:3]"}
      act:
        - {topic: /arm/command, field: velocity, align: next, max_age: 60ms}
      cameras:
        wrist: {topic: /wrist/image, field: data}
      events: {topic: /session/event, field: kind}
      task: {topic: /session/task, field: name}
      success: {topic: /session/outcome, field: ok}
`, 1)
	s = strings.Replace(s, "    goal_tolerance: 0.25\n", `    goal_tolerance: 0.25
    frames:
      clock: /cart/odom
      max_age: 100ms
      obs:
        - {topic: /cart/odom, field: state}
      act:
        - {topic: /cart/drive, field: throttle, align: nearest}
        - {topic: /cart/drive, field: steer, align: nearest}
      events: {topic: /session/event, field: kind}
      task: {topic: /session/task, field: name}
      success: {topic: /session/outcome, field: ok}
recordings:
  unit: {metadata: robot, key: unit}
  embodiment: {metadata: robot, key: model}
  time: log_time
`, 1)
	return s
}

// writeDemoRecordings writes every recording of the plan under logs.
func writeDemoRecordings(logs string) error {
	c, err := newCodecs()
	if err != nil {
		return err
	}
	written := map[string][]byte{}
	plans := demoRecordings()
	for i := range plans {
		if _, err := writeRecording(c, logs, &plans[i], written); err != nil {
			return err
		}
	}
	return nil
}
