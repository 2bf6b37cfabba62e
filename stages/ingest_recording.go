package stages

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"hash"
	"io"

	"hindcast/pipeline"
	"hindcast/stages/recording"
	"hindcast/stages/recording/mcapread"
)

// storeSource reads one stored object as an mcapread.Source: every Open is
// a ranged read of the store from an offset (an S3 GET with a Range, a
// seek on a local file), so a recording is never downloaded whole into
// memory, and its index at the end is reached without reading what lies
// before it.
type storeSource struct {
	store pipeline.Store
	obj   pipeline.ObjectInfo
	uri   string
}

func (s storeSource) Size() int64 { return s.obj.Size }

// Open reads from offset; a read of another version than the one listed
// (the item's key holds the listing's ETag) is an error, never a splice.
func (s storeSource) Open(ctx context.Context, offset int64) (io.ReadCloser, error) {
	rc, err := s.store.Open(ctx, s.obj.Key, offset)
	if err != nil {
		return nil, err
	}
	if e, ok := rc.(interface{ ETag() string }); ok && s.obj.ETag != "" && e.ETag() != "" && e.ETag() != s.obj.ETag {
		rc.Close()
		return nil, fmt.Errorf("%s changed since it was listed (ETag %s, listed %s); run again", s.uri, e.ETag(), s.obj.ETag)
	}
	return rc, nil
}

// objectTap hashes and counts the object's bytes as the recording reader
// hands them over (mcapread.Options.Tap: every byte once, in order).
type objectTap struct {
	h     hash.Hash
	n     int64
	since int64
	prog  func(int64)
}

func (t *objectTap) Write(p []byte) (int, error) {
	t.h.Write(p)
	t.n += int64(len(p))
	t.since += int64(len(p))
	if t.since >= 1<<20 && t.prog != nil {
		t.prog(t.since)
		t.since = 0
	}
	return len(p), nil
}

// tickSource yields a recording's ticks: recording.Assemble, or a stand-in
// in tests.
type tickSource interface {
	identify(ctx context.Context, src mcapread.Source, key string, cfg *pipeline.Config) (recording.Identity, error)
	assemble(ctx context.Context, src mcapread.Source, id recording.Identity, cfg *pipeline.Config, opts recording.Options, fn func(*recording.Tick) error) (recording.Stats, error)
}

// mcapTicks is the tickSource of MCAP recordings (SPEC §7).
type mcapTicks struct{}

func (mcapTicks) identify(ctx context.Context, src mcapread.Source, key string, cfg *pipeline.Config) (recording.Identity, error) {
	return recording.Identify(ctx, src, key, cfg)
}

func (mcapTicks) assemble(ctx context.Context, src mcapread.Source, id recording.Identity, cfg *pipeline.Config, opts recording.Options, fn func(*recording.Tick) error) (recording.Stats, error) {
	return recording.Assemble(ctx, src, id, cfg, opts, fn)
}

// recordingSortBuffer bounds the message bytes one recording holds for
// reordering before spilling to local scratch files.
const recordingSortBuffer = 64 << 20

// recording ingests the object as a recording (SPEC §7): its identity
// decides whether it is skipped (§7.1); otherwise every tick is a
// candidate that goes through the same checks as a JSON Lines line.
func (in *ingester) recording(ctx context.Context) error {
	ticks := in.ticks
	if ticks == nil {
		ticks = mcapTicks{}
	}
	cfg := in.env.Config
	src := storeSource{store: in.env.Source, obj: in.obj, uri: in.uri}
	tap := &objectTap{h: sha256.New()}
	if in.env.Progress != nil {
		tap.prog = func(n int64) { in.env.Progress.Advance("ingest", 0, n) }
	}
	id, err := ticks.identify(ctx, src, in.obj.Key, cfg)
	if err != nil {
		return err
	}
	if id.Skip != "" {
		// A skipped recording contributes nothing but its identity: its
		// bytes are still hashed (duplicates are found by content).
		in.sum.Skipped = id.Skip
		rc, err := src.Open(ctx, 0)
		if err != nil {
			return err
		}
		_, err = io.Copy(tap, rc)
		rc.Close()
		if err != nil {
			return err
		}
		return in.finishRecording(ctx, tap)
	}
	rec := &pipeline.RecordingSummary{Unit: id.Unit, Embodiment: id.Embodiment,
		Messages: map[string]int64{}, Undecodable: map[string]int64{}, StaleBy: map[string]int64{}}
	in.sum.Recording = rec
	in.startChecks(noImageFetch)
	var c Candidate
	opts := recording.Options{SortBufferBytes: recordingSortBuffer, Tap: tap}
	stats, err := ticks.assemble(ctx, src, id, cfg, opts, func(t *recording.Tick) error {
		tickCandidate(&c, t, id)
		return in.consume(ctx, &c)
	})
	if err != nil {
		return err
	}
	in.endProgress()
	rec.Ticks = stats.Ticks
	for k, n := range stats.Messages {
		rec.Messages[k] = n
	}
	for k, n := range stats.Undecodable {
		rec.Undecodable[k] = n
	}
	in.sum.Incomplete = stats.Incomplete
	return in.finishRecording(ctx, tap)
}

// finishRecording checks the tapped bytes against the listing and seals
// the object's identity.
func (in *ingester) finishRecording(ctx context.Context, tap *objectTap) error {
	if in.env.Progress != nil {
		in.env.Progress.Advance("ingest", 0, tap.since)
	}
	if tap.n != in.obj.Size {
		return fmt.Errorf("%s changed since it was listed (%d bytes read, %d listed); run again", in.uri, tap.n, in.obj.Size)
	}
	in.sum.Bytes = tap.n
	in.sum.SHA256 = hex.EncodeToString(tap.h.Sum(nil))
	return in.flush(ctx)
}

// tickCandidate fills c from a tick; the slices alias the tick's, which
// are valid only during the callback (toFrame copies what it keeps).
func tickCandidate(c *Candidate, t *recording.Tick, id recording.Identity) {
	*c = Candidate{
		Line: t.Index, Reason: t.Reason, StaleTopic: t.StaleTopic,
		Unit: id.Unit, Embodiment: id.Embodiment, HasT: true, T: t.T,
		Obs: t.Obs, Act: t.Act, HasAct: t.HasAct,
		Ev: t.Ev, Task: t.Task, HasTask: t.HasTask, Success: t.Success, HasSuccess: t.HasSuccess,
		Images: t.Images, HasImages: true,
	}
}

// noImageFetch stands where a line's image references are fetched: a tick
// brings its camera bytes along and never names an object.
func noImageFetch(context.Context, string) ([]byte, error) { return nil, errBadRef }

// tickRecord is what the quarantine keeps of a dropped tick in place of a
// line's text: the recording, the tick's index and time, the reason, and
// for a stale tick the topic that made it stale.
func tickRecord(key string, c *Candidate, reason string) []byte {
	doc := struct {
		Recording  string `json:"recording"`
		Tick       int64  `json:"tick"`
		T          int64  `json:"t"`
		Reason     string `json:"reason"`
		StaleTopic string `json:"stale_topic,omitempty"`
	}{key, c.Line, c.T, reason, ""}
	if reason == pipeline.Stale {
		doc.StaleTopic = c.StaleTopic
	}
	b, _ := json.Marshal(doc)
	return b
}
