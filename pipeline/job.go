package pipeline

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
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
}

// Execute runs every stage over the config's source and commits the version.
// Nothing is published unless every stage succeeded.
func Execute(ctx context.Context, cfg *Config, stages []Stage, opt Options) (*Manifest, error) {
	if opt.Now == nil {
		opt.Now = time.Now
	}
	if opt.Log == nil {
		opt.Log = slog.New(slog.DiscardHandler)
	}
	if opt.Version == "" {
		opt.Version = DefaultVersion(opt.Now())
	}
	if err := ValidVersion(opt.Version); err != nil {
		return nil, err
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
	// Refuse an existing version before doing any work.
	prefix := VersionPrefix(cfg.Dataset, opt.Version)
	if _, err := out.Stat(ctx, prefix+ManifestName); err == nil {
		return nil, fmt.Errorf("commit %s: %w", JoinURI(out.URI(), prefix), ErrVersionExists)
	} else if !errors.Is(err, ErrNotFound) {
		return nil, err
	}
	env := &Env{Config: cfg, Source: src, Work: work, Parallel: opt.Parallel, Log: opt.Log, Progress: opt.Progress, Resolve: opener.Open, Code: opt.Code}
	res, err := RunStages(ctx, env, stages)
	if err != nil {
		return nil, err
	}
	m, err := BuildManifest(cfg, res, opt.Version, opt.Tool, opt.Now())
	if err != nil {
		return nil, err
	}
	if err := Commit(ctx, work, out, m, res); err != nil {
		return nil, err
	}
	opt.Log.Info("storage", "requests", opt.Metrics.Requests.Load(), "retries", opt.Metrics.Retries.Load(),
		"bytes_read", opt.Metrics.BytesRead.Load(), "bytes_written", opt.Metrics.BytesWritten.Load())
	return m, nil
}
