package pipeline

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"time"
)

// WorkLockKey is the lock object a whole run (`hindcast run`) holds in its
// work area while it runs. Two runs that share a work area must not run at
// once: each clears the items it finds unsealed, which may be the other's
// items being written, and fails (or leaves a sealed item without its
// files). Workers of one cluster job (`hindcast stage`) run disjoint shares
// and take no lock.
const WorkLockKey = "run.lock.json"

// Lock timing: a holder renews its lock every workLockRenew; a lock written
// on another host and not renewed for workLockStale is taken as left by a
// run that was killed (a lock of this host is judged by its process).
const (
	workLockRenew = 15 * time.Second
	workLockStale = 90 * time.Second
)

// workLock is the content of the lock object.
type workLock struct {
	Host    string `json:"host"`
	PID     int    `json:"pid"`
	Started string `json:"started"`
	Renewed string `json:"renewed"`
}

// LockWork takes the run lock of the work area, or fails with ErrWorkShared
// naming the run that holds it and what to do. A lock left by a run that
// was killed is taken over: one of this host whose process is gone, or one
// of another host not renewed for workLockStale. The returned release stops
// the renewal and removes the lock.
func LockWork(ctx context.Context, work Store, now func() time.Time) (release func(), err error) {
	return lockWork(ctx, work, now, workLockRenew)
}

func lockWork(ctx context.Context, work Store, now func() time.Time, renew time.Duration) (release func(), err error) {
	host, _ := os.Hostname()
	started := now().UTC()
	mine := workLock{Host: host, PID: os.Getpid(), Started: started.Format(time.RFC3339Nano)}
	put := func(exclusive bool) error {
		mine.Renewed = now().UTC().Format(time.RFC3339Nano)
		b, _ := json.Marshal(mine)
		return Put(ctx, work, WorkLockKey, append(b, '\n'), exclusive)
	}
	uri := JoinURI(work.URI(), WorkLockKey)
	for try := 0; ; try++ {
		err := put(true)
		if err == nil {
			break
		}
		if !errors.Is(err, ErrExists) {
			return nil, fmt.Errorf("lock the work area: %w", err)
		}
		raw, err := ReadAll(ctx, work, WorkLockKey)
		if errors.Is(err, ErrNotFound) && try < 2 {
			continue // released meanwhile
		}
		if err != nil {
			return nil, fmt.Errorf("lock the work area: %w", err)
		}
		var held workLock
		_ = json.Unmarshal(raw, &held)
		if stale, why := lockStale(held, host, now()); stale && try < 2 {
			// Left by a killed run: take it over, unless another run
			// took it over first (the lock is no longer what was read).
			if again, err := ReadAll(ctx, work, WorkLockKey); err == nil && !bytes.Equal(again, raw) {
				continue
			}
			if err := work.Delete(ctx, WorkLockKey); err != nil {
				return nil, fmt.Errorf("lock the work area: remove the lock of a run that %s: %w", why, err)
			}
			continue
		}
		return nil, fmt.Errorf("%w: %s is held by a run on %s (pid %d) since %s, renewed %s; "+
			"wait for it to end, or give this run its own work area; if no run is going, delete %s",
			ErrWorkShared, uri, held.Host, held.PID, held.Started, held.Renewed, uri)
	}
	stop := make(chan struct{})
	done := make(chan struct{})
	go func() {
		defer close(done)
		t := time.NewTicker(renew)
		defer t.Stop()
		for {
			select {
			case <-stop:
				return
			case <-ctx.Done():
				return
			case <-t.C:
				// A failed renewal is tried again at the next tick; only
				// 6 missed in a row make the lock stale.
				_ = put(false)
			}
		}
	}()
	return func() {
		close(stop)
		<-done
		// The lock goes even when the run's context was cancelled.
		_ = work.Delete(context.WithoutCancel(ctx), WorkLockKey)
	}, nil
}

// lockStale tells whether a lock was left by a run that no longer runs, and
// why it thinks so.
func lockStale(l workLock, host string, now time.Time) (bool, string) {
	if l.Host == host && l.PID == os.Getpid() {
		// Not this run, which has not written its lock yet: one that ran
		// with the same pid before, as a container's first process does.
		return true, fmt.Sprintf("ran as pid %d on this host before this run", l.PID)
	}
	if l.Host == host && l.PID > 0 {
		if gone, known := processGone(l.PID); known {
			if gone {
				return true, fmt.Sprintf("ran as pid %d on this host and has ended", l.PID)
			}
			return false, ""
		}
	}
	renewed, err := time.Parse(time.RFC3339Nano, l.Renewed)
	if err != nil {
		return false, "" // not a lock this hindcast wrote: left to the operator
	}
	if age := now.Sub(renewed); age > workLockStale {
		return true, fmt.Sprintf("ran on %s and has not renewed its lock for %s", l.Host, age.Round(time.Second))
	}
	return false, ""
}
