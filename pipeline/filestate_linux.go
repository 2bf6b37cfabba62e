package pipeline

import (
	"io/fs"
	"strings"
	"syscall"
)

// fileState is what an fstat tells of a file's content without reading it:
// size, modification and change times (ns) and inode. A write through any
// name of the file moves both times (write(2), POSIX); the inode and device
// tell one file from another.
type fileState struct {
	size         int64
	mtime, ctime int64
	ino, dev     uint64
}

func stateOf(info fs.FileInfo) fileState {
	st := fileState{size: info.Size(), mtime: info.ModTime().UnixNano()}
	if sys, ok := info.Sys().(*syscall.Stat_t); ok {
		st.ctime = sys.Ctim.Nano()
		st.ino, st.dev = sys.Ino, uint64(sys.Dev)
	}
	return st
}

// diff names the parts of the state that differ ("" when none do).
func (a fileState) diff(b fileState) string {
	var d []string
	if a.size != b.size {
		d = append(d, "size")
	}
	if a.mtime != b.mtime {
		d = append(d, "modification time")
	}
	if a.ctime != b.ctime {
		d = append(d, "change time")
	}
	if a.ino != b.ino || a.dev != b.dev {
		d = append(d, "inode")
	}
	return strings.Join(d, ", ")
}
