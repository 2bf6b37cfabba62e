// Package inspect reads committed dataset versions back: it summarises one
// (show), checks one against its own manifest (verify), compares two (diff),
// traces a log object to its shards and reports on a version. Every command
// gives a data result (JSON-tagged, for --json) and a plain-text writer.
package inspect

import (
	"fmt"
	"io"
	"math"
	"sort"
	"strconv"
	"strings"
	"unicode/utf8"

	"hindcast/pipeline"
)

// ShowResult summarises one dataset version from its manifest alone: what
// came in, what was dropped and why, what was kept, and which files hold it.
type ShowResult struct {
	Dataset      string            `json:"dataset"`
	Version      string            `json:"version"`
	URI          string            `json:"uri"`
	Created      string            `json:"created"`
	Tool         pipeline.ToolInfo `json:"tool"`
	ConfigSHA256 string            `json:"config_sha256"`
	Digest       string            `json:"digest"`
	Sources      ShowSources       `json:"sources"`
	// Recordings is set when the version read or skipped a recording.
	Recordings *ShowRecordings  `json:"recordings,omitempty"`
	Funnel     ShowFunnel       `json:"funnel"`
	Counts     []pipeline.Count `json:"counts"`
	Lengths    []ShowLengths    `json:"episode_lengths"`
	Files      ShowFiles        `json:"files"`
	// Gates are the quality gates the version passed (or had waived).
	Gates []pipeline.Gate `json:"gates"`
	// Notes lists manifest entries Show could not use (say, an
	// episode_steps key that is not a number), so nothing is hidden silently.
	Notes []string `json:"notes"`
	// Quarantine holds examples of dropped lines (the first three per
	// reason) when the version keeps a quarantine; the CLI fills it.
	Quarantine []QuarantinedLine `json:"quarantine,omitempty"`
}

// ShowSources counts the listed objects. Bytes covers every listed object,
// duplicates included, since all of them were read.
type ShowSources struct {
	Objects    int64 `json:"objects"`
	Bytes      int64 `json:"bytes"`
	Duplicates int64 `json:"duplicates"`
	Incomplete int64 `json:"incomplete"`
	// IncompleteKeys names the objects that could not be read to their end.
	IncompleteKeys []string `json:"incomplete_keys"`
}

// ShowFunnel is the manifest funnel with every drop reason's share of lines.
type ShowFunnel struct {
	Lines       int64        `json:"lines"`
	Frames      int64        `json:"frames"`
	FramesShare float64      `json:"frames_share"` // frames / lines, 0 when there are no lines
	Dropped     int64        `json:"dropped"`
	DropShare   float64      `json:"dropped_share"`
	Reasons     []ShowReason `json:"reasons"`
	Episodes    int64        `json:"episodes"`
	Pairs       int64        `json:"pairs"`
}

// ShowReason is one drop reason: count and share of lines (a fraction).
type ShowReason struct {
	Reason string  `json:"reason"`
	Count  int64   `json:"count"`
	Share  float64 `json:"share"`
}

// ShowLengths gives an embodiment's episode length quantiles, in steps.
type ShowLengths struct {
	Embodiment string `json:"embodiment"`
	Episodes   int64  `json:"episodes"`
	P0         int64  `json:"p0"`
	P10        int64  `json:"p10"`
	P50        int64  `json:"p50"`
	P90        int64  `json:"p90"`
	P100       int64  `json:"p100"`
}

// ShowFiles counts the version's files and bytes, in all and per table and split.
type ShowFiles struct {
	Count  int64           `json:"count"`
	Bytes  int64           `json:"bytes"`
	Rows   int64           `json:"rows"`
	Groups []ShowFileGroup `json:"groups"`
}

// ShowFileGroup is one (table, split) cell of files.
type ShowFileGroup struct {
	Table string `json:"table"`
	Split string `json:"split"`
	Count int64  `json:"count"`
	Bytes int64  `json:"bytes"`
	Rows  int64  `json:"rows"`
}

// Show summarises a version from its manifest.
func Show(v *pipeline.Version) *ShowResult {
	m := v.Manifest
	r := &ShowResult{
		Dataset: m.Dataset, Version: m.Version, URI: v.URI, Created: m.Created, Tool: m.Tool,
		ConfigSHA256: m.ConfigSHA256, Digest: m.Digest,
		Counts: append([]pipeline.Count{}, m.Counts...), Lengths: []ShowLengths{}, Notes: []string{},
		Gates: append([]pipeline.Gate{}, m.Gates...),
	}
	r.Sources.IncompleteKeys = []string{}
	for _, s := range m.Sources {
		r.Sources.Objects++
		r.Sources.Bytes += s.Bytes
		if s.DuplicateOf != nil {
			r.Sources.Duplicates++
		}
		if s.Incomplete {
			r.Sources.Incomplete++
			r.Sources.IncompleteKeys = append(r.Sources.IncompleteKeys, s.Key)
		}
	}

	r.Recordings = recordingsOf(m)

	f := m.Funnel
	r.Funnel = ShowFunnel{Lines: f.Lines, Frames: f.Frames, FramesShare: shShare(f.Frames, f.Lines),
		Episodes: f.Episodes, Pairs: f.Pairs, Reasons: []ShowReason{}}
	for _, reason := range shReasons(f.Dropped) {
		n := f.Dropped[reason]
		r.Funnel.Dropped += n
		r.Funnel.Reasons = append(r.Funnel.Reasons, ShowReason{Reason: reason, Count: n, Share: shShare(n, f.Lines)})
	}
	r.Funnel.DropShare = shShare(r.Funnel.Dropped, f.Lines)

	for _, emb := range shSortedKeys(m.EpisodeSteps) {
		l, notes := shQuantiles(emb, m.EpisodeSteps[emb])
		r.Notes = append(r.Notes, notes...)
		if l.Episodes > 0 {
			r.Lengths = append(r.Lengths, l)
		}
	}

	r.Files = shFiles(m.Files)
	return r
}

// shReasons lists every reason of SPEC §3.1–§3.2 in check order, then any
// other reason the manifest holds (from a newer build), sorted, so a count
// is never left out of the funnel.
func shReasons(dropped map[string]int64) []string {
	out := pipeline.Reasons()
	known := map[string]bool{}
	for _, r := range out {
		known[r] = true
	}
	var extra []string
	for r := range dropped {
		if !known[r] {
			extra = append(extra, r)
		}
	}
	sort.Strings(extra)
	return append(out, extra...)
}

// shQuantiles computes nearest-rank quantiles of one embodiment's episode
// lengths from its histogram (length → episodes). The nearest-rank method:
// the p-th percentile of N sorted values is the value at rank ⌈p/100·N⌉
// (1-based), with rank 1 for p = 0 — so every quantile is a length that
// occurs, never an interpolation between two.
func shQuantiles(emb string, hist map[string]int64) (ShowLengths, []string) {
	type bin struct{ steps, n int64 }
	var bins []bin
	var notes []string
	l := ShowLengths{Embodiment: emb}
	for key, n := range hist {
		steps, err := strconv.ParseInt(key, 10, 64)
		if err != nil || n < 0 {
			notes = append(notes, fmt.Sprintf("episode_steps.%s: entry %q: %d is not a length and a count", emb, key, n))
			continue
		}
		if n == 0 {
			continue
		}
		bins = append(bins, bin{steps, n})
		l.Episodes += n
	}
	sort.Strings(notes)
	if l.Episodes == 0 {
		return l, notes
	}
	sort.Slice(bins, func(i, j int) bool { return bins[i].steps < bins[j].steps })
	at := func(p int64) int64 {
		rank := max((p*l.Episodes+99)/100, 1) // ⌈p·N/100⌉ in integers
		var cum int64
		for _, b := range bins {
			cum += b.n
			if cum >= rank {
				return b.steps
			}
		}
		return bins[len(bins)-1].steps
	}
	l.P0, l.P10, l.P50, l.P90, l.P100 = at(0), at(10), at(50), at(90), at(100)
	return l, notes
}

// shFiles groups the files by table (frames, pairs, then others) and split
// (train, val, test, then others).
func shFiles(files []pipeline.File) ShowFiles {
	out := ShowFiles{Groups: []ShowFileGroup{}}
	idx := map[[2]string]int{}
	for _, f := range files {
		out.Count++
		out.Bytes += f.Bytes
		out.Rows += f.Rows
		k := [2]string{f.Table, f.Split}
		i, ok := idx[k]
		if !ok {
			i = len(out.Groups)
			idx[k] = i
			out.Groups = append(out.Groups, ShowFileGroup{Table: f.Table, Split: f.Split})
		}
		g := &out.Groups[i]
		g.Count++
		g.Bytes += f.Bytes
		g.Rows += f.Rows
	}
	sort.Slice(out.Groups, func(i, j int) bool {
		a, b := out.Groups[i], out.Groups[j]
		if a.Table != b.Table {
			return shLess(a.Table, b.Table, "frames", "pairs")
		}
		return shLess(a.Split, b.Split, "train", "val", "test")
	})
	return out
}

// shLess orders the names in first (in that order) before all others, and
// others by byte order.
func shLess(a, b string, first ...string) bool {
	rank := func(s string) int {
		for i, f := range first {
			if s == f {
				return i
			}
		}
		return len(first)
	}
	if ra, rb := rank(a), rank(b); ra != rb {
		return ra < rb
	}
	return a < b
}

func shShare(n, of int64) float64 {
	if of == 0 {
		return 0
	}
	return float64(n) / float64(of)
}

func shPercent(share float64) string { return fmt.Sprintf("%.2f%%", 100*share) }

func shSortedKeys[V any](m map[string]V) []string {
	keys := make([]string, 0, len(m))
	for k := range m {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	return keys
}

// shBytes writes a byte count the way people read sizes (decimal units).
func shBytes(n int64) string {
	switch {
	case n >= 1e9:
		return fmt.Sprintf("%.2f GB", float64(n)/1e9)
	case n >= 1e6:
		return fmt.Sprintf("%.2f MB", float64(n)/1e6)
	case n >= 1e3:
		return fmt.Sprintf("%.1f kB", float64(n)/1e3)
	}
	return fmt.Sprintf("%d B", n)
}

// shWriter collects the first write error so the text writers stay readable.
type shWriter struct {
	w   io.Writer
	err error
}

func (s *shWriter) printf(format string, a ...any) {
	if s.err == nil {
		_, s.err = fmt.Fprintf(s.w, format, a...)
	}
}

// table writes rows as aligned columns indented by two spaces: the first
// left columns (names) left-aligned, the others (numbers) right-aligned. A
// nil header writes the rows alone.
func (s *shWriter) table(left int, header []string, rows [][]string) {
	all := rows
	if header != nil {
		all = append([][]string{header}, rows...)
	}
	var widths []int
	for _, r := range all {
		for i, c := range r {
			if i == len(widths) {
				widths = append(widths, 0)
			}
			widths[i] = max(widths[i], utf8.RuneCountInString(c))
		}
	}
	for _, r := range all {
		var b strings.Builder
		b.WriteString("  ")
		for i, c := range r {
			pad := strings.Repeat(" ", widths[i]-utf8.RuneCountInString(c))
			if i > 0 {
				b.WriteString("  ")
			}
			if i < left {
				b.WriteString(c)
				if i < len(r)-1 {
					b.WriteString(pad)
				}
			} else {
				b.WriteString(pad + c)
			}
		}
		s.printf("%s\n", b.String())
	}
}

// WriteText writes the summary as aligned plain text.
func (r *ShowResult) WriteText(w io.Writer) error {
	p := &shWriter{w: w}
	p.printf("dataset %s version %s\n", r.Dataset, r.Version)
	p.printf("uri       %s\n", r.URI)
	p.printf("created   %s   tool %s (%s)\n", r.Created, r.Tool.Version, r.Tool.Commit)
	p.printf("config    %s\n", r.ConfigSHA256)
	p.printf("digest    %s\n", r.Digest)

	s := r.Sources
	p.printf("\nsources   %s, %s, %s, %d incomplete\n", trCount(s.Objects, "object", "objects"), shBytes(s.Bytes), trCount(s.Duplicates, "duplicate", "duplicates"), s.Incomplete)
	for _, k := range s.IncompleteKeys {
		p.printf("  incomplete %s\n", k)
	}
	if r.Recordings != nil {
		r.Recordings.writeText(p)
	}

	f := r.Funnel
	p.printf("\nfunnel\n")
	rows := [][]string{
		{"lines", fmt.Sprint(f.Lines), shPercent(shShare(f.Lines, f.Lines))},
		{"frames kept", fmt.Sprint(f.Frames), shPercent(f.FramesShare)},
		{"dropped", fmt.Sprint(f.Dropped), shPercent(f.DropShare)},
	}
	for _, rs := range f.Reasons {
		rows = append(rows, []string{"  " + rs.Reason, fmt.Sprint(rs.Count), shPercent(rs.Share)})
	}
	p.table(1, []string{"", "count", "of lines"}, rows)
	p.printf("episodes  %d   pairs %d\n", f.Episodes, f.Pairs)

	p.printf("\nper embodiment and split\n")
	rows = nil
	for _, c := range r.Counts {
		rows = append(rows, []string{c.Embodiment, c.Split, fmt.Sprint(c.Episodes), fmt.Sprint(c.Frames), fmt.Sprint(c.Pairs)})
	}
	p.table(2, []string{"embodiment", "split", "episodes", "frames", "pairs"}, rows)

	p.printf("\nepisode length in steps (nearest rank)\n")
	rows = nil
	for _, l := range r.Lengths {
		rows = append(rows, []string{l.Embodiment, fmt.Sprint(l.Episodes), fmt.Sprint(l.P0), fmt.Sprint(l.P10),
			fmt.Sprint(l.P50), fmt.Sprint(l.P90), fmt.Sprint(l.P100)})
	}
	p.table(1, []string{"embodiment", "episodes", "p0", "p10", "p50", "p90", "p100"}, rows)

	fl := r.Files
	p.printf("\nfiles     %d, %s, %d rows\n", fl.Count, shBytes(fl.Bytes), fl.Rows)
	rows = nil
	for _, g := range fl.Groups {
		rows = append(rows, []string{g.Table, g.Split, fmt.Sprint(g.Count), fmt.Sprint(g.Rows), shBytes(g.Bytes)})
	}
	p.table(2, []string{"table", "split", "files", "rows", "bytes"}, rows)

	if len(r.Gates) > 0 {
		p.printf("\ngates\n")
		rows = nil
		for _, g := range r.Gates {
			rows = append(rows, []string{g.Name, fmtGate(g.Value), fmtGate(g.Threshold), g.Result, g.Subject})
		}
		p.table(1, []string{"gate", "value", "threshold", "result", "where"}, rows)
	}

	for _, n := range r.Notes {
		p.printf("note: %s\n", n)
	}
	return p.err
}

// fmtGate prints a gate's number; the largest float stands for an infinite
// drift (the manifest cannot hold Inf).
func fmtGate(v float64) string {
	if v == math.MaxFloat64 {
		return "+Inf"
	}
	return fmt.Sprintf("%.6g", v)
}
