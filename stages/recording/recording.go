// Package recording turns an MCAP recording into candidate frames on a clock
// (SPEC §7): it finds the recording's unit and embodiment (§7.1), decodes
// the messages of the embodiment's topics by their encoding (§7.2: json,
// protobuf, cdr), takes each source's value at every tick by its align mode
// and max_age (§7.3), and decides the tick-level reasons of §7.4 (stale,
// malformed, and dim_mismatch of linear interpolation). The checks common to
// every input format (lengths, finiteness, bounds, image completeness) run
// in the ingest stage over the ticks it yields.
package recording

import (
	"context"
	"errors"
	"fmt"
	"regexp"

	"hindcast/pipeline"
	"hindcast/stages/jsonl"
	"hindcast/stages/recording/mcapread"
)

// Identity is who recorded a recording (SPEC §7.1).
type Identity struct {
	Unit       string
	Embodiment string
	// Skip is "" or the reason the recording is skipped:
	// pipeline.SkipUnreadable, pipeline.SkipNoUnit or
	// pipeline.SkipUnknownEmbodiment (the first that applies, in that order).
	Skip string
}

// Identify finds the unit and embodiment of the recording stored under key.
// An error is a failure to read the store, never a property of the file.
func Identify(ctx context.Context, src mcapread.Source, key string, cfg *pipeline.Config) (Identity, error) {
	if err := mcapread.CheckHeader(ctx, src); err != nil {
		if errors.Is(err, mcapread.ErrUnreadable) {
			return Identity{Skip: pipeline.SkipUnreadable}, nil
		}
		return Identity{}, fmt.Errorf("identify %s: %w", key, err)
	}
	return identify(key, cfg, func(name string) (map[string]string, error) {
		md, _, err := mcapread.FindMetadata(ctx, src, name)
		return md, err
	})
}

// identify applies §7.1's rules given a way to read a Metadata record (nil
// map when there is none), so the rules are testable without a file.
func identify(key string, cfg *pipeline.Config, metadata func(name string) (map[string]string, error)) (Identity, error) {
	var rules pipeline.RecordingsConfig
	if cfg.Recordings != nil {
		rules = *cfg.Recordings
	}
	// One lookup per Metadata name: unit and embodiment often share it.
	found := map[string]map[string]string{}
	lookup := func(r pipeline.IdentityRule) (string, bool, error) {
		if r.Path != "" {
			re, err := regexp.Compile(r.Path)
			if err != nil {
				return "", false, fmt.Errorf("identify %s: path %q: %w", key, r.Path, err)
			}
			m := re.FindStringSubmatch(key)
			if len(m) < 2 {
				return "", false, nil
			}
			return m[1], true, nil
		}
		if r.Metadata == "" {
			return "", false, nil
		}
		md, ok := found[r.Metadata]
		if !ok {
			var err error
			md, err = metadata(r.Metadata)
			if err != nil {
				return "", false, fmt.Errorf("identify %s: metadata %s: %w", key, r.Metadata, err)
			}
			found[r.Metadata] = md
		}
		v, ok := md[r.Key]
		return v, ok, nil
	}
	unit, ok, err := lookup(rules.Unit)
	if err != nil {
		return Identity{}, err
	}
	if !ok || !jsonl.ValidUnit(unit) {
		return Identity{Skip: pipeline.SkipNoUnit}, nil
	}
	emb, ok, err := lookup(rules.Embodiment)
	if err != nil {
		return Identity{}, err
	}
	if e := cfg.Embodiments[emb]; !ok || e == nil || e.Frames == nil {
		return Identity{Unit: unit, Embodiment: emb, Skip: pipeline.SkipUnknownEmbodiment}, nil
	}
	return Identity{Unit: unit, Embodiment: emb}, nil
}

// Tick is one tick of a recording, before the common checks.
type Tick struct {
	// Index is the tick's 1-based position among the recording's ticks
	// (its src_line).
	Index int64
	T     int64
	// Reason is "" or a reason decided at the tick: pipeline.Stale,
	// pipeline.Malformed or pipeline.DimMismatch (linear over value lists
	// of different lengths). StaleTopic names the first stale source's
	// topic, in frames order (obs, act, cameras), when Reason is Stale.
	Reason     string
	StaleTopic string
	// Obs and Act are the concatenated values, in float64 as computed
	// (before any rounding); Act is nil without act sources.
	Obs    []float64
	Act    []float64
	HasAct bool
	// Images holds, per camera of the embodiment's Cameras (in that order),
	// the bytes taken at the tick. It may alias buffers reused after fn
	// returns: copy what must outlive the call.
	Images     [][]byte
	Ev         string // "start", "end" or ""
	Task       string
	HasTask    bool
	Success    bool
	HasSuccess bool
}

// Stats are a recording's counts for the manifest (SPEC §7.6).
type Stats struct {
	Ticks int64
	// Messages counts decodable messages read per topic, on frame, events,
	// task and success topics; Undecodable counts the others per topic.
	Messages    map[string]int64
	Undecodable map[string]int64
	// Incomplete is SPEC §7.5's mark.
	Incomplete bool
}

// Options bounds the memory and names the scratch space of one recording.
type Options struct {
	// SortBufferBytes and ScratchDir are passed to mcapread.
	SortBufferBytes int64
	ScratchDir      string
	// Tap sees every byte of the object once (see mcapread.Options.Tap).
	Tap interface{ Write([]byte) (int, error) }
}

// Assemble reads the recording and calls fn for every tick in order.
// It reads the recording once, in time order; the memory it holds beyond
// mcapread's sort buffer is, per source, the messages within max_age of the
// pending tick.
func Assemble(ctx context.Context, src mcapread.Source, id Identity, cfg *pipeline.Config, opts Options, fn func(*Tick) error) (Stats, error) {
	if id.Skip != "" {
		return Stats{}, fmt.Errorf("assemble: recording skipped as %s", id.Skip)
	}
	emb := cfg.Embodiments[id.Embodiment]
	if emb == nil || emb.Frames == nil {
		return Stats{}, fmt.Errorf("assemble: embodiment %q has no frames", id.Embodiment)
	}
	a, err := newAligner(emb, fn)
	if err != nil {
		return Stats{}, fmt.Errorf("assemble %s: %w", id.Embodiment, err)
	}
	ro := mcapread.Options{
		UsePublishTime:  cfg.Recordings != nil && cfg.Recordings.Time == "publish_time",
		Topics:          a.wants,
		SortBufferBytes: opts.SortBufferBytes,
		ScratchDir:      opts.ScratchDir,
	}
	if opts.Tap != nil {
		ro.Tap = opts.Tap
	}
	res, err := mcapread.ReadOrdered(ctx, src, ro, func(m *mcapread.Message) error {
		if err := ctx.Err(); err != nil {
			return err
		}
		return a.add(m)
	})
	a.stats.Incomplete = res.Incomplete
	if err != nil {
		return a.stats, fmt.Errorf("assemble: %w", err)
	}
	if err := a.flush(0, true); err != nil {
		return a.stats, err
	}
	return a.stats, nil
}
