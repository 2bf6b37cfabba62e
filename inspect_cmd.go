package main

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"

	"hindcast/inspect"
	"hindcast/pipeline"
)

// errProblems makes verify exit 1 after it has printed what is wrong.
var errProblems = errors.New("the version has problems (listed above)")

// inspectCommand runs show, trace, verify, diff and report. Versions are
// read with the environment's storage settings (AWS_ENDPOINT_URL_S3 and the
// standard credential chain for s3:// URIs).
func inspectCommand(ctx context.Context, c *Command, stdout io.Writer) error {
	var vs []*pipeline.Version
	for _, loc := range c.Versions {
		v, err := pipeline.OpenVersion(ctx, loc, pipeline.StorageConfig{})
		if err != nil {
			return err
		}
		vs = append(vs, v)
	}
	emit := func(data any, text func(io.Writer) error) error {
		if c.JSON {
			enc := json.NewEncoder(stdout)
			enc.SetIndent("", "  ")
			return enc.Encode(data)
		}
		return text(stdout)
	}
	switch c.Name {
	case "show":
		r := inspect.Show(vs[0])
		perReason := map[string]int{}
		lines, err := inspect.QuarantineLines(ctx, vs[0], func(_, reason string) bool {
			perReason[reason]++
			return perReason[reason] <= 3
		}, 0)
		if err != nil {
			return err
		}
		r.Quarantine = lines
		return emit(r, func(w io.Writer) error {
			if err := r.WriteText(w); err != nil {
				return err
			}
			if q := vs[0].Manifest.Quarantine; q != nil {
				return inspect.WriteQuarantineText(w, fmt.Sprintf("quarantine: %d dropped lines in %s (first three per reason)", q.Rows, q.Path), lines)
			}
			return nil
		})
	case "trace":
		q := inspect.TraceQuery{Source: c.Source, Episode: c.Episode, File: c.File}
		if c.File != "" {
			q.Row = c.Row
		}
		r, err := inspect.Trace(ctx, vs[0], q)
		if err != nil {
			return err
		}
		if r.Source != nil && vs[0].Manifest.Quarantine != nil {
			key := r.Source.Key
			if r.Dropped, err = inspect.QuarantineLines(ctx, vs[0], func(src, _ string) bool { return src == key }, 0); err != nil {
				return err
			}
		}
		return emit(r, func(w io.Writer) error {
			if err := r.WriteText(w); err != nil {
				return err
			}
			if r.Source != nil && vs[0].Manifest.Quarantine != nil {
				return inspect.WriteQuarantineText(w, fmt.Sprintf("dropped lines of %s (quarantine): %d", r.Source.Key, len(r.Dropped)), r.Dropped)
			}
			return nil
		})
	case "verify":
		r, err := inspect.Verify(ctx, vs[0])
		if err != nil {
			return err
		}
		if err := emit(r, r.WriteText); err != nil {
			return err
		}
		if !r.OK() {
			return errProblems
		}
		return nil
	case "diff":
		r := inspect.Diff(vs[0], vs[1])
		if err := inspect.DiffMoves(ctx, r, vs[0], vs[1]); err != nil {
			return err
		}
		return emit(r, r.WriteText)
	case "report":
		f, err := os.Create(c.Output)
		if err != nil {
			return err
		}
		if err := inspect.Report(vs[0], f); err != nil {
			f.Close()
			os.Remove(c.Output)
			return fmt.Errorf("report %s: %w", vs[0].URI, err)
		}
		if err := f.Close(); err != nil {
			return err
		}
		fmt.Fprintf(stdout, "report of %s written to %s\n", vs[0].URI, c.Output)
		return nil
	}
	return fmt.Errorf("unknown inspection command %q", c.Name)
}
