//go:build !linux

package pipeline

import (
	"io/fs"
	"strings"
)

// fileState is what a portable fstat tells of a file's content without
// reading it: size and modification time (Linux adds the change time and
// inode, filestate_linux.go).
type fileState struct {
	size  int64
	mtime int64
}

func stateOf(info fs.FileInfo) fileState {
	return fileState{size: info.Size(), mtime: info.ModTime().UnixNano()}
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
	return strings.Join(d, ", ")
}
