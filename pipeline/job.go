package pipeline

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"strings"
	"time"
)

// Options are a run's settings that are not part of the config: they never
// change the output.
type Options struct {
	Version  string
	Parallel int
	Log      *slog.Logger
	Progress Progress
	Tool     ToolInfo
	Now      func() time.Time
	// Code identifies the build in stage keys (see CodeID); empty means
	// ToolVersion alone, which tests use.
	Code string
	// Metrics receives the stores' counts (requests, retries, bytes); nil
	// means a fresh set, not reported.
	Metrics *Metrics
	// Gates are the operator's overrides of the quality gates; Drift
	// measures the drift gate (nil: the drift gate has nothing to measure).
	// Neither is part of any stage key: a rerun with an override reuses
	// every stage's work.
	Gates GateOptions
	Drift DriftFunc
}

// Job is a config with its stores opened: what every command (run, stage,
// commit, plan) starts from.
type Job struct {
	Config *Config
	Env    *Env
	Out    Store
	opt    Options
}

// Open opens the config's stores with the run's settings.
func Open(ctx context.Context, cfg *Config, opt Options) (*Job, error) {
	if opt.Now == nil {
		opt.Now = time.Now
	}
	if opt.Log == nil {
		opt.Log = slog.New(slog.DiscardHandler)
	}
	if opt.Metrics == nil {
		opt.Metrics = &Metrics{}
	}
	opener := &Opener{Storage: cfg.Storage, Metrics: opt.Metrics}
	src, err := opener.Open(ctx, cfg.Source.URI)
	if err != nil {
		return nil, err
	}
	work, err := opener.Open(ctx, cfg.Work)
	if err != nil {
		return nil, err
	}
	out, err := opener.Open(ctx, cfg.Output)
	if err != nil {
		return nil, err
	}
	if ls, ok := Unwrap(out).(*LocalStore); ok {
		ls.Durable = true
	}
	env := &Env{Config: cfg, Source: src, Work: work, Parallel: opt.Parallel, Log: opt.Log,
		Progress: opt.Progress, Resolve: opener.Open, Code: opt.Code}
	return &Job{Config: cfg, Env: env, Out: out, opt: opt}, nil
}

// checkVersion validates the version name and refuses one that exists.
func (j *Job) checkVersion(ctx context.Context, version string) error {
	if err := ValidVersion(version); err != nil {
		return err
	}
	prefix := VersionPrefix(j.Config.Dataset, version)
	if _, err := j.Out.Stat(ctx, prefix+ManifestName); err == nil {
		return fmt.Errorf("commit %s: %w", JoinURI(j.Out.URI(), prefix), ErrVersionExists)
	} else if !errors.Is(err, ErrNotFound) {
		return err
	}
	return nil
}

// probe checks that the work area and the output (each when asked) can be
// written (ProbeWritable).
func (j *Job) probe(ctx context.Context, work, out bool) error {
	if work {
		if err := ProbeWritable(ctx, "work", j.Env.Work); err != nil {
			return err
		}
	}
	if out {
		if err := ProbeWritable(ctx, "output", j.Out); err != nil {
			return err
		}
	}
	return nil
}

func (j *Job) version() string {
	if j.opt.Version != "" {
		return j.opt.Version
	}
	return DefaultVersion(j.opt.Now())
}

// commit builds the manifest of res and publishes the version.
func (j *Job) commit(ctx context.Context, res *Result, version string) (*Manifest, error) {
	m, err := BuildManifest(j.Config, res, version, j.opt.Tool, j.opt.Now())
	if err != nil {
		return nil, err
	}
	var base *Manifest
	if j.Config.Gates != nil && j.Config.Gates.MaxDrift != nil {
		if base, err = j.baseline(ctx); err != nil {
			return nil, err
		}
	}
	if m.Gates, err = CheckGates(j.Config, m, base, j.opt.Drift, j.opt.Gates); err != nil {
		return m, err
	}
	if j.Config.Quarantine {
		if m.Quarantine, err = writeQuarantine(ctx, j.Config, j.Env.Work, res); err != nil {
			return nil, fmt.Errorf("quarantine: %w", err)
		}
	}
	if err := Commit(ctx, j.Env.Work, j.Out, m, res); err != nil {
		return nil, err
	}
	mt := j.opt.Metrics
	j.opt.Log.Info("storage", "requests", mt.Requests.Load(), "retries", mt.Retries.Load(),
		"bytes_read", mt.BytesRead.Load(), "bytes_written", mt.BytesWritten.Load())
	return m, nil
}

// Execute runs every stage over the config's source and commits the version.
// Nothing is published unless every stage succeeded.
func Execute(ctx context.Context, cfg *Config, stages []Stage, opt Options) (*Manifest, error) {
	j, err := Open(ctx, cfg, opt)
	if err != nil {
		return nil, err
	}
	version := j.version()
	// Refuse a bad version, places that cannot be written, and an existing
	// version, before doing any work.
	if err := ValidVersion(version); err != nil {
		return nil, err
	}
	if err := j.probe(ctx, true, true); err != nil {
		return nil, err
	}
	if err := j.checkVersion(ctx, version); err != nil {
		return nil, err
	}
	release, err := LockWork(ctx, j.Env.Work, j.opt.Now)
	if err != nil {
		return nil, err
	}
	defer release()
	res, err := RunStages(ctx, j.Env, stages)
	if err != nil {
		return nil, err
	}
	return j.commit(ctx, res, version)
}

// RunWorker runs worker's share (of workers) of one stage; every stage
// before it must be complete.
func RunWorker(ctx context.Context, cfg *Config, stages []Stage, name string, worker, workers int, opt Options) (StageResult, error) {
	j, err := Open(ctx, cfg, opt)
	if err != nil {
		return StageResult{}, err
	}
	if err := j.probe(ctx, true, false); err != nil {
		return StageResult{}, err
	}
	return RunShare(ctx, j.Env, stages, name, worker, workers)
}

// CommitVersion publishes a version from sealed stage outputs, written by
// workers: it fails, naming what is missing, unless every stage is complete.
// Stage seconds in its manifest are the sums of the items' own times.
func CommitVersion(ctx context.Context, cfg *Config, stages []Stage, opt Options) (*Manifest, error) {
	j, err := Open(ctx, cfg, opt)
	if err != nil {
		return nil, err
	}
	version := j.version()
	if err := ValidVersion(version); err != nil {
		return nil, err
	}
	if err := j.probe(ctx, true, true); err != nil {
		return nil, err
	}
	if err := j.checkVersion(ctx, version); err != nil {
		return nil, err
	}
	res, err := LoadStages(ctx, j.Env, stages)
	if err != nil {
		return nil, err
	}
	return j.commit(ctx, res, version)
}

// StagePlan is what a run would do in one stage.
type StagePlan struct {
	Name   string   `json:"name"`
	Known  bool     `json:"known"` // false when an earlier stage must run first to tell
	Items  int      `json:"items"`
	Cached int      `json:"cached"`
	ToRun  []string `json:"to_run"` // ids of the items to (re)compute
	Bytes  int64    `json:"bytes"`  // input bytes of those items, where known
}

// Plan tells what a run would do — per stage, the items already sealed and
// those to compute, and the bytes to read — without writing anything. Items
// of a stage after one with work to do depend on that work (which partitions
// new objects touch is only known once they are read), so they are reported
// as not known yet.
func Plan(ctx context.Context, cfg *Config, stages []Stage, opt Options) ([]StagePlan, error) {
	j, err := Open(ctx, cfg, opt)
	if err != nil {
		return nil, err
	}
	res := &Result{Sealed: map[string][]Sealed{}}
	var plans []StagePlan
	known := true
	for _, st := range stages {
		p := StagePlan{Name: st.Name(), Known: known, ToRun: []string{}}
		if !known {
			plans = append(plans, p)
			continue
		}
		_, items, err := planStage(ctx, j.Env, st, res)
		if err != nil {
			return nil, err
		}
		p.Items = len(items)
		sealed := make([]Sealed, len(items))
		for i, it := range items {
			rec, ok, err := loadRecord(ctx, j.Env.Work, st.Name(), it.Key)
			if err != nil {
				return nil, err
			}
			if ok {
				p.Cached++
				sealed[i] = Sealed{Item: it, Summary: rec.Summary}
				continue
			}
			p.ToRun = append(p.ToRun, it.ID)
			p.Bytes += it.Bytes
		}
		res.Sealed[st.Name()] = sealed
		known = len(p.ToRun) == 0
		plans = append(plans, p)
	}
	return plans, nil
}

// baseline is the version the drift gate compares with: the one named by
// flag, else by the config, else the latest committed version of the
// dataset (by created time, then name); nil when there is none.
func (j *Job) baseline(ctx context.Context) (*Manifest, error) {
	name := j.opt.Gates.Baseline
	if name == "" {
		name = j.Config.Gates.Baseline
	}
	read := func(key string) (*Manifest, error) {
		raw, err := ReadAll(ctx, j.Out, key)
		if err != nil {
			return nil, fmt.Errorf("baseline %s: %w", key, err)
		}
		var m Manifest
		if err := json.Unmarshal(raw, &m); err != nil {
			return nil, fmt.Errorf("baseline %s: %w", key, err)
		}
		return &m, nil
	}
	if name != "" {
		return read(VersionPrefix(j.Config.Dataset, name) + ManifestName)
	}
	var keys []string
	prefix := j.Config.Dataset + "/"
	err := j.Out.List(ctx, prefix, func(o ObjectInfo) error {
		rest := strings.TrimPrefix(o.Key, prefix)
		if v, ok := strings.CutSuffix(rest, "/"+ManifestName); ok && !strings.Contains(v, "/") {
			keys = append(keys, o.Key)
		}
		return nil
	})
	if err != nil {
		return nil, fmt.Errorf("baseline: list %s: %w", prefix, err)
	}
	var latest *Manifest
	for _, k := range keys {
		m, err := read(k)
		if err != nil {
			return nil, err
		}
		if latest == nil || m.Created > latest.Created || (m.Created == latest.Created && m.Version > latest.Version) {
			latest = m
		}
	}
	return latest, nil
}
