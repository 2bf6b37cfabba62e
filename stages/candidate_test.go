package stages

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"maps"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"

	"github.com/aws/aws-sdk-go-v2/aws"
	"github.com/aws/aws-sdk-go-v2/service/s3"
	"github.com/santhosh-tekuri/jsonschema/v6"

	"hindcast/internal/s3test"
	"hindcast/pipeline"
	"hindcast/schemas"
	"hindcast/stages/recording"
	"hindcast/stages/recording/mcapread"
)

// TestCandidateChecksFollowReasonOrder holds the decoders' own reasons and
// the common checks to the one list of reasons, pipeline.ReasonDefs: each
// format's reasons come in the list's order, and every reason the list
// says can drop a line (a tick) is decided by the JSON Lines decoder (the
// recording's ticks) or a check.
func TestCandidateChecksFollowReasonOrder(t *testing.T) {
	pos := map[string]int{}
	for i, r := range pipeline.Reasons() {
		pos[r] = i
	}
	var checks []string
	for _, c := range candidateChecks() {
		checks = append(checks, c.reason)
	}
	lines, ticks := decoderReasons()
	for _, c := range []struct {
		kind    string
		decoder []string
		applies func(pipeline.ReasonDef) bool
	}{
		{"line", lines, func(d pipeline.ReasonDef) bool { return d.Lines }},
		{"tick", ticks, func(d pipeline.ReasonDef) bool { return d.Ticks }},
	} {
		order := slices.Concat(c.decoder, checks)
		// A reason decided twice (a tick's dim_mismatch: by linear
		// interpolation, then by length) keeps its first place; checks that
		// cannot apply to the kind (a tick's unknown_embodiment) pass and
		// are left out.
		applies := map[string]bool{}
		for _, d := range pipeline.ReasonDefs() {
			applies[d.Name] = c.applies(d)
		}
		var seen []string
		for _, r := range order {
			if applies[r] && !slices.Contains(seen, r) {
				seen = append(seen, r)
			}
		}
		if !slices.IsSortedFunc(seen, func(a, b string) int { return pos[a] - pos[b] }) {
			t.Errorf("%s reasons %v are not in the order of pipeline.Reasons %v", c.kind, seen, pipeline.Reasons())
		}
		for _, d := range pipeline.ReasonDefs() {
			if d.Stage == pipeline.StageIngest && c.applies(d) && !slices.Contains(seen, d.Name) {
				t.Errorf("no decoder or check decides %s for a %s", d.Name, c.kind)
			}
		}
	}
}

// fakeRecording is what a fake recording object holds after the MCAP magic:
// the identity and ticks the fake tick source hands over, so the seam
// between ingest and the recording reader is tested apart from MCAP.
type fakeRecording struct {
	Unit        string           `json:"unit"`
	Embodiment  string           `json:"embodiment"`
	Skip        string           `json:"skip"`
	Incomplete  bool             `json:"incomplete"`
	Messages    map[string]int64 `json:"messages"`
	Undecodable map[string]int64 `json:"undecodable"`
	Ticks       []fakeTick       `json:"ticks"`
}

type fakeTick struct {
	T      int64     `json:"t"`
	Reason string    `json:"reason"`
	Stale  string    `json:"stale"`
	Obs    []float64 `json:"obs"`
	Act    []float64 `json:"act"`
	Img    [][]byte  `json:"img"`
	Ev     string    `json:"ev"`
	Task   string    `json:"task"`
	// NaN puts a NaN as the last act value (JSON cannot carry one).
	NaN bool `json:"nan"`
}

func (r fakeRecording) bytes(t *testing.T) []byte {
	t.Helper()
	b, err := json.Marshal(r)
	if err != nil {
		t.Fatal(err)
	}
	return append(mcapread.Magic[:], b...)
}

// fakeTicks reads a fakeRecording through the mcapread.Source the ingest
// stage hands it, tapping every byte once as mcapread promises.
type fakeTicks struct{}

func readFake(ctx context.Context, src mcapread.Source, tap io.Writer) (fakeRecording, error) {
	r, _, err := readFakeRaw(ctx, src, tap)
	return r, err
}

func readFakeRaw(ctx context.Context, src mcapread.Source, tap io.Writer) (fakeRecording, []byte, error) {
	var r fakeRecording
	rc, err := src.Open(ctx, 0)
	if err != nil {
		return r, nil, err
	}
	defer rc.Close()
	b, err := io.ReadAll(rc)
	if err != nil {
		return r, nil, err
	}
	if int64(len(b)) != src.Size() {
		return r, nil, fmt.Errorf("read %d bytes of %d", len(b), src.Size())
	}
	if tap != nil {
		tap.Write(b)
	}
	err = json.Unmarshal(b[len(mcapread.Magic):], &r)
	return r, b, err
}

func (fakeTicks) identify(ctx context.Context, src mcapread.Source, key string, cfg *pipeline.Config) (recording.Identity, error) {
	r, raw, err := readFakeRaw(ctx, src, nil)
	if err != nil {
		return recording.Identity{}, err
	}
	// A ranged read of the tail, as a reader of an MCAP index does (the
	// summary is at the end of the file): it must give the object's last
	// bytes.
	const n = 16
	rc, err := src.Open(ctx, src.Size()-n)
	if err != nil {
		return recording.Identity{}, err
	}
	tail, err := io.ReadAll(rc)
	rc.Close()
	if err != nil {
		return recording.Identity{}, err
	}
	if !bytes.Equal(tail, raw[len(raw)-n:]) {
		return recording.Identity{}, fmt.Errorf("%s: a read from offset %d gave %q, not the object's last %d bytes", key, src.Size()-n, tail, n)
	}
	return recording.Identity{Unit: r.Unit, Embodiment: r.Embodiment, Skip: r.Skip}, nil
}

func (fakeTicks) assemble(ctx context.Context, src mcapread.Source, id recording.Identity, cfg *pipeline.Config, opts recording.Options, fn func(*recording.Tick) error) (recording.Stats, error) {
	r, err := readFake(ctx, src, opts.Tap)
	if err != nil {
		return recording.Stats{}, err
	}
	for i, ft := range r.Ticks {
		if ft.NaN {
			ft.Act[len(ft.Act)-1] = math.NaN()
		}
		tk := recording.Tick{Index: int64(i + 1), T: ft.T, Reason: ft.Reason, StaleTopic: ft.Stale,
			Obs: ft.Obs, Act: ft.Act, HasAct: ft.Act != nil, Images: ft.Img, Ev: ft.Ev, Task: ft.Task, HasTask: ft.Task != ""}
		if err := fn(&tk); err != nil {
			return recording.Stats{}, err
		}
	}
	return recording.Stats{Ticks: int64(len(r.Ticks)), Messages: r.Messages, Undecodable: r.Undecodable, Incomplete: r.Incomplete}, nil
}

// runWithTicks runs the whole pipeline with ts reading recordings, and
// returns the manifest and the quarantined records of the ingest stage.
func runWithTicks(t *testing.T, ts tickSource, cfgYAML string, files map[string][]byte) (*pipeline.Manifest, []schemas.Dropped) {
	t.Helper()
	dir := t.TempDir()
	writeTree(t, filepath.Join(dir, "src"), files)
	return runWithTicksAt(t, ts, dir, withLocations(t, cfgYAML, "src", "work", "out"))
}

// runWithTicksAt runs the config text (its locations set) from dir.
func runWithTicksAt(t *testing.T, ts tickSource, dir string, cfgText []byte) (*pipeline.Manifest, []schemas.Dropped) {
	t.Helper()
	cfgPath := filepath.Join(dir, "hindcast.yaml")
	if err := os.WriteFile(cfgPath, cfgText, 0o644); err != nil {
		t.Fatal(err)
	}
	cfg, err := pipeline.LoadConfig(cfgPath)
	if err != nil {
		t.Fatalf("load config: %v", err)
	}
	sts := All()
	for i, st := range sts {
		if st.Name() == pipeline.StageIngest {
			sts[i] = Ingest{ticks: ts}
		}
	}
	ctx := context.Background()
	m, err := pipeline.Execute(ctx, cfg, sts, pipeline.Options{Version: "v1", Parallel: 2,
		Tool: pipeline.ToolInfo{Version: pipeline.ToolVersion, Commit: "unknown"}})
	if err != nil {
		t.Fatalf("run pipeline: %v", err)
	}
	var dropped []schemas.Dropped
	work := pipeline.NewLocalStore(filepath.Join(dir, "work"))
	err = work.List(ctx, "ingest/", func(o pipeline.ObjectInfo) error {
		if !strings.HasSuffix(o.Key, "quarantine.arrow") {
			return nil
		}
		return pipeline.ReadDropped(ctx, work, o.Key, func(d *schemas.Dropped) error {
			c := *d
			c.Line = bytes.Clone(d.Line)
			dropped = append(dropped, c)
			return nil
		})
	})
	if err != nil {
		t.Fatalf("read the quarantine: %v", err)
	}
	return m, dropped
}

// seamCorpus is a mixed corpus (JSON Lines and recordings of one unit) for
// a fake tick source: one recording per reason of SPEC §7.4 and per skip
// of §7.1, a duplicate recording and an incomplete one.
func seamCorpus(t *testing.T) (files map[string][]byte, cfg string, a, b, c fakeRecording) {
	png := ingestFixture(t, "frames/ok.png")
	ms := int64(1_000_000)
	ok := func(i int64) fakeTick {
		return fakeTick{T: i * ms, Obs: []float64{0.5, 0.5, 0.5}, Act: []float64{0.1, 0.2}}
	}
	// rec/a.mcap: 10 ticks at 1…10 ms: 6 kept, 2 stale (one per topic), 1
	// malformed, 1 dim_mismatch from interpolation. It starts an episode
	// and the JSON Lines log below continues it.
	a = fakeRecording{Unit: "u1", Embodiment: "arm",
		Messages: map[string]int64{"/joints": 40, "/cmd": 20}, Undecodable: map[string]int64{"/cmd": 3}}
	for i := int64(1); i <= 10; i++ {
		tk := ok(i)
		switch i {
		case 2:
			tk.Reason, tk.Stale, tk.Obs = pipeline.Stale, "/joints", nil
		case 3:
			tk.Reason, tk.Stale, tk.Obs = pipeline.Stale, "/cmd", nil
		case 4:
			tk.Reason, tk.Stale = pipeline.Stale, "/joints"
		case 5:
			tk.Reason = pipeline.Malformed
		case 6:
			tk.Reason = pipeline.DimMismatch
		}
		a.Ticks = append(a.Ticks, tk)
	}
	// rec/b.mcap: the common checks over ticks: 5 ticks at 20…24 ms, one
	// each of dim_mismatch (obs length), non_finite, out_of_range, 2 kept;
	// the recording is incomplete.
	b = fakeRecording{Unit: "u1", Embodiment: "arm", Incomplete: true,
		Messages: map[string]int64{"/joints": 5}, Undecodable: map[string]int64{}}
	for i := int64(20); i <= 24; i++ {
		tk := ok(i)
		switch i {
		case 21:
			tk.Obs = []float64{0.5, 0.5}
		case 22:
			tk.NaN = true
		case 23:
			tk.Obs = []float64{0.5, 50, 0.5}
		}
		b.Ticks = append(b.Ticks, tk)
	}
	// rec/c.mcap: a camera embodiment: 4 ticks, one image_corrupt, 3 kept
	// (with the task set on the last).
	c = fakeRecording{Unit: "u2", Embodiment: "cam", Messages: map[string]int64{"/front": 4}, Undecodable: map[string]int64{}}
	for i := int64(1); i <= 4; i++ {
		tk := fakeTick{T: i * ms, Obs: []float64{1, 2, 3}, Img: [][]byte{png}}
		if i == 2 {
			tk.Img = [][]byte{png[:len(png)-5]}
		}
		if i == 4 {
			tk.Task = "stack"
		}
		c.Ticks = append(c.Ticks, tk)
	}
	files = map[string][]byte{
		"rec/a.mcap": a.bytes(t),
		// Found by its magic bytes, not its name.
		"rec/b.log":       b.bytes(t),
		"rec/c.mcap":      c.bytes(t),
		"rec/d-dup.mcap":  a.bytes(t),
		"rec/e-noid.mcap": fakeRecording{Skip: pipeline.SkipNoUnit, Ticks: []fakeTick{ok(1)}}.bytes(t),
		"rec/f-bad.mcap":  fakeRecording{Skip: pipeline.SkipUnreadable}.bytes(t),
		"rec/g-emb.mcap":  fakeRecording{Unit: "u3", Skip: pipeline.SkipUnknownEmbodiment}.bytes(t),
		"rec/h-emb.mcap":  fakeRecording{Unit: "u4", Skip: pipeline.SkipUnknownEmbodiment}.bytes(t),
		// u1's JSON Lines at 11…14 ms, one malformed.
		"rec/u1.jsonl": jsonLines(armLine("u1", 11*ms, ""), armLine("u1", 12*ms, ""), `{"unit":`,
			armLine("u1", 13*ms, ""), armLine("u1", 14*ms, "")),
	}
	cfg = `
dataset: seam
partitions: 2
quarantine: true
source: {include: ["**"]}
embodiments:
  arm: {obs: 3, act: 2, obs_low: -10, obs_high: 10, goal_tolerance: 0.1}
  cam: {obs: 3, act: 2, cameras: [front], goal_tolerance: 0.1}
episodes: {max_gap: 1s, min_steps: 2, max_steps: 100}
goals: {future: 1, geometric: 0, final: 0, negative: 0}
`
	return files, cfg, a, b, c
}

// TestIngestRecordingSeam runs seamCorpus through the pipeline with a fake
// tick source and checks exact counts per source, in the funnel and in the
// quarantine.
func TestIngestRecordingSeam(t *testing.T) {
	files, cfg, a, b, c := seamCorpus(t)
	m, quarantined := runWithTicks(t, fakeTicks{}, cfg, files)

	wantSource(t, m, "rec/a.mcap", 10, 5, map[string]int64{pipeline.Stale: 3, pipeline.Malformed: 1, pipeline.DimMismatch: 1})
	wantSource(t, m, "rec/b.log", 5, 2, map[string]int64{pipeline.DimMismatch: 1, pipeline.NonFinite: 1, pipeline.OutOfRange: 1})
	wantSource(t, m, "rec/c.mcap", 4, 3, map[string]int64{pipeline.ImageCorrupt: 1})
	wantSource(t, m, "rec/u1.jsonl", 5, 4, map[string]int64{pipeline.Malformed: 1})
	for _, k := range []string{"rec/d-dup.mcap", "rec/e-noid.mcap", "rec/f-bad.mcap", "rec/g-emb.mcap", "rec/h-emb.mcap"} {
		wantSource(t, m, k, 0, 0, nil)
	}

	// The recording entries (SPEC §7.6): none for the duplicate and the
	// skipped, lines = ticks, stale ticks per topic (beyond SPEC).
	wantRec := map[string]*pipeline.RecordingSummary{
		"rec/a.mcap": {Unit: "u1", Embodiment: "arm", Ticks: 10, Messages: a.Messages, Undecodable: a.Undecodable,
			StaleBy: map[string]int64{"/joints": 2, "/cmd": 1}},
		"rec/b.log":  {Unit: "u1", Embodiment: "arm", Ticks: 5, Messages: b.Messages, Undecodable: map[string]int64{}, StaleBy: map[string]int64{}},
		"rec/c.mcap": {Unit: "u2", Embodiment: "cam", Ticks: 4, Messages: c.Messages, Undecodable: map[string]int64{}, StaleBy: map[string]int64{}},
	}
	wantSkip := map[string]string{"rec/e-noid.mcap": pipeline.SkipNoUnit, "rec/f-bad.mcap": pipeline.SkipUnreadable,
		"rec/g-emb.mcap": pipeline.SkipUnknownEmbodiment, "rec/h-emb.mcap": pipeline.SkipUnknownEmbodiment}
	for _, s := range m.Sources {
		w := wantRec[s.Key]
		switch {
		case w == nil && s.Recording != nil:
			t.Errorf("%s: recording entry %+v, want none", s.Key, *s.Recording)
		case w != nil && s.Recording == nil:
			t.Errorf("%s: no recording entry", s.Key)
		case w != nil:
			r := s.Recording
			if r.Unit != w.Unit || r.Embodiment != w.Embodiment || r.Ticks != w.Ticks || r.Ticks != s.Lines ||
				!maps.Equal(r.Messages, w.Messages) || !maps.Equal(r.Undecodable, w.Undecodable) || !maps.Equal(r.StaleBy, w.StaleBy) {
				t.Errorf("%s: recording %+v, want %+v", s.Key, *r, *w)
			}
		}
		if s.Skipped != wantSkip[s.Key] {
			t.Errorf("%s: skipped %q, want %q", s.Key, s.Skipped, wantSkip[s.Key])
		}
		if want := s.Key == "rec/b.log"; s.Incomplete != want {
			t.Errorf("%s: incomplete %v, want %v", s.Key, s.Incomplete, want)
		}
	}
	if d := sourceByKey(t, m, "rec/d-dup.mcap"); keyOrNull(d.DuplicateOf) != "rec/a.mcap" {
		t.Errorf("rec/d-dup.mcap: duplicate_of %s, want rec/a.mcap", keyOrNull(d.DuplicateOf))
	}
	wantSkipped := map[string]int64{pipeline.SkipUnreadable: 1, pipeline.SkipNoUnit: 1, pipeline.SkipUnknownEmbodiment: 2}
	if !maps.Equal(m.Funnel.SkippedObjects, wantSkipped) {
		t.Errorf("funnel skipped_objects %v, want %v", m.Funnel.SkippedObjects, wantSkipped)
	}
	// u1: ticks 1, 7…10 of a (5), JSON Lines 11…14 (4), b's 20 and 24 (2):
	// one episode of 11 frames (gaps < 1s); u2: 3 frames, one episode.
	// Pairs: future 1 per step but the last: 10 + 2.
	want := pipeline.Funnel{Objects: 9, DuplicateObjects: 1, Lines: 24, Frames: 14, Episodes: 2, Pairs: 12,
		Dropped: map[string]int64{pipeline.Stale: 3, pipeline.Malformed: 2, pipeline.DimMismatch: 2,
			pipeline.NonFinite: 1, pipeline.OutOfRange: 1, pipeline.ImageCorrupt: 1}}
	wantFunnel(t, m, want)

	// The manifest, recording entries and skips included, matches its JSON
	// Schema (draft 2020-12, validated by santhosh-tekuri/jsonschema).
	validateManifest(t, m)

	// The quarantine keeps the recording's key, the tick's index and, for
	// a stale tick, the topic.
	type rec struct {
		src    string
		line   int64
		reason string
		topic  string
	}
	var got []rec
	for _, d := range quarantined {
		if d.Src == "rec/d-dup.mcap" {
			continue // a duplicate's drops are not the version's (SPEC §3.1)
		}
		r := rec{d.Src, d.SrcLine, d.Reason, ""}
		if strings.HasPrefix(d.Src, "rec/") && !strings.HasSuffix(d.Src, ".jsonl") {
			var doc struct {
				Recording  string `json:"recording"`
				Tick       int64  `json:"tick"`
				Reason     string `json:"reason"`
				StaleTopic string `json:"stale_topic"`
			}
			if err := json.Unmarshal(d.Line, &doc); err != nil {
				t.Fatalf("quarantined tick %s:%d: %v (%q)", d.Src, d.SrcLine, err, d.Line)
			}
			if doc.Recording != d.Src || doc.Tick != d.SrcLine || doc.Reason != d.Reason || !d.HasT || d.Unit == "" {
				t.Errorf("quarantined tick %+v does not match its record %+v", d, doc)
			}
			r.topic = doc.StaleTopic
		}
		got = append(got, r)
	}
	slices.SortFunc(got, func(x, y rec) int {
		if c := strings.Compare(x.src, y.src); c != 0 {
			return c
		}
		return int(x.line - y.line)
	})
	wantQ := []rec{
		{"rec/a.mcap", 2, pipeline.Stale, "/joints"}, {"rec/a.mcap", 3, pipeline.Stale, "/cmd"},
		{"rec/a.mcap", 4, pipeline.Stale, "/joints"}, {"rec/a.mcap", 5, pipeline.Malformed, ""},
		{"rec/a.mcap", 6, pipeline.DimMismatch, ""},
		{"rec/b.log", 2, pipeline.DimMismatch, ""}, {"rec/b.log", 3, pipeline.NonFinite, ""},
		{"rec/b.log", 4, pipeline.OutOfRange, ""},
		{"rec/c.mcap", 2, pipeline.ImageCorrupt, ""},
		{"rec/u1.jsonl", 3, pipeline.Malformed, ""},
	}
	if !slices.Equal(got, wantQ) {
		t.Errorf("quarantine\n%v\nwant\n%v", got, wantQ)
	}
}

// TestIngestKeyCoversRecordings checks that the ingest stage's key changes
// with the recordings section and with an embodiment's frames, and not
// when neither is set.
func TestIngestKeyCoversRecordings(t *testing.T) {
	base := &pipeline.Config{Embodiments: map[string]*pipeline.Embodiment{"arm": {Obs: 3}}}
	key := func(c *pipeline.Config) string { return pipeline.HashParts((Ingest{}).Reads(c)) }
	k0 := key(base)
	rec := *base
	rec.Recordings = &pipeline.RecordingsConfig{Time: "log_time"}
	k1 := key(&rec)
	pub := *base
	pub.Recordings = &pipeline.RecordingsConfig{Time: "publish_time"}
	k2 := key(&pub)
	fr := *base
	fr.Embodiments = map[string]*pipeline.Embodiment{"arm": {Obs: 3, Frames: &pipeline.FramesConfig{Rate: 10}}}
	k3 := key(&fr)
	fr2 := *base
	fr2.Embodiments = map[string]*pipeline.Embodiment{"arm": {Obs: 3, Frames: &pipeline.FramesConfig{Rate: 20}}}
	k4 := key(&fr2)
	keys := []string{k0, k1, k2, k3, k4}
	slices.Sort(keys)
	if len(slices.Compact(keys)) != 5 {
		t.Errorf("ingest keys %v %v %v %v %v: not all different", k0, k1, k2, k3, k4)
	}
	// A config without recordings reads exactly what it read before.
	if _, ok := (Ingest{}).Reads(base).(map[string]any)["recordings"]; ok {
		t.Errorf("a config without recordings puts recordings in the ingest key")
	}
}

// TestIngestRecordingSeamOnS3 runs seamCorpus from a bucket (a real S3
// server on 127.0.0.1, versitygw): recordings are read through ranged
// reads of the store, and the run gives the local run's digest and counts.
func TestIngestRecordingSeamOnS3(t *testing.T) {
	const bucket = "hc-seam"
	srv := s3test.Start(t, bucket)
	none := filepath.Join(t.TempDir(), "none")
	for k, v := range map[string]string{
		"AWS_ACCESS_KEY_ID": srv.AccessKey, "AWS_SECRET_ACCESS_KEY": srv.SecretKey, "AWS_REGION": srv.Region,
		"AWS_SESSION_TOKEN": "", "AWS_PROFILE": "", "AWS_ENDPOINT_URL": "", "AWS_ENDPOINT_URL_S3": "",
		"AWS_EC2_METADATA_DISABLED": "true", "AWS_CONFIG_FILE": none, "AWS_SHARED_CREDENTIALS_FILE": none,
	} {
		t.Setenv(k, v)
	}
	files, cfg, _, _, _ := seamCorpus(t)
	local, qLocal := runWithTicks(t, fakeTicks{}, cfg, files)

	client := srv.Client()
	for _, k := range slices.Sorted(maps.Keys(files)) {
		_, err := client.PutObject(context.Background(), &s3.PutObjectInput{
			Bucket: aws.String(bucket), Key: aws.String("src/" + k), Body: bytes.NewReader(files[k])})
		if err != nil {
			t.Fatalf("upload %s: %v", k, err)
		}
	}
	text := withLocations(t, cfg, "s3://"+bucket+"/src/", "work", "out")
	text = append(text, []byte("storage:\n  endpoint: "+srv.Endpoint+"\n")...)
	remote, qRemote := runWithTicksAt(t, fakeTicks{}, t.TempDir(), text)

	if local.Digest != remote.Digest {
		t.Errorf("digest local %s, on S3 %s", local.Digest, remote.Digest)
	}
	if a, b := mustJSON(t, local.Funnel), mustJSON(t, remote.Funnel); a != b {
		t.Errorf("funnel local %s\non S3 %s", a, b)
	}
	if len(local.Sources) != len(remote.Sources) {
		t.Fatalf("%d sources local, %d on S3", len(local.Sources), len(remote.Sources))
	}
	for i := range local.Sources {
		a, b := local.Sources[i], remote.Sources[i]
		if b.ETag == "" {
			t.Errorf("%s: no etag on S3", b.Key)
		}
		a.URI, a.ETag, a.VersionID, b.URI, b.ETag, b.VersionID = "", "", "", "", "", ""
		if x, y := mustJSON(t, a), mustJSON(t, b); x != y {
			t.Errorf("source local %s\non S3 %s", x, y)
		}
	}
	if len(qLocal) != len(qRemote) || len(qLocal) == 0 {
		t.Errorf("%d quarantined local, %d on S3", len(qLocal), len(qRemote))
	}
}

func mustJSON(t *testing.T, v any) string {
	t.Helper()
	b, err := json.Marshal(v)
	if err != nil {
		t.Fatal(err)
	}
	return string(b)
}

// etagStore is a local store whose readers say their object has the ETag
// etag, as an S3 reader does.
type etagStore struct {
	*pipeline.LocalStore
	etag string
}

type etagReader struct {
	io.ReadCloser
	etag string
}

func (r etagReader) ETag() string { return r.etag }

func (s etagStore) Open(ctx context.Context, key string, offset int64) (io.ReadCloser, error) {
	rc, err := s.LocalStore.Open(ctx, key, offset)
	if err != nil {
		return nil, err
	}
	return etagReader{rc, s.etag}, nil
}

// TestStoreSourceRangedReads checks the adapter from a store to
// mcapread.Source: a read from an offset gives the object's bytes from
// there, and a read of another version than the one listed (another ETag)
// is an error, never a splice of two versions.
func TestStoreSourceRangedReads(t *testing.T) {
	dir := t.TempDir()
	data := []byte("0123456789abcdef")
	if err := os.WriteFile(filepath.Join(dir, "r.mcap"), data, 0o644); err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	obj := pipeline.ObjectInfo{Key: "r.mcap", Size: int64(len(data)), ETag: `"v1"`}
	src := storeSource{store: etagStore{pipeline.NewLocalStore(dir), `"v1"`}, obj: obj, uri: "file:///r.mcap"}
	if src.Size() != 16 {
		t.Errorf("size %d, want 16", src.Size())
	}
	for _, off := range []int64{0, 5, 15, 16} {
		rc, err := src.Open(ctx, off)
		if err != nil {
			t.Fatalf("open at %d: %v", off, err)
		}
		b, err := io.ReadAll(rc)
		rc.Close()
		if err != nil || !bytes.Equal(b, data[off:]) {
			t.Errorf("read from %d: %q (%v), want %q", off, b, err, data[off:])
		}
	}
	changed := storeSource{store: etagStore{pipeline.NewLocalStore(dir), `"v2"`}, obj: obj, uri: "file:///r.mcap"}
	if _, err := changed.Open(ctx, 4); err == nil || !strings.Contains(err.Error(), "changed since it was listed") {
		t.Errorf("a read of another version: %v, want an error saying the object changed", err)
	}
}

// validateManifest checks a manifest against schemas.ManifestSchema.
func validateManifest(t *testing.T, m *pipeline.Manifest) {
	t.Helper()
	raw, err := json.Marshal(m)
	if err != nil {
		t.Fatal(err)
	}
	doc, err := jsonschema.UnmarshalJSON(bytes.NewReader(schemas.ManifestSchema()))
	if err != nil {
		t.Fatal(err)
	}
	c := jsonschema.NewCompiler()
	c.AssertFormat()
	if err := c.AddResource("manifest.schema.json", doc); err != nil {
		t.Fatal(err)
	}
	sch, err := c.Compile("manifest.schema.json")
	if err != nil {
		t.Fatal(err)
	}
	inst, err := jsonschema.UnmarshalJSON(bytes.NewReader(raw))
	if err != nil {
		t.Fatal(err)
	}
	if err := sch.Validate(inst); err != nil {
		t.Errorf("the manifest does not match its schema: %v", err)
	}
}
