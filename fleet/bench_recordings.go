package fleet

import (
	"bufio"
	"bytes"
	"fmt"
	"image"
	"image/color"
	"image/jpeg"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"time"

	"github.com/foxglove/mcap/go/mcap"
)

// BenchRecordingOptions sizes the recording benchmark fleet.
type BenchRecordingOptions struct {
	Bytes int64 // about this many recording bytes in all (whole sessions: the last one may overshoot)
	Seed  uint64
}

// Shape of a benchmark recording: two-minute sessions of one picker6 arm.
const (
	benchRecSecs   = 120
	benchPoolSize  = 24
	benchFrameW    = 320
	benchFrameH    = 240
	benchJPEGQual  = 85
	benchRecPerDay = 64
)

// BenchRecordingConfig is a config for the recording benchmark fleet written
// by BenchRecordings under dir/logs: picker6 frames on the wrist camera's
// clock (15 Hz), joints and pose held, commands taken next.
const BenchRecordingConfig = `dataset: bench-recordings
source:
  uri: logs
  include: ["**/*.mcap"]
work: work
output: datasets
partitions: 8
seed: 7
embodiments:
  picker6:
    obs: 10
    act: 7
    obs_low: -10
    obs_high: 10
    cameras: [wrist]
    goal_dims: [7, 8, 9]
    goal_tolerance: 0.03
    frames:
      clock: /wrist/image
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
recordings:
  unit: {metadata: robot, key: unit}
  embodiment: {metadata: robot, key: model}
  time: log_time
episodes:
  max_gap: 500ms
  min_steps: 10
  max_steps: 500
goals:
  future: 2
  geometric: 1
  final: 1
  negative: 0
  gamma: 0.99
splits: {train: 0.8, val: 0.1, test: 0.1}
float: float32
parquet:
  compression: zstd
`

// jpegPool encodes n varied 320×240 frames with image/jpeg: a moving
// gradient scene with seeded texture whose amount varies per frame, so the
// frames are valid JPEGs of 30–60 KB like a wrist camera's, without encoding
// one per message.
func jpegPool(rng *rand.Rand, n int) ([][]byte, error) {
	pool := make([][]byte, 0, n)
	im := image.NewRGBA(image.Rect(0, 0, benchFrameW, benchFrameH))
	var buf bytes.Buffer
	for i := range n {
		amp := 40 + rng.IntN(36) // texture amplitude: larger gives larger frames
		for y := range benchFrameH {
			for x := range benchFrameW {
				base := 90 + 60*math.Sin(float64(x+7*i)/40)*math.Cos(float64(y)/30)
				v := func() uint8 { return uint8(max(0, min(255, base+float64(rng.IntN(2*amp+1)-amp)))) }
				im.Set(x, y, color.RGBA{v(), v(), v(), 255})
			}
		}
		buf.Reset()
		if err := jpeg.Encode(&buf, im, &jpeg.Options{Quality: benchJPEGQual}); err != nil {
			return nil, fmt.Errorf("fleet: encoding bench frame %d: %w", i, err)
		}
		pool = append(pool, bytes.Clone(buf.Bytes()))
	}
	return pool, nil
}

// BenchRecordings writes a fault-free recording fleet of about opt.Bytes under
// dir: two-minute picker6 sessions, one MCAP file each (zstd chunks), with
// joints (CDR JointState) at 100 Hz, tool pose (protobuf) at 30 Hz, commands
// (protobuf) at 50 Hz and a wrist camera (CDR CompressedImage, JPEG 30–60 KB)
// at 15 Hz. It returns the recordings and camera frames written (the ticks of
// BenchRecordingConfig) and the bytes on disk. Messages stream to disk through
// the mcap writer, which holds one chunk, so memory stays flat.
func BenchRecordings(dir string, opt BenchRecordingOptions) (recordings int, ticks int64, written int64, err error) {
	rng := rand.New(rand.NewPCG(opt.Seed, 0x6c61726b))
	pool, err := jpegPool(rng, benchPoolSize)
	if err != nil {
		return 0, 0, 0, err
	}
	c, err := newCodecs()
	if err != nil {
		return 0, 0, 0, err
	}
	for written < opt.Bytes {
		n := recordings
		unit := fmt.Sprintf("lark-p6-%03d", 200+n%16)
		start := day0 + int64(n/benchRecPerDay)*int64(24*time.Hour) + int64(n%benchRecPerDay)*int64(3*time.Minute)
		key := sessionKey(n/benchRecPerDay, unit, n, ".mcap")
		size, frames, err := c.benchRecording(filepath.Join(dir, filepath.FromSlash(key)), unit, start, rng, pool)
		if err != nil {
			return recordings, ticks, written, err
		}
		recordings++
		ticks += frames
		written += size
	}
	return recordings, ticks, written, nil
}

// countingWriter counts the bytes written through it.
type countingWriter struct {
	w *bufio.Writer
	n int64
}

func (c *countingWriter) Write(p []byte) (int, error) {
	n, err := c.w.Write(p)
	c.n += int64(n)
	return n, err
}

func (c *codecs) benchRecording(path, unit string, start int64, rng *rand.Rand, pool [][]byte) (int64, int64, error) {
	if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
		return 0, 0, fmt.Errorf("fleet: creating folder for %s: %w", path, err)
	}
	f, err := os.Create(path)
	if err != nil {
		return 0, 0, fmt.Errorf("fleet: creating %s: %w", path, err)
	}
	defer f.Close()
	cw := &countingWriter{w: bufio.NewWriterSize(f, 1<<20)}
	chans := []channel{
		c.cdrChannel(topicJoints, jointStateName, jointStateMsg),
		c.protoChannel(topicPose, c.pose),
		c.protoChannel(topicCommand, c.command),
		c.cdrChannel(topicCamera, compressedImageName, compressedImageMsg),
		jsonChannel(topicEvent), jsonChannel(topicTask), jsonChannel(topicOutcome),
	}
	meta := map[string]string{"unit": unit, "model": picker6, "site": "larkspur-depot"}
	w, err := newRecWriter(cw, meta, chans, recOptions{compression: mcap.CompressionZSTD, chunkSize: 4 << 20})
	if err != nil {
		return 0, 0, err
	}
	periods := []int64{jointsPeriod, posePeriod, commandPeriod, cameraPeriod}
	next := make([]int64, len(periods))
	end := int64(benchRecSecs) * int64(time.Second)
	phase := rng.Float64() * 6
	if err := w.write(recMessage{ch: 4, t: start, data: []byte(`{"kind":"start"}`)}); err != nil {
		return 0, 0, err
	}
	if err := w.write(recMessage{ch: 5, t: start, data: []byte(`{"name":"pick tote to bin"}`)}); err != nil {
		return 0, 0, err
	}
	// The end event and outcome stand at the last camera frame, the last
	// tick of BenchRecordingConfig's clock (SPEC §7.3), written in time order
	// after the messages of that time.
	lastCam := (end - 1) / cameraPeriod * cameraPeriod
	endMsgs := []recMessage{{ch: 4, t: start + lastCam, data: []byte(`{"kind":"end"}`)}, {ch: 6, t: start + lastCam, data: []byte(`{"ok":true}`)}}
	var frames int64
	pos, vel := make([]float64, 7), make([]float64, 7)
	names := []string{"j0", "j1", "j2", "j3", "j4", "j5", "gripper"}
	joint := map[string]any{"name": names, "position": pos, "velocity": vel, "effort": []float64{}}
	img := map[string]any{"format": "jpeg"}
	for {
		ch := 0
		for i := range next {
			if next[i] < next[ch] {
				ch = i
			}
		}
		off := next[ch]
		if off > lastCam && endMsgs != nil {
			for _, m := range endMsgs {
				if err := w.write(m); err != nil {
					return 0, 0, err
				}
			}
			endMsgs = nil
		}
		if off >= end {
			break
		}
		next[ch] += periods[ch]
		t, s := start+off, phase+float64(off)/1e9
		var data []byte
		switch ch {
		case 0:
			for j := range 7 {
				w := 0.3 + 0.1*float64(j)
				pos[j] = math.Sin(w*s + float64(j))
				vel[j] = w * math.Cos(w*s+float64(j))
			}
			joint["header"] = rosStamp(t, "arm")
			data, err = c.joints.Encode(joint, false)
		case 1:
			data, err = c.protoMsg(c.pose, map[string]any{"stamp": t,
				"position":    []float64{0.4 + 0.2*math.Sin(s/4), -0.1 + 0.1*math.Cos(s/3), 0.3 + 0.1*math.Sin(s/9)},
				"orientation": []float64{0, 0, math.Sin(s / 8), math.Cos(s / 8)}})
		case 2:
			v := make([]float64, 7)
			for j := range v {
				v[j] = 0.5 * math.Sin(0.7*s+float64(j))
			}
			data, err = c.protoMsg(c.command, map[string]any{"stamp": t, "velocity": v, "gripper": float32(v[6])})
		case 3:
			img["header"] = rosStamp(t, "wrist")
			img["data"] = pool[rng.IntN(len(pool))]
			data, err = c.image.Encode(img, false)
			frames++
		}
		if err != nil {
			return 0, 0, fmt.Errorf("fleet: encoding %s of %s: %w", chans[ch].topic, path, err)
		}
		if err := w.write(recMessage{ch: ch, t: t, data: data}); err != nil {
			return 0, 0, err
		}
	}
	if err := w.close(); err != nil {
		return 0, 0, err
	}
	if err := cw.w.Flush(); err != nil {
		return 0, 0, fmt.Errorf("fleet: writing %s: %w", path, err)
	}
	if err := f.Close(); err != nil {
		return 0, 0, fmt.Errorf("fleet: closing %s: %w", path, err)
	}
	return cw.n, frames, nil
}
