package mcapread

import (
	"bufio"
	"container/heap"
	"context"
	"encoding/binary"
	"fmt"
	"io"
	"os"
	"sort"
)

// defaultSortBuffer bounds the message bytes held for reordering when
// Options.SortBufferBytes is 0.
const defaultSortBuffer = 64 << 20

// sorter puts messages in (time, file position) order with bounded memory:
// it holds up to limit bytes of messages, and beyond that writes the held
// messages, sorted, as a run file in the scratch folder; at the end the
// runs and what is still held are merged. Most recordings are nearly in
// time order already, but nothing in the format promises it, so the order
// can never rest on a window of assumed size.
type sorter struct {
	limit   int64
	dir     string
	topics  func(string) bool // Options.Topics, for channels read after their messages
	held    []held
	bytes   int64
	runs    []*os.File
	scratch []string // names still to remove at close ("" : already removed)
}

func newSorter(opts Options) *sorter {
	limit := opts.SortBufferBytes
	if limit <= 0 {
		limit = defaultSortBuffer
	}
	return &sorter{limit: limit, dir: opts.ScratchDir, topics: opts.Topics}
}

func (s *sorter) add(h held) error {
	s.held = append(s.held, h)
	s.bytes += int64(len(h.data)) + 64
	if s.bytes > s.limit {
		return s.spill()
	}
	return nil
}

func (s *sorter) sortHeld() {
	sort.SliceStable(s.held, func(i, j int) bool { return s.held[i].t < s.held[j].t })
}

// spill writes the held messages, sorted, as one run: per message its
// time, position, log and publish times, channel id, length and bytes.
func (s *sorter) spill() error {
	s.sortHeld()
	f, err := os.CreateTemp(s.dir, "mcap-run-*")
	if err != nil {
		return fmt.Errorf("mcap sort: scratch run: %w", err)
	}
	s.runs = append(s.runs, f)
	// The run's name is removed at once: an open file lives on until it is
	// closed (POSIX unlink), so even a process killed with SIGKILL leaves
	// no scratch file behind. Where removing an open file fails, close
	// removes it.
	name := f.Name()
	if os.Remove(name) == nil {
		name = ""
	}
	s.scratch = append(s.scratch, name)
	w := bufio.NewWriterSize(f, 1<<16)
	var hdr [38]byte
	for _, h := range s.held {
		binary.LittleEndian.PutUint64(hdr[0:], uint64(h.t))
		binary.LittleEndian.PutUint64(hdr[8:], uint64(h.seq))
		binary.LittleEndian.PutUint64(hdr[16:], h.log)
		binary.LittleEndian.PutUint64(hdr[24:], h.pub)
		binary.LittleEndian.PutUint16(hdr[32:], h.ch.ID)
		binary.LittleEndian.PutUint32(hdr[34:], uint32(len(h.data)))
		w.Write(hdr[:])
		w.Write(h.data)
	}
	if err := w.Flush(); err != nil {
		return fmt.Errorf("mcap sort: write %s: %w", f.Name(), err)
	}
	if _, err := f.Seek(0, io.SeekStart); err != nil {
		return fmt.Errorf("mcap sort: rewind %s: %w", f.Name(), err)
	}
	clear(s.held) // let the spilled bytes go
	s.held = s.held[:0]
	s.bytes = 0
	return nil
}

// close removes every scratch run, also after an error.
func (s *sorter) close() {
	for i, f := range s.runs {
		f.Close()
		if s.scratch[i] != "" {
			os.Remove(s.scratch[i])
		}
	}
	s.runs, s.scratch = nil, nil
}

// runReader reads back one run.
type runReader struct {
	r   *bufio.Reader
	cur held
	buf []byte
}

func (rr *runReader) next(chans map[uint16]*Channel) (bool, error) {
	var hdr [38]byte
	if _, err := io.ReadFull(rr.r, hdr[:]); err != nil {
		if err == io.EOF {
			return false, nil
		}
		return false, fmt.Errorf("mcap sort: read run: %w", err)
	}
	n := binary.LittleEndian.Uint32(hdr[34:])
	if cap(rr.buf) < int(n) {
		rr.buf = make([]byte, n)
	}
	rr.buf = rr.buf[:n]
	if _, err := io.ReadFull(rr.r, rr.buf); err != nil {
		return false, fmt.Errorf("mcap sort: read run: %w", err)
	}
	rr.cur = held{
		t: int64(binary.LittleEndian.Uint64(hdr[0:])), seq: int64(binary.LittleEndian.Uint64(hdr[8:])),
		log: binary.LittleEndian.Uint64(hdr[16:]), pub: binary.LittleEndian.Uint64(hdr[24:]),
		ch: chans[binary.LittleEndian.Uint16(hdr[32:])], data: rr.buf,
	}
	return true, nil
}

type runHeap []*runReader

func (h runHeap) Len() int { return len(h) }
func (h runHeap) Less(i, j int) bool {
	a, b := &h[i].cur, &h[j].cur
	return a.t < b.t || (a.t == b.t && a.seq < b.seq)
}
func (h runHeap) Swap(i, j int) { h[i], h[j] = h[j], h[i] }
func (h *runHeap) Push(x any)   { *h = append(*h, x.(*runReader)) }
func (h *runHeap) Pop() any {
	old := *h
	x := old[len(old)-1]
	*h = old[:len(old)-1]
	return x
}

// emit hands fn every message in (time, position) order.
func (s *sorter) emit(ctx context.Context, chans map[uint16]*Channel, fn func(*Message) error, res *Result) error {
	give := func(h *held) error {
		if h.ch == nil || h.ch.pending || (s.topics != nil && !s.topics(h.ch.Topic)) {
			return nil // a channel never defined, or one not selected
		}
		if err := fn(&Message{Channel: h.ch, LogTime: h.log, PublishTime: h.pub, Time: h.t, Seq: h.seq, Data: h.data}); err != nil {
			return err
		}
		res.Messages++
		return nil
	}
	if len(s.runs) == 0 {
		s.sortHeld()
		for i := range s.held {
			if i%4096 == 0 {
				if err := ctx.Err(); err != nil {
					return err
				}
			}
			if err := give(&s.held[i]); err != nil {
				return err
			}
		}
		return nil
	}
	if len(s.held) > 0 {
		if err := s.spill(); err != nil {
			return err
		}
	}
	h := make(runHeap, 0, len(s.runs))
	for _, f := range s.runs {
		rr := &runReader{r: bufio.NewReaderSize(f, 1<<16)}
		ok, err := rr.next(chans)
		if err != nil {
			return err
		}
		if ok {
			h = append(h, rr)
		}
	}
	heap.Init(&h)
	for n := 0; h.Len() > 0; n++ {
		if n%4096 == 0 {
			if err := ctx.Err(); err != nil {
				return err
			}
		}
		rr := h[0]
		if err := give(&rr.cur); err != nil {
			return err
		}
		ok, err := rr.next(chans)
		if err != nil {
			return err
		}
		if ok {
			heap.Fix(&h, 0)
		} else {
			heap.Pop(&h)
		}
	}
	return nil
}
