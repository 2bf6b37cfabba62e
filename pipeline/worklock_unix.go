//go:build unix

package pipeline

import (
	"errors"
	"syscall"
)

// processGone reports whether no process with pid runs on this host
// (signal 0 checks for it without sending anything: kill(2)).
func processGone(pid int) (gone, known bool) {
	err := syscall.Kill(pid, 0)
	return errors.Is(err, syscall.ESRCH), err == nil || errors.Is(err, syscall.ESRCH) || errors.Is(err, syscall.EPERM)
}
