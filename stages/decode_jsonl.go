package stages

import (
	"bufio"
	"bytes"
	"compress/gzip"
	"context"
	"io"

	"github.com/klauspost/compress/zstd"

	"hindcast/pipeline"
	"hindcast/stages/jsonl"
)

// decodeLines is the JSON Lines decoder (SPEC §1): it splits the
// decompressed stream into physical lines and yields one candidate per
// non-blank line, deciding the reasons that belong to the format itself
// (oversize, truncated, malformed) and leaving the rest to the checks. It
// reports whether the stream ended early (the object is incomplete).
// src is the stored stream under body: its own read error is a failed run,
// not a damaged object.
func decodeLines(ctx context.Context, body io.Reader, src *sourceReader, maxLen int, emit func(*Candidate) error) (incomplete bool, err error) {
	// A byte-order mark starts the object, not its first line: drop it
	// before lines are measured (SPEC §1).
	br := bufio.NewReaderSize(body, 64<<10)
	if bom, _ := br.Peek(3); bytes.Equal(bom, []byte("\xef\xbb\xbf")) {
		br.Discard(3)
	}
	lr := newLineReader(br, maxLen)
	var parsed jsonl.Line
	var c Candidate
	var lineNo int64
	for {
		if lineNo%4096 == 0 {
			if err := ctx.Err(); err != nil {
				return incomplete, err
			}
		}
		line, eol, oversize, rerr := lr.next()
		if rerr != nil && src.err != nil {
			return incomplete, src.err
		}
		broken := rerr != nil && rerr != io.EOF
		if rerr == io.EOF && len(line) == 0 && !oversize {
			break
		}
		lineNo++
		if !oversize && isBlank(line) {
			if broken {
				incomplete = true
				break
			}
			continue
		}
		c = Candidate{Line: lineNo, Raw: line}
		switch {
		case oversize:
			c.Reason = pipeline.Oversize
		case broken:
			// The stream was cut: what was decoded of this line is partial.
			c.Reason = pipeline.Truncated
		default:
			if err := jsonl.Parse(line, &parsed); err != nil {
				if !eol {
					c.Reason = pipeline.Truncated
				} else {
					c.Reason = pipeline.Malformed
				}
				break
			}
			lineCandidate(&c, &parsed)
		}
		if err := emit(&c); err != nil {
			return incomplete, err
		}
		if broken {
			incomplete = true
			break
		}
		if !eol {
			break
		}
	}
	return incomplete, nil
}

// lineCandidate fills c from a parsed line; the slices alias the line's.
func lineCandidate(c *Candidate, l *jsonl.Line) {
	c.Unit, c.Embodiment, c.T, c.HasT = l.Unit, l.Embodiment, l.T, true
	c.Obs, c.Act, c.HasAct, c.NonFinite = l.Obs, l.Act, l.HasAct, l.NonFinite
	c.Ev, c.Task, c.HasTask, c.Success, c.HasSuccess = l.Ev, l.Task, l.HasTask, l.Success, l.HasSuccess
	c.ImgRefs = l.Img
}

// decompress picks the decoder by the stream's magic bytes, whatever the
// object's name says: gzip (RFC 1952: 1f 8b) or zstd (RFC 8878: 28 b5 2f fd).
func decompress(r *bufio.Reader) (io.Reader, error) {
	magic, _ := r.Peek(4)
	switch {
	case len(magic) >= 2 && magic[0] == 0x1f && magic[1] == 0x8b:
		return gzip.NewReader(r)
	case len(magic) == 4 && bytes.Equal(magic, []byte{0x28, 0xb5, 0x2f, 0xfd}):
		// A frame may declare a window of up to 3.75 TB (RFC 8878 §3.1.1.1.2),
		// which decoding may hold; the zstd tool itself refuses more than
		// 128 MiB unless told otherwise (its --long default, from memory).
		// A larger one makes the object incomplete, not the worker run out
		// of memory.
		d, err := zstd.NewReader(r, zstd.WithDecoderConcurrency(1), zstd.WithDecoderLowmem(true), zstd.WithDecoderMaxWindow(zstdMaxWindow))
		if err != nil {
			return nil, err
		}
		return zstdCloser{d}, nil
	}
	return r, nil
}

// zstdMaxWindow is the largest zstd window an ingest item decodes with.
const zstdMaxWindow = 128 << 20

type zstdCloser struct{ *zstd.Decoder }

func (z zstdCloser) Close() error { z.Decoder.Close(); return nil }

func isBlank(b []byte) bool {
	for _, c := range b {
		switch c {
		case ' ', '\t', '\r', '\v', '\f':
		default:
			return false
		}
	}
	return true
}

// lineReader splits a stream into physical lines without ever holding more
// than maxLen+2 bytes of one: a longer line is skipped to its end and
// reported as oversize, unless it held only white space (it is then
// returned empty, a blank line).
type lineReader struct {
	br     *bufio.Reader
	maxLen int
	buf    []byte
}

func newLineReader(r io.Reader, maxLen int) *lineReader {
	br, ok := r.(*bufio.Reader)
	if !ok {
		br = bufio.NewReaderSize(r, 64<<10)
	}
	return &lineReader{br: br, maxLen: maxLen}
}

// next returns the next line without its line end ("\n", or "\r\n"), whether
// it had a line end, and whether it was too long. err is io.EOF after the
// last line, or the stream's error; line then holds what was read of a
// partial line.
func (lr *lineReader) next() (line []byte, eol, oversize bool, err error) {
	lr.buf = lr.buf[:0]
	// A line of only white space is skipped whatever its length (SPEC §1),
	// so a skipped oversize line is watched for anything else.
	blank := true
	for {
		chunk, e := lr.br.ReadSlice('\n')
		if !oversize {
			if len(lr.buf)+len(chunk) > lr.maxLen+2 {
				oversize = true
				blank = isBlank(lr.buf)
			} else {
				lr.buf = append(lr.buf, chunk...)
			}
		}
		if oversize && blank {
			blank = isBlank(bytes.TrimSuffix(chunk, []byte("\n")))
		}
		if e == bufio.ErrBufferFull {
			continue
		}
		if e == nil {
			eol = true
			break
		}
		err = e
		break
	}
	if oversize {
		if blank {
			return lr.buf[:0], eol, false, err
		}
		return nil, eol, true, err
	}
	b := lr.buf
	if eol {
		b = b[:len(b)-1]
		b = bytes.TrimSuffix(b, []byte("\r"))
	}
	if len(b) > lr.maxLen && !isBlank(b) {
		return nil, eol, true, err
	}
	return b, eol, false, err
}
