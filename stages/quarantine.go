package stages

import (
	"context"
	"fmt"

	"hindcast/pipeline"
	"hindcast/schemas"
)

// quarantine collects one item's dropped lines into a work stream when the
// config asks for it (`quarantine: true`). The stream is created at the first
// drop, so items that drop nothing write nothing. A nil *quarantine (off)
// accepts every call and does nothing.
type quarantine struct {
	ctx  context.Context
	work pipeline.Store
	key  string
	up   pipeline.Upload
	w    *pipeline.DroppedWriter
	err  error
}

func newQuarantine(ctx context.Context, env *pipeline.Env, key string) *quarantine {
	if !env.Config.Quarantine {
		return nil
	}
	return &quarantine{ctx: ctx, work: env.Work, key: key}
}

func (q *quarantine) add(d *schemas.Dropped) {
	if q == nil || q.err != nil {
		return
	}
	if q.w == nil {
		if q.up, q.err = q.work.Create(q.ctx, q.key); q.err != nil {
			return
		}
		q.w = pipeline.NewDroppedWriter(q.up)
	}
	q.err = q.w.Write(d)
}

// close seals the stream and returns its key, or "" when nothing was dropped.
func (q *quarantine) close() (string, error) {
	if q == nil || q.w == nil {
		if q != nil && q.err != nil {
			return "", q.err
		}
		return "", nil
	}
	if q.err != nil {
		return "", q.err
	}
	if err := q.w.Close(); err != nil {
		return "", fmt.Errorf("write %s: %w", q.key, err)
	}
	up := q.up
	q.up, q.w = nil, nil
	return q.key, up.Commit(false)
}

// abort drops an unfinished stream (after a failure).
func (q *quarantine) abort() {
	if q != nil && q.up != nil {
		q.up.Abort()
	}
}
