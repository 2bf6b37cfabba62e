// Package recording turns an MCAP recording into candidate frames on a clock
// (SPEC §7): it finds the recording's unit and embodiment (§7.1), decodes
// the messages of the embodiment's topics by their encoding (§7.2: json,
// protobuf, cdr), takes each source's value at every tick by its align mode
// and max_age (§7.3), and decides the tick-level reasons of §7.4 (stale,
// malformed, and dim_mismatch of linear interpolation). The checks common to
// every input format (lengths, finiteness, bounds, image completeness) run
// in the ingest stage over the ticks it yields.
//
// CONTRACT STUB: the signatures below are fixed; the bodies are filled in by
// the package's own change.
package recording

import (
	"context"
	"errors"

	"hindcast/pipeline"
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
	return Identity{}, errors.New("recording: not implemented")
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
func Assemble(ctx context.Context, src mcapread.Source, id Identity, cfg *pipeline.Config, opts Options, fn func(*Tick) error) (Stats, error) {
	return Stats{}, errors.New("recording: not implemented")
}
