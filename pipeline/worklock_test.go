package pipeline

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"os/exec"
	"strings"
	"sync/atomic"
	"testing"
	"time"
)

// TestLockWork: one run at a time holds a work area; a second is refused,
// naming the lock, its holder and what to do; a lock left by a run that
// ended (its process gone, or on another host not renewed for 90 s) is
// taken over; a live one is not.
func TestLockWork(t *testing.T) {
	ctx := context.Background()
	work := NewLocalStore(t.TempDir())
	host, _ := os.Hostname()
	clock := time.Date(2026, 12, 4, 6, 0, 0, 0, time.UTC)
	now := func() time.Time { return clock }
	plant := func(l workLock) {
		t.Helper()
		b, _ := json.Marshal(l)
		if err := Put(ctx, work, WorkLockKey, b, false); err != nil {
			t.Fatal(err)
		}
	}
	lockURI := JoinURI(work.URI(), WorkLockKey)

	// A run of this host that still runs: the test's parent process.
	plant(workLock{Host: host, PID: os.Getppid(), Started: "2026-12-04T05:00:00Z", Renewed: "2026-12-04T05:00:00Z"})
	_, err := LockWork(ctx, work, now)
	if !errors.Is(err, ErrWorkShared) {
		t.Fatalf("lock over a live run's: %v, want ErrWorkShared", err)
	}
	for _, w := range []string{lockURI, fmt.Sprintf("pid %d", os.Getppid()), host, "wait for it to end", "delete " + lockURI} {
		if !strings.Contains(err.Error(), w) {
			t.Errorf("refusal does not say %q: %v", w, err)
		}
	}
	if err := work.Delete(ctx, WorkLockKey); err != nil {
		t.Fatal(err)
	}
	release, err := LockWork(ctx, work, now)
	if err != nil {
		t.Fatal(err)
	}
	release()
	if _, err := work.Stat(ctx, WorkLockKey); !errors.Is(err, ErrNotFound) {
		t.Fatalf("lock after release: %v, want it gone", err)
	}

	// A process of this host that has ended (run and waited for here).
	cmd := exec.Command("true")
	if err := cmd.Run(); err != nil {
		t.Fatal(err)
	}
	old := clock.Add(-time.Hour).Format(time.RFC3339Nano)
	recent := clock.Add(-10 * time.Second).Format(time.RFC3339Nano)
	for _, c := range []struct {
		name string
		held workLock
		take bool
	}{
		{"EndedProcess", workLock{Host: host, PID: cmd.Process.Pid, Renewed: recent}, true},
		{"SamePIDBefore", workLock{Host: host, PID: os.Getpid(), Renewed: recent}, true},
		{"LiveProcess", workLock{Host: host, PID: os.Getppid(), Renewed: old}, false},
		{"OtherHostStale", workLock{Host: "cart-host-9", PID: 7, Renewed: clock.Add(-91 * time.Second).Format(time.RFC3339Nano)}, true},
		{"OtherHostRenewed", workLock{Host: "cart-host-9", PID: 7, Renewed: clock.Add(-89 * time.Second).Format(time.RFC3339Nano)}, false},
		{"Unreadable", workLock{Host: "cart-host-9"}, false},
	} {
		t.Run(c.name, func(t *testing.T) {
			plant(c.held)
			release, err := LockWork(ctx, work, now)
			if c.take {
				if err != nil {
					t.Fatalf("lock over one left by a run that ended: %v", err)
				}
				raw, _ := ReadAll(ctx, work, WorkLockKey)
				var got workLock
				if json.Unmarshal(raw, &got) != nil || got.PID != os.Getpid() || got.Host != host {
					t.Errorf("lock after the takeover: %s", raw)
				}
				release()
				return
			}
			if !errors.Is(err, ErrWorkShared) {
				t.Fatalf("lock over a live run's: %v, want ErrWorkShared", err)
			}
			work.Delete(ctx, WorkLockKey)
		})
	}
}

// TestLockWorkRenews: the holder rewrites its lock's renewal time while it
// runs, so that a run on another host can tell a live lock from a left one.
func TestLockWorkRenews(t *testing.T) {
	ctx := context.Background()
	work := NewLocalStore(t.TempDir())
	var tick atomic.Int64
	base := time.Date(2026, 12, 4, 6, 0, 0, 0, time.UTC)
	now := func() time.Time { return base.Add(time.Duration(tick.Add(1)) * time.Second) }
	release, err := lockWork(ctx, work, now, 5*time.Millisecond)
	if err != nil {
		t.Fatal(err)
	}
	read := func() workLock {
		raw, err := ReadAll(ctx, work, WorkLockKey)
		if err != nil {
			t.Fatal(err)
		}
		var l workLock
		if err := json.Unmarshal(raw, &l); err != nil {
			t.Fatal(err)
		}
		return l
	}
	first := read()
	deadline := time.Now().Add(5 * time.Second)
	for read().Renewed == first.Renewed {
		if time.Now().After(deadline) {
			t.Fatal("the lock was not renewed within 5 s at a 5 ms interval")
		}
		time.Sleep(5 * time.Millisecond)
	}
	if l := read(); l.Started != first.Started || l.PID != first.PID {
		t.Errorf("renewal changed the holder: %+v, was %+v", l, first)
	}
	release()
	if _, err := work.Stat(ctx, WorkLockKey); !errors.Is(err, ErrNotFound) {
		t.Errorf("lock after release: %v, want it gone", err)
	}
}
