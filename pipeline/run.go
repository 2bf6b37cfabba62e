package pipeline

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"log/slog"
	"math/rand/v2"
	"os"
	"runtime/debug"
	"sort"
	"strings"
	"sync/atomic"
	"time"

	"golang.org/x/sync/errgroup"
)

// ToolVersion is hindcast's release; it is part of every stage key, so a new
// release never trusts intermediates written by an older one.
const ToolVersion = "0.1.0"

// Env is what a stage sees of a run: the resolved config, the stores, and
// where to report. It holds no per-stage state, so any process that builds
// the same Env computes the same items and keys.
type Env struct {
	Config   *Config
	Source   Store
	Work     Store
	Parallel int
	Log      *slog.Logger
	Progress Progress
	// Resolve opens the store of an absolute URI (images referenced by
	// file:// or s3:// URIs). Nil means OpenStore.
	Resolve func(ctx context.Context, uri string) (Store, error)
	// Code identifies the build beyond ToolVersion (see CodeID); it is part
	// of every stage key, so a rebuilt binary never trusts what an older
	// build wrote.
	Code string
}

// CodeID identifies the running build: the VCS revision when the binary
// was built from a clean checkout, else the SHA-256 of the executable. Every
// worker of a cluster runs the same image and so agrees on it.
func CodeID() string {
	if bi, ok := debug.ReadBuildInfo(); ok {
		rev, dirty := "", true
		for _, s := range bi.Settings {
			switch s.Key {
			case "vcs.revision":
				rev = s.Value
			case "vcs.modified":
				dirty = s.Value == "true"
			}
		}
		if rev != "" && !dirty {
			return "rev:" + rev
		}
	}
	exe, err := os.Executable()
	if err != nil {
		return "unknown"
	}
	f, err := os.Open(exe)
	if err != nil {
		return "unknown"
	}
	defer f.Close()
	h := sha256.New()
	if _, err := io.Copy(h, f); err != nil {
		return "unknown"
	}
	return "exe:" + hex.EncodeToString(h.Sum(nil))
}

// Progress receives counts while a stage runs; the CLI draws them as a live
// line on a terminal, or logs them.
type Progress interface {
	StageStart(name string, items int, bytes int64)
	// Advance reports frames and input bytes processed within an item.
	Advance(name string, frames, bytes int64)
	ItemDone(name string, reused bool)
	StageEnd(name string)
}

// Item is one unit of a stage's work: an object for ingest, a partition
// after it. Its Key addresses its output under work, so an item whose inputs
// and config did not change keeps its key, and one whose inputs changed gets
// a new one.
type Item struct {
	ID    string // stable name: the object key, or "p00003"
	Key   string // content address of the output
	Bytes int64  // input bytes, for progress and plans
	Meta  any    // stage-specific inputs, derived (never stored)
}

// Stage is one step of the pipeline. A stage's output is a set of items, each
// written under Dir(stage, item.Key) and sealed by a completion record that
// holds the item's summary; downstream stages read only sealed items.
type Stage interface {
	Name() string
	// Reads returns the parts of the config this stage's output depends on;
	// they go into its key.
	Reads(cfg *Config) any
	// Items lists the stage's work, given the sealed items of the stages
	// before it (by stage name).
	Items(ctx context.Context, env *Env, configKey string, upstream map[string][]Sealed) ([]Item, error)
	// Do runs one item, writing under ItemDir(stage, item.Key), and returns
	// the summary to seal it with.
	Do(ctx context.Context, env *Env, it Item) (any, error)
}

// Sealed is a finished item: its identity and its summary (raw JSON; the
// stage that wrote it knows its type).
type Sealed struct {
	Item    Item
	Summary json.RawMessage
}

// StageResult is what a run records of one stage (SPEC §5 `stages`).
type StageResult struct {
	Name    string  `json:"name"`
	Key     string  `json:"key"`
	Cached  bool    `json:"cached"`
	Seconds float64 `json:"seconds"`
	Items   int     `json:"items"`
	Reused  int     `json:"reused"`
}

// ItemDir is where an item's output lives in the work store.
func ItemDir(stage, key string) string { return stage + "/" + key + "/" }

const doneName = "_done.json"

// doneRecord seals an item: written last, after every file of the item.
type doneRecord struct {
	Stage   string          `json:"stage"`
	Key     string          `json:"key"`
	ID      string          `json:"id"`
	Seconds float64         `json:"seconds"`
	Summary json.RawMessage `json:"summary"`
}

// HashParts returns the hex SHA-256 of the JSON encodings of parts, each
// length-prefixed so that no two different part lists hash alike.
func HashParts(parts ...any) string {
	h := sha256.New()
	for _, p := range parts {
		b, err := json.Marshal(p)
		if err != nil {
			panic(fmt.Sprintf("hash parts: %v", err)) // only plain data is hashed
		}
		fmt.Fprintf(h, "%d:", len(b))
		h.Write(b)
	}
	return hex.EncodeToString(h.Sum(nil))
}

// ConfigKey is the part of a stage's key that its config and code give.
func ConfigKey(st Stage, cfg *Config, code string) string {
	return HashParts("hindcast-stage", st.Name(), ToolVersion, code, st.Reads(cfg))
}

// Result is the outcome of running the stages: per stage, its record and its
// sealed items, in stage order.
type Result struct {
	Stages []StageResult
	Sealed map[string][]Sealed
}

// RunStages runs every stage in order, each item at most env.Parallel at a
// time. An item already sealed under its key is reused, not redone.
func RunStages(ctx context.Context, env *Env, stages []Stage) (*Result, error) {
	res := &Result{Sealed: map[string][]Sealed{}}
	for _, st := range stages {
		start := time.Now()
		ckey, items, err := planStage(ctx, env, st, res)
		if err != nil {
			return nil, err
		}
		sealed, reused, err := runItems(ctx, env, st, items)
		if err != nil {
			return nil, err
		}
		res.Sealed[st.Name()] = sealed
		res.Stages = append(res.Stages, StageResult{
			Name:    st.Name(),
			Key:     stageKey(ckey, items),
			Cached:  len(items) > 0 && reused == len(items),
			Seconds: time.Since(start).Seconds(),
			Items:   len(items),
			Reused:  reused,
		})
	}
	return res, nil
}

func planStage(ctx context.Context, env *Env, st Stage, res *Result) (string, []Item, error) {
	ckey := ConfigKey(st, env.Config, env.Code)
	items, err := st.Items(ctx, env, ckey, res.Sealed)
	if err != nil {
		return "", nil, fmt.Errorf("%s: %w", st.Name(), err)
	}
	return ckey, items, nil
}

// stageKey is a stage's key for the manifest: its config key and the keys
// of all its items (which hold their inputs' keys).
func stageKey(ckey string, items []Item) string {
	keys := make([]string, len(items))
	for i, it := range items {
		keys[i] = it.Key
	}
	sort.Strings(keys)
	return HashParts(ckey, keys)
}

// Share is worker i's part of a stage's items, of n workers: the items at
// positions i, i+n, i+2n… of the stage's own item order. Every worker
// computes the same item list, so the rule needs no coordination, and which
// worker ran an item never changes what it wrote.
func Share(items []Item, worker, workers int) []Item {
	var out []Item
	for i := worker; i < len(items); i += workers {
		out = append(out, items[i])
	}
	return out
}

// IncompleteError says which items of a stage are not sealed yet.
type IncompleteError struct {
	Stage   string
	Missing []string // item ids
	Total   int
}

func (e *IncompleteError) Error() string {
	return fmt.Sprintf("stage %s is not complete: %d of %d items not sealed (first: %s); run its workers first",
		e.Stage, len(e.Missing), e.Total, e.Missing[0])
}

// LoadStages reads the seals of every stage without running anything; it
// fails with an *IncompleteError naming the first stage with unsealed items.
func LoadStages(ctx context.Context, env *Env, stages []Stage) (*Result, error) {
	res := &Result{Sealed: map[string][]Sealed{}}
	for _, st := range stages {
		ckey, items, err := planStage(ctx, env, st, res)
		if err != nil {
			return nil, err
		}
		sealed := make([]Sealed, len(items))
		var missing []string
		var seconds float64
		for i, it := range items {
			rec, ok, err := loadRecord(ctx, env.Work, st.Name(), it.Key)
			if err != nil {
				return nil, err
			}
			if !ok {
				missing = append(missing, it.ID)
				continue
			}
			sealed[i] = Sealed{Item: it, Summary: rec.Summary}
			seconds += rec.Seconds
		}
		if len(missing) > 0 {
			return nil, &IncompleteError{Stage: st.Name(), Missing: missing, Total: len(items)}
		}
		res.Sealed[st.Name()] = sealed
		res.Stages = append(res.Stages, StageResult{Name: st.Name(), Key: stageKey(ckey, items),
			Seconds: seconds, Items: len(items)})
	}
	return res, nil
}

// RunShare runs worker's share of the stage named name, after checking that
// every stage before it is complete.
func RunShare(ctx context.Context, env *Env, stages []Stage, name string, worker, workers int) (StageResult, error) {
	for i, st := range stages {
		if st.Name() != name {
			continue
		}
		res, err := LoadStages(ctx, env, stages[:i])
		if err != nil {
			return StageResult{}, err
		}
		start := time.Now()
		ckey, items, err := planStage(ctx, env, st, res)
		if err != nil {
			return StageResult{}, err
		}
		share := Share(items, worker, workers)
		_, reused, err := runItems(ctx, env, st, share)
		if err != nil {
			return StageResult{}, err
		}
		return StageResult{Name: name, Key: stageKey(ckey, items), Cached: len(share) > 0 && reused == len(share),
			Seconds: time.Since(start).Seconds(), Items: len(share), Reused: reused}, nil
	}
	return StageResult{}, fmt.Errorf("no stage %q", name)
}

func runItems(ctx context.Context, env *Env, st Stage, items []Item) ([]Sealed, int, error) {
	var total int64
	for _, it := range items {
		total += it.Bytes
	}
	if env.Progress != nil {
		env.Progress.StageStart(st.Name(), len(items), total)
		defer env.Progress.StageEnd(st.Name())
	}
	sealed := make([]Sealed, len(items))
	wasReused := make([]bool, len(items)) // each index written by its own goroutine
	var reused atomic.Int64
	g, gctx := errgroup.WithContext(ctx)
	g.SetLimit(max(1, env.Parallel))
	// Largest items first (longest-processing-time order): the last item to
	// start is then a small one, so workers finish together. Only the order
	// of execution changes; results stay at their item's position.
	order := make([]int, len(items))
	for i := range order {
		order[i] = i
	}
	sort.SliceStable(order, func(a, b int) bool { return items[order[a]].Bytes > items[order[b]].Bytes })
	for _, i := range order {
		it := items[i]
		g.Go(func() error {
			if err := gctx.Err(); err != nil {
				return err
			}
			sum, wasSealed, err := LoadSealed(gctx, env.Work, st.Name(), it.Key)
			if err != nil {
				return err
			}
			if wasSealed {
				reused.Add(1)
				wasReused[i] = true
				sealed[i] = Sealed{Item: it, Summary: sum}
				if env.Progress != nil {
					env.Progress.ItemDone(st.Name(), true)
				}
				return nil
			}
			dir := ItemDir(st.Name(), it.Key)
			// Whatever an earlier, unsealed attempt left is not trusted.
			if err := DeletePrefix(gctx, env.Work, dir); err != nil {
				return fmt.Errorf("%s %s: clear: %w", st.Name(), it.ID, err)
			}
			began := time.Now()
			out, err := safeDo(gctx, env, st, it)
			if err != nil {
				return fmt.Errorf("%s %s: %w", st.Name(), it.ID, vanishedWrite(env.Work, err))
			}
			raw, err := json.Marshal(out)
			if err != nil {
				return fmt.Errorf("%s %s: summary: %w", st.Name(), it.ID, err)
			}
			rec, _ := json.Marshal(doneRecord{Stage: st.Name(), Key: it.Key, ID: it.ID, Seconds: time.Since(began).Seconds(), Summary: raw})
			if err := Put(gctx, env.Work, dir+doneName, rec, false); err != nil {
				return fmt.Errorf("%s %s: seal: %w", st.Name(), it.ID, err)
			}
			sealed[i] = Sealed{Item: it, Summary: raw}
			if env.Progress != nil {
				env.Progress.ItemDone(st.Name(), false)
			}
			return nil
		})
	}
	if err := g.Wait(); err != nil {
		return nil, 0, err
	}
	if kf, ok := env.Progress.(keptFrames); ok && st.Name() == StageIngest {
		// The frames ingest reported as it read include those of duplicate
		// objects, which the manifest does not count; the stage's end names
		// the kept frames of the first copy of each object this run read
		// (reused items were not read), as the funnel counts them.
		srcs, err := Sources(sealed)
		if err != nil {
			return nil, 0, err
		}
		var n int64
		for i, s := range srcs {
			if s.DuplicateOf == "" && !wasReused[i] {
				n += s.Kept
			}
		}
		kf.KeptFrames(st.Name(), n)
	}
	return sealed, int(reused.Load()), nil
}

// keptFrames is the part of a progress display that takes a stage's kept
// frames once its items are sealed (see runItems).
type keptFrames interface {
	KeptFrames(stage string, n int64)
}

// LoadSealed returns an item's summary when its completion record exists and
// matches the key.
func LoadSealed(ctx context.Context, work Store, stage, key string) (json.RawMessage, bool, error) {
	rec, ok, err := loadRecord(ctx, work, stage, key)
	return rec.Summary, ok, err
}

func loadRecord(ctx context.Context, work Store, stage, key string) (doneRecord, bool, error) {
	b, err := ReadAll(ctx, work, ItemDir(stage, key)+doneName)
	if err != nil {
		if errors.Is(err, ErrNotFound) {
			return doneRecord{}, false, nil
		}
		return doneRecord{}, false, err
	}
	var rec doneRecord
	if err := json.Unmarshal(b, &rec); err != nil || rec.Key != key || rec.Stage != stage {
		// A damaged record seals nothing; the item is redone.
		return doneRecord{}, false, nil
	}
	return rec, true, nil
}

// ErrWorkShared is wrapped around the failure of an item whose own
// unfinished write vanished while it ran: only the clearing of the same item
// by another run using the work area at once removes it.
var ErrWorkShared = errors.New("another run is using this work area at the same time")

// vanishedWrite explains err when it is an unfinished write of the item
// (a temporary file, which nothing but a clearing of the item removes)
// that is no longer there.
func vanishedWrite(work Store, err error) error {
	if !errors.Is(err, fs.ErrNotExist) || !strings.Contains(err.Error(), tempMarker) {
		return err
	}
	return fmt.Errorf("%w (%s): it cleared this item while this run wrote it; let one run finish before another starts on the same work area: %w", ErrWorkShared, work.URI(), err)
}

// probePrefix starts the name of the small object a run writes and deletes
// at the root of its work area and output before the first stage.
const probePrefix = ".hindcast-write-probe-"

// ProbeWritable writes a small object at the root of s and deletes it, so
// that a location the run cannot write (a read-only folder, a bucket the
// credentials may only read) fails the run before any stage, naming the
// location, instead of after all four. role names the location's part in
// the run ("work", "output"). The probe is written exclusively, so it never
// replaces anything; a process killed between the write and the delete
// leaves it behind, with its name saying what it is.
func ProbeWritable(ctx context.Context, role string, s Store) error {
	key := fmt.Sprintf("%s%d-%08x", probePrefix, os.Getpid(), rand.Uint32())
	if err := Put(ctx, s, key, []byte("hindcast checks that it can write here; safe to delete\n"), true); err != nil {
		return fmt.Errorf("%s %s cannot be written: %w", role, s.URI(), err)
	}
	if err := s.Delete(ctx, key); err != nil {
		return fmt.Errorf("%s %s: delete the write probe: %w", role, s.URI(), err)
	}
	return nil
}

// ErrInternal marks a failure that is a bug in hindcast (a panic), not in
// its inputs or storage: the CLI exits 4 for it, so that a scheduler does
// not retry it as a passing fault.
var ErrInternal = errors.New("internal error")

// safeDo runs one item and turns a panic into that item's error, so a bug
// fails the run (exit 4, nothing committed) instead of killing the process.
func safeDo(ctx context.Context, env *Env, st Stage, it Item) (out any, err error) {
	defer func() {
		if r := recover(); r != nil {
			err = fmt.Errorf("%w: %v\n%s", ErrInternal, r, debug.Stack())
		}
	}()
	return st.Do(ctx, env, it)
}
