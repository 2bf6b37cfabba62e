package inspect

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"maps"
	"math/big"
	"slices"
	"sort"
	"strconv"
	"strings"

	"hindcast/pipeline"
)

// DiffResult is what differs between version A and version B, from their
// manifests. Every list holds differences only, so two identical versions
// give an empty result (see Empty).
type DiffResult struct {
	A          DiffSide     `json:"a"`
	B          DiffSide     `json:"b"`
	SameDigest bool         `json:"same_digest"`
	Config     []DiffConfig `json:"config"`
	Sources    DiffSources  `json:"sources"`
	Dropped    []DiffReason `json:"dropped"`
	// Skipped lists the skip reasons of recordings (SPEC §7.1) whose
	// counts differ.
	Skipped []DiffReason `json:"skipped,omitempty"`
	Splits  []DiffSplit  `json:"splits"`
	Files   DiffFiles    `json:"files"`
	// Drift lists every dimension whose stats moved (shift ≠ 0 or std
	// ratio ≠ 1), largest shift first (see Drifts).
	Drift []Drift `json:"drift"`
	// Moved lists the episodes present in both versions whose split
	// differs, by episode id; filled by DiffMoves, which reads the frames.
	Moved []DiffMove `json:"moved"`
}

// DiffMove is an episode that changed split between the two versions.
type DiffMove struct {
	Episode string `json:"episode"`
	A       string `json:"a"`
	B       string `json:"b"`
}

// DiffSide names one of the two versions.
type DiffSide struct {
	Dataset string `json:"dataset"`
	Version string `json:"version"`
	URI     string `json:"uri"`
	Digest  string `json:"digest"`
}

// DiffConfig is one config key (dotted path into the config JSON; arrays
// are compared whole) that was added, removed or changed. A and B are the
// values as compact JSON; the missing side is left out.
type DiffConfig struct {
	Key    string          `json:"key"`
	Change string          `json:"change"` // "added", "removed" or "changed"
	A      json.RawMessage `json:"a,omitempty"`
	B      json.RawMessage `json:"b,omitempty"`
}

// DiffSources lists source objects by key.
type DiffSources struct {
	Added   []string     `json:"added"`
	Removed []string     `json:"removed"`
	Changed []DiffSHA256 `json:"changed"` // same key, other content
}

// DiffFiles lists files by path.
type DiffFiles struct {
	Added   []string     `json:"added"`
	Removed []string     `json:"removed"`
	Changed []DiffSHA256 `json:"changed"` // same path, other content
}

// DiffSHA256 is one key or path present in both versions with other bytes.
type DiffSHA256 struct {
	Name string `json:"name"`
	A    string `json:"a"`
	B    string `json:"b"`
}

// DiffReason is one drop reason whose count differs.
type DiffReason struct {
	Reason string `json:"reason"`
	A      int64  `json:"a"`
	B      int64  `json:"b"`
	Delta  int64  `json:"delta"`
}

// DiffSplit is one split (or "total") whose episodes, frames or pairs
// differ, summed over embodiments.
type DiffSplit struct {
	Split    string    `json:"split"`
	Episodes DiffDelta `json:"episodes"`
	Frames   DiffDelta `json:"frames"`
	Pairs    DiffDelta `json:"pairs"`
}

// DiffDelta is a count in A and in B, and B − A.
type DiffDelta struct {
	A     int64 `json:"a"`
	B     int64 `json:"b"`
	Delta int64 `json:"delta"`
}

// Empty reports that nothing but names and places differs.
func (r *DiffResult) Empty() bool {
	return len(r.Config) == 0 && len(r.Sources.Added)+len(r.Sources.Removed)+len(r.Sources.Changed) == 0 &&
		len(r.Dropped) == 0 && len(r.Skipped) == 0 && len(r.Splits) == 0 &&
		len(r.Files.Added)+len(r.Files.Removed)+len(r.Files.Changed) == 0 &&
		len(r.Drift) == 0 && len(r.Moved) == 0
}

// Diff compares version a with version b.
func Diff(a, b *pipeline.Version) *DiffResult {
	ma, mb := a.Manifest, b.Manifest
	r := &DiffResult{
		A:          DiffSide{Dataset: ma.Dataset, Version: ma.Version, URI: a.URI, Digest: ma.Digest},
		B:          DiffSide{Dataset: mb.Dataset, Version: mb.Version, URI: b.URI, Digest: mb.Digest},
		SameDigest: ma.Digest == mb.Digest,
		Config:     dfConfig(ma.Config, mb.Config),
		Dropped:    []DiffReason{},
	}

	srcA, srcB := map[string]string{}, map[string]string{}
	for _, s := range ma.Sources {
		srcA[s.Key] = s.SHA256
	}
	for _, s := range mb.Sources {
		srcB[s.Key] = s.SHA256
	}
	r.Sources.Added, r.Sources.Removed, r.Sources.Changed = dfSets(srcA, srcB)

	filesA, filesB := map[string]string{}, map[string]string{}
	for _, f := range ma.Files {
		filesA[f.Path] = f.SHA256
	}
	for _, f := range mb.Files {
		filesB[f.Path] = f.SHA256
	}
	r.Files.Added, r.Files.Removed, r.Files.Changed = dfSets(filesA, filesB)

	reasons := shReasons(ma.Funnel.Dropped)
	for _, x := range shReasons(mb.Funnel.Dropped) {
		if !slices.Contains(reasons, x) {
			reasons = append(reasons, x)
		}
	}
	for _, reason := range reasons {
		na, nb := ma.Funnel.Dropped[reason], mb.Funnel.Dropped[reason]
		if na != nb {
			r.Dropped = append(r.Dropped, DiffReason{Reason: reason, A: na, B: nb, Delta: nb - na})
		}
	}

	for _, reason := range pipeline.SkipReasons() {
		na, nb := ma.Funnel.SkippedObjects[reason], mb.Funnel.SkippedObjects[reason]
		if na != nb {
			r.Skipped = append(r.Skipped, DiffReason{Reason: reason, A: na, B: nb, Delta: nb - na})
		}
	}

	r.Splits = dfSplits(ma.Counts, mb.Counts)
	r.Drift = []Drift{}
	for _, d := range Drifts(ma.Stats, mb.Stats) {
		if d.Shift != 0 || d.StdRatio != 1 {
			r.Drift = append(r.Drift, d)
		}
	}
	r.Moved = []DiffMove{}
	return r
}

// DiffMoves fills r.Moved: the split of every episode of a and of b, from
// the episode column of their frames files, and those whose split differs.
func DiffMoves(ctx context.Context, r *DiffResult, a, b *pipeline.Version) error {
	splits := func(v *pipeline.Version) (map[string]string, error) {
		out := map[string]string{}
		for _, f := range v.Manifest.Files {
			if f.Table != "frames" {
				continue
			}
			err := vfReadRows(ctx, v.Store, f.Path, func(row *vfEpisodeRow, _ int64) { out[row.Episode] = f.Split })
			if err != nil {
				return nil, fmt.Errorf("diff %s: %w", v.URI, err)
			}
		}
		return out, nil
	}
	sa, err := splits(a)
	if err != nil {
		return err
	}
	sb, err := splits(b)
	if err != nil {
		return err
	}
	r.Moved = []DiffMove{}
	for _, ep := range slices.Sorted(maps.Keys(sa)) {
		if x, ok := sb[ep]; ok && x != sa[ep] {
			r.Moved = append(r.Moved, DiffMove{ep, sa[ep], x})
		}
	}
	return nil
}

// dfSets compares two name → sha256 maps: names only in b, only in a, and
// in both with another sha256, each sorted.
func dfSets(a, b map[string]string) (added, removed []string, changed []DiffSHA256) {
	added, removed, changed = []string{}, []string{}, []DiffSHA256{}
	for _, k := range shSortedKeys(b) {
		sa, ok := a[k]
		switch {
		case !ok:
			added = append(added, k)
		case sa != b[k]:
			changed = append(changed, DiffSHA256{Name: k, A: sa, B: b[k]})
		}
	}
	for _, k := range shSortedKeys(a) {
		if _, ok := b[k]; !ok {
			removed = append(removed, k)
		}
	}
	return added, removed, changed
}

// dfSplits sums the counts per split over embodiments and keeps the splits,
// and the total, that differ.
func dfSplits(a, b []pipeline.Count) []DiffSplit {
	type cell struct{ episodes, frames, pairs int64 }
	sum := func(cs []pipeline.Count) map[string]cell {
		out := map[string]cell{}
		for _, c := range cs {
			for _, s := range []string{c.Split, "total"} {
				x := out[s]
				x.episodes, x.frames, x.pairs = x.episodes+c.Episodes, x.frames+c.Frames, x.pairs+c.Pairs
				out[s] = x
			}
		}
		return out
	}
	sa, sb := sum(a), sum(b)
	names := map[string]bool{}
	for s := range sa {
		names[s] = true
	}
	for s := range sb {
		names[s] = true
	}
	order := shSortedKeys(names)
	sort.Slice(order, func(i, j int) bool {
		if (order[i] == "total") != (order[j] == "total") {
			return order[j] == "total" // the total comes last
		}
		return shLess(order[i], order[j], "train", "val", "test")
	})
	out := []DiffSplit{}
	d := func(x, y int64) DiffDelta { return DiffDelta{A: x, B: y, Delta: y - x} }
	for _, s := range order {
		x, y := sa[s], sb[s]
		if x != y {
			out = append(out, DiffSplit{Split: s, Episodes: d(x.episodes, y.episodes),
				Frames: d(x.frames, y.frames), Pairs: d(x.pairs, y.pairs)})
		}
	}
	return out
}

// dfConfig flattens both configs to dotted keys and lists the keys added,
// removed or changed, sorted.
func dfConfig(a, b json.RawMessage) []DiffConfig {
	fa, fb := map[string]string{}, map[string]string{}
	dfFlatten("", dfDecode(a), fa)
	dfFlatten("", dfDecode(b), fb)
	out := []DiffConfig{}
	keys := map[string]bool{}
	for k := range fa {
		keys[k] = true
	}
	for k := range fb {
		keys[k] = true
	}
	for _, k := range shSortedKeys(keys) {
		va, inA := fa[k]
		vb, inB := fb[k]
		switch {
		case !inA:
			out = append(out, DiffConfig{Key: k, Change: "added", B: json.RawMessage(vb)})
		case !inB:
			out = append(out, DiffConfig{Key: k, Change: "removed", A: json.RawMessage(va)})
		case va != vb:
			out = append(out, DiffConfig{Key: k, Change: "changed", A: json.RawMessage(va), B: json.RawMessage(vb)})
		}
	}
	return out
}

// dfDecode reads a config with its numbers in one canonical form (see
// dfCanon), so that 0.99 and 0.990 are the same value.
func dfDecode(raw json.RawMessage) any {
	dec := json.NewDecoder(bytes.NewReader(raw))
	dec.UseNumber()
	var v any
	if err := dec.Decode(&v); err != nil {
		return string(raw) // not JSON: compared as its text
	}
	return dfCanon(v)
}

// dfCanon rewrites every number: an integer keeps all its digits (a seed
// is an int64, beyond float64's exact range), any other number becomes the
// shortest text of its float64 — the type every fractional config value has.
func dfCanon(v any) any {
	switch x := v.(type) {
	case map[string]any:
		for k, e := range x {
			x[k] = dfCanon(e)
		}
	case []any:
		for i, e := range x {
			x[i] = dfCanon(e)
		}
	case json.Number:
		if i, ok := new(big.Int).SetString(string(x), 10); ok {
			return json.Number(i.String())
		}
		if f, err := strconv.ParseFloat(string(x), 64); err == nil {
			return json.Number(strconv.FormatFloat(f, 'g', -1, 64))
		}
	}
	return v
}

// dfFlatten writes every leaf of v under its dotted key: objects are walked,
// anything else (arrays included, and empty objects) is a leaf in compact JSON.
func dfFlatten(prefix string, v any, out map[string]string) {
	if obj, ok := v.(map[string]any); ok && len(obj) > 0 {
		for k, x := range obj {
			key := k
			if prefix != "" {
				key = prefix + "." + k
			}
			dfFlatten(key, x, out)
		}
		return
	}
	if prefix == "" {
		prefix = "config"
	}
	var buf bytes.Buffer
	enc := json.NewEncoder(&buf)
	enc.SetEscapeHTML(false)
	if err := enc.Encode(v); err != nil {
		out[prefix] = fmt.Sprintf("%q", fmt.Sprint(v))
		return
	}
	out[prefix] = strings.TrimSuffix(buf.String(), "\n")
}

func dfSigned(n int64) string {
	if n > 0 {
		return fmt.Sprintf("+%d", n)
	}
	return fmt.Sprint(n)
}

// WriteText writes the differences as aligned plain text.
func (r *DiffResult) WriteText(w io.Writer) error {
	p := &shWriter{w: w}
	p.printf("diff %s %s → %s %s\n", r.A.Dataset, r.A.Version, r.B.Dataset, r.B.Version)
	p.table(3, []string{"", "uri", "digest"}, [][]string{
		{"a", r.A.URI, r.A.Digest},
		{"b", r.B.URI, r.B.Digest},
	})
	if r.Empty() {
		if r.SameDigest {
			p.printf("no differences (same digest)\n")
		} else {
			p.printf("no differences in config, sources, counts or files\n")
		}
		return p.err
	}

	p.printf("\nconfig: %s\n", dfDiffer(len(r.Config), "key"))
	if len(r.Config) > 0 {
		rows := [][]string{}
		for _, c := range r.Config {
			rows = append(rows, []string{c.Key, c.Change, dfValue(c.A), dfValue(c.B)})
		}
		p.table(4, []string{"key", "change", "a", "b"}, rows)
	}

	s := r.Sources
	p.printf("\nsources: %d added, %d removed, %d changed\n", len(s.Added), len(s.Removed), len(s.Changed))
	dfNames(p, s.Added, s.Removed, s.Changed)

	p.printf("\ndropped: %s\n", dfDiffer(len(r.Dropped), "reason"))
	if len(r.Dropped) > 0 {
		rows := [][]string{}
		for _, d := range r.Dropped {
			rows = append(rows, []string{d.Reason, fmt.Sprint(d.A), fmt.Sprint(d.B), dfSigned(d.Delta)})
		}
		p.table(1, []string{"reason", "a", "b", "delta"}, rows)
	}

	if len(r.Skipped) > 0 {
		p.printf("\nskipped recordings: %s\n", dfDiffer(len(r.Skipped), "reason"))
		rows := [][]string{}
		for _, d := range r.Skipped {
			rows = append(rows, []string{d.Reason, fmt.Sprint(d.A), fmt.Sprint(d.B), dfSigned(d.Delta)})
		}
		p.table(1, []string{"reason", "a", "b", "delta"}, rows)
	}

	// r.Splits ends with the "total" row when anything differs; it is not
	// a split of its own.
	nSplits := 0
	for _, sp := range r.Splits {
		if sp.Split != "total" {
			nSplits++
		}
	}
	p.printf("\nsplits: %s\n", dfDiffer(nSplits, "split"))
	if len(r.Splits) > 0 {
		rows := [][]string{}
		for _, sp := range r.Splits {
			row := []string{sp.Split}
			for _, d := range []DiffDelta{sp.Episodes, sp.Frames, sp.Pairs} {
				row = append(row, fmt.Sprint(d.A), fmt.Sprint(d.B), dfSigned(d.Delta))
			}
			rows = append(rows, row)
		}
		p.table(1, []string{"split", "episodes a", "b", "delta", "frames a", "b", "delta", "pairs a", "b", "delta"}, rows)
	}

	f := r.Files
	p.printf("\nfiles: %d added, %d removed, %d changed\n", len(f.Added), len(f.Removed), len(f.Changed))
	dfNames(p, f.Added, f.Removed, f.Changed)

	p.printf("\ndrift: %s (mean shift in a's std, std ratio b/a)\n", dfDiffer(len(r.Drift), "dimension"))
	if len(r.Drift) > 0 {
		rows := [][]string{}
		for _, d := range r.Drift {
			rows = append(rows, []string{d.Embodiment, fmt.Sprintf("%s[%d]", d.Vector, d.Dim), fmt.Sprintf("%+.6g", d.Shift),
				fmt.Sprintf("%.6g", d.StdRatio), fmt.Sprintf("%.6g", d.BaseMean), fmt.Sprintf("%.6g", d.Mean),
				fmt.Sprintf("%.6g", d.BaseStd), fmt.Sprintf("%.6g", d.Std)})
		}
		p.table(2, []string{"embodiment", "dim", "shift", "std ratio", "mean a", "mean b", "std a", "std b"}, rows)
	}

	p.printf("\nepisodes that changed split: %d\n", len(r.Moved))
	if len(r.Moved) > 0 {
		rows := [][]string{}
		for _, m := range r.Moved {
			rows = append(rows, []string{m.Episode, m.A, m.B})
		}
		p.table(1, []string{"episode", "a", "b"}, rows)
	}
	return p.err
}

// dfNames lists added, removed and changed names, one a line.
func dfNames(p *shWriter, added, removed []string, changed []DiffSHA256) {
	rows := [][]string{}
	for _, k := range added {
		rows = append(rows, []string{"added", k})
	}
	for _, k := range removed {
		rows = append(rows, []string{"removed", k})
	}
	for _, c := range changed {
		rows = append(rows, []string{"changed", c.Name})
	}
	if len(rows) > 0 {
		p.table(2, nil, rows)
	}
}

// dfDiffer says how many things differ: "1 key differs", "2 keys differ".
func dfDiffer(n int, thing string) string {
	if n == 1 {
		return "1 " + thing + " differs"
	}
	return fmt.Sprintf("%d %ss differ", n, thing)
}

func dfValue(v json.RawMessage) string {
	if v == nil {
		return "-"
	}
	return string(v)
}
