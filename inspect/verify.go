package inspect

import (
	"bytes"
	"cmp"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"

	"github.com/parquet-go/parquet-go"
	"golang.org/x/sync/errgroup"

	"hindcast/pipeline"
)

// VerifyResult is what Verify found: one entry per file of the manifest,
// and every problem with the file or manifest field it concerns.
type VerifyResult struct {
	Dataset string       `json:"dataset"`
	Version string       `json:"version"`
	URI     string       `json:"uri"`
	Files   []VerifyFile `json:"files"`
	// Bytes is the number of bytes hashed.
	Bytes int64 `json:"bytes"`
	// Digest is the manifest's digest; DigestComputed is pipeline.Digest
	// over the manifest's config_sha256, sources and files.
	Digest         string `json:"digest"`
	DigestComputed string `json:"digest_computed"`
	// Quarantine is the manifest's quarantine file (config quarantine:
	// true) as found in the folder, or null when the manifest lists none.
	// It is not one of the manifest's files, so it is kept apart from them.
	Quarantine *VerifyFile     `json:"quarantine"`
	Problems   []VerifyProblem `json:"problems"`
}

// VerifyFile is one manifest file as found in the folder. Rows is -1 when
// the footer could not be read; Bytes and SHA256 are empty for a missing file.
type VerifyFile struct {
	Path    string `json:"path"`
	Present bool   `json:"present"`
	Bytes   int64  `json:"bytes"`
	SHA256  string `json:"sha256"`
	Rows    int64  `json:"rows"`
	OK      bool   `json:"ok"`
}

// VerifyProblem is one thing wrong. Subject is the file path, or the
// manifest field ("funnel", "source <key>", "digest", …) it concerns.
type VerifyProblem struct {
	Subject string `json:"subject"`
	Check   string `json:"check"`
	Detail  string `json:"detail"`
}

// OK reports a version with no problem.
func (r *VerifyResult) OK() bool { return len(r.Problems) == 0 }

// vfParallel bounds the files checked at once: enough to hide an object
// store's latency, few enough not to crowd a laptop's disk.
const vfParallel = 4

// vfFooterBuffer is read at once at the end of a file: with OptimisticRead
// the footer of a shard usually comes in that one request.
const vfFooterBuffer = 64 << 10

// Verify checks a version against its manifest: every file's SHA-256
// (streamed), size and row count (from the Parquet footer, with the
// footer's key-value metadata), the same for the quarantine file when the
// manifest lists one, the funnel's conservation laws (SPEC §5), the digest
// and config_sha256 recomputed from the manifest, and that the folder holds
// exactly the manifest's files and quarantine file. The digest does not
// cover the quarantine (SPEC §5 defines it over config_sha256, sources and
// files), so hashing it here is the only thing that catches a changed one.
// It returns an error only when storage fails; everything wrong with the
// version is a problem in the result.
func Verify(ctx context.Context, v *pipeline.Version) (*VerifyResult, error) {
	m := v.Manifest
	r := &VerifyResult{Dataset: m.Dataset, Version: m.Version, URI: v.URI, Digest: m.Digest,
		Files: []VerifyFile{}, Problems: []VerifyProblem{}}

	listed := map[string]pipeline.ObjectInfo{}
	var keys []string
	err := v.Store.List(ctx, "", func(o pipeline.ObjectInfo) error {
		listed[o.Key] = o
		keys = append(keys, o.Key)
		return nil
	})
	if err != nil {
		return nil, fmt.Errorf("verify %s: %w", v.URI, err)
	}

	// Files, checked concurrently; each writes only its own slots.
	r.Files = make([]VerifyFile, len(m.Files))
	probs := make([][]VerifyProblem, len(m.Files))
	g, gctx := errgroup.WithContext(ctx)
	g.SetLimit(vfParallel)
	for i, f := range m.Files {
		r.Files[i] = VerifyFile{Path: f.Path, Rows: -1}
		if _, ok := listed[f.Path]; !ok {
			probs[i] = []VerifyProblem{{f.Path, "missing", "listed in the manifest, not in the folder"}}
			continue
		}
		g.Go(func() error {
			vf, ps, err := vfCheckFile(gctx, v.Store, m, f)
			if err != nil {
				return err
			}
			r.Files[i], probs[i] = vf, ps
			return nil
		})
	}
	var qProbs []VerifyProblem
	if q := m.Quarantine; q != nil {
		r.Quarantine = &VerifyFile{Path: q.Path, Rows: -1}
		qProbs = vfQuarantineLayout(q)
		if _, ok := listed[q.Path]; !ok {
			if q.Path != "" {
				qProbs = append(qProbs, VerifyProblem{q.Path, "missing", "the manifest's quarantine file, not in the folder"})
			}
		} else {
			g.Go(func() error {
				vf, ps, err := vfCheckObject(gctx, v.Store, q.Path, q.Bytes, q.SHA256, q.Rows, [][2]string{
					{"dataset", m.Dataset}, {"table", "quarantine"}, {"config_sha256", m.ConfigSHA256}})
				if err != nil {
					return err
				}
				*r.Quarantine, qProbs = vf, append(qProbs, ps...)
				return nil
			})
		}
	}
	if err := g.Wait(); err != nil {
		return nil, fmt.Errorf("verify %s: %w", v.URI, err)
	}
	seen := map[string]bool{}
	for i, f := range m.Files {
		if seen[f.Path] {
			probs[i] = append(probs[i], VerifyProblem{f.Path, "listed_twice", "the manifest lists this file more than once"})
		}
		seen[f.Path] = true
		r.Files[i].OK = len(probs[i]) == 0
		r.Bytes += r.Files[i].Bytes
		r.Problems = append(r.Problems, probs[i]...)
	}

	if r.Quarantine != nil {
		r.Quarantine.OK = len(qProbs) == 0
		r.Bytes += r.Quarantine.Bytes
		r.Problems = append(r.Problems, qProbs...)
	}

	// Files in the folder the manifest does not know. Under quarantine/
	// only the quarantine file the manifest lists belongs to the version.
	for _, k := range keys {
		switch {
		case seen[k], k == pipeline.ManifestName:
		case m.Quarantine != nil && k == m.Quarantine.Path:
		default:
			r.Problems = append(r.Problems, VerifyProblem{k, "extra", fmt.Sprintf("in the folder (%d bytes), not in the manifest", listed[k].Size)})
		}
	}

	bad := map[string]bool{}
	for i, f := range m.Files {
		if !r.Files[i].OK {
			bad[f.Path] = true
		}
	}
	gps, err := vfGoalSplits(ctx, v.Store, m, bad)
	if err != nil {
		return nil, fmt.Errorf("verify %s: %w", v.URI, err)
	}
	r.Problems = append(r.Problems, gps...)
	r.Problems = append(r.Problems, vfManifest(m, seen)...)
	r.DigestComputed = pipeline.Digest(m.ConfigSHA256, m.Sources, m.Files)
	if r.DigestComputed != m.Digest {
		r.Problems = append(r.Problems, VerifyProblem{"digest", "digest",
			fmt.Sprintf("manifest says %s, its config_sha256, sources and files give %s", m.Digest, r.DigestComputed)})
	}
	return r, nil
}

// vfCheckFile checks one manifest file: its path against the layout of
// SPEC §4, then its content (vfCheckObject) with the footer metadata a
// shard carries.
func vfCheckFile(ctx context.Context, st pipeline.Store, m *pipeline.Manifest, f pipeline.File) (VerifyFile, []VerifyProblem, error) {
	var ps []VerifyProblem
	add := func(check, format string, a ...any) {
		ps = append(ps, VerifyProblem{f.Path, check, fmt.Sprintf(format, a...)})
	}
	if want := fmt.Sprintf("%s/split=%s/part-%05d.parquet", f.Table, f.Split, f.Partition); f.Path != want {
		add("layout", "table %q, split %q and partition %d make the path %s", f.Table, f.Split, f.Partition, want)
	}
	if f.Rows <= 0 {
		add("empty", "the manifest gives %d rows; no empty file is written (SPEC §4)", f.Rows)
	}
	// The footer's key-value metadata (SPEC §4) names what the file is.
	vf, more, err := vfCheckObject(ctx, st, f.Path, f.Bytes, f.SHA256, f.Rows, [][2]string{
		{"dataset", m.Dataset}, {"table", f.Table}, {"split", f.Split},
		{"partition", fmt.Sprint(f.Partition)}, {"config_sha256", m.ConfigSHA256}})
	if err != nil {
		return vf, nil, err
	}
	return vf, append(ps, more...), nil
}

// vfQuarantineLayout checks where the manifest puts its quarantine file:
// the pipeline writes it at pipeline.QuarantinePath, and a path elsewhere
// would let the file pass for one thing while the folder holds another.
func vfQuarantineLayout(q *pipeline.QuarantineFile) []VerifyProblem {
	switch {
	case q.Path == "":
		return []VerifyProblem{{"quarantine", "layout", "the manifest's quarantine has no path"}}
	case q.Path != pipeline.QuarantinePath:
		return []VerifyProblem{{q.Path, "layout", fmt.Sprintf("the quarantine file is written at %s", pipeline.QuarantinePath)}}
	}
	return nil
}

// vfCheckObject hashes one Parquet object of the version and reads its
// footer: size, SHA-256 and row count against what the manifest records,
// and each footer key-value pair of meta ({key, value}) present with that
// value. Shards and the quarantine file are checked alike.
func vfCheckObject(ctx context.Context, st pipeline.Store, path string, wantBytes int64, wantSHA string, wantRows int64, meta [][2]string) (VerifyFile, []VerifyProblem, error) {
	vf := VerifyFile{Path: path, Rows: -1}
	var ps []VerifyProblem
	add := func(check, format string, a ...any) {
		ps = append(ps, VerifyProblem{path, check, fmt.Sprintf(format, a...)})
	}
	rc, err := st.Open(ctx, path, 0)
	if errors.Is(err, pipeline.ErrNotFound) {
		add("missing", "listed in the manifest, gone from the folder")
		return vf, ps, nil
	}
	if err != nil {
		return vf, nil, fmt.Errorf("open %s: %w", path, err)
	}
	h := sha256.New()
	n, err := io.Copy(h, rc)
	rc.Close()
	if err != nil {
		return vf, nil, fmt.Errorf("read %s: %w", path, err)
	}
	vf.Present, vf.Bytes, vf.SHA256 = true, n, hex.EncodeToString(h.Sum(nil))
	if n != wantBytes {
		add("bytes", "%d bytes in the folder, %d in the manifest", n, wantBytes)
	}
	if vf.SHA256 != wantSHA {
		add("sha256", "content SHA-256 %s, manifest %s", vf.SHA256, wantSHA)
	}

	ra := &vfReaderAt{ctx: ctx, store: st, key: path, size: n}
	pf, err := parquet.OpenFile(ra, n, parquet.SkipPageIndex(true), parquet.SkipBloomFilters(true),
		parquet.OptimisticRead(true), parquet.ReadBufferSize(vfFooterBuffer))
	if ra.err != nil {
		if errors.Is(ra.err, pipeline.ErrNotFound) {
			add("missing", "gone from the folder while being read")
			return vf, ps, nil
		}
		return vf, nil, fmt.Errorf("read footer of %s: %w", path, ra.err)
	}
	if err != nil {
		add("footer", "not a readable Parquet file: %v", err)
		return vf, ps, nil
	}
	vf.Rows = pf.NumRows()
	if vf.Rows != wantRows {
		add("rows", "footer says %d rows, manifest %d", vf.Rows, wantRows)
	}
	for _, kv := range meta {
		got, ok := pf.Lookup(kv[0])
		switch {
		case !ok:
			add("footer_metadata", "footer has no %q", kv[0])
		case got != kv[1]:
			add("footer_metadata", "footer %s %q, manifest %q", kv[0], got, kv[1])
		}
	}
	return vf, ps, nil
}

// vfReaderAt reads a stored object at offsets, one Open per read: what the
// Parquet footer reader needs from a local file or an S3 object alike. It
// keeps the first storage error, so a failed read is told from a bad file.
type vfReaderAt struct {
	ctx   context.Context
	store pipeline.Store
	key   string
	size  int64
	err   error
}

func (r *vfReaderAt) ReadAt(p []byte, off int64) (int, error) {
	if off < 0 {
		return 0, fmt.Errorf("read %s at %d: negative offset", r.key, off)
	}
	if off >= r.size {
		return 0, io.EOF
	}
	rc, err := r.store.Open(r.ctx, r.key, off)
	if err != nil {
		if r.err == nil {
			r.err = err
		}
		return 0, err
	}
	defer rc.Close()
	n, err := io.ReadFull(rc, p)
	switch {
	case err == nil:
		return n, nil
	case errors.Is(err, io.EOF), errors.Is(err, io.ErrUnexpectedEOF):
		return n, io.EOF
	}
	if r.err == nil {
		r.err = err
	}
	return n, err
}

// vfManifest checks the manifest against itself: the conservation laws of
// SPEC §5, orderings, and that its counts agree with its files.
func vfManifest(m *pipeline.Manifest, files map[string]bool) []VerifyProblem {
	var ps []VerifyProblem
	add := func(subject, check, format string, a ...any) {
		ps = append(ps, VerifyProblem{subject, check, fmt.Sprintf(format, a...)})
	}
	f := m.Funnel
	sum := func(d map[string]int64) (s int64) {
		for _, n := range d {
			s += n
		}
		return s
	}
	if d := sum(f.Dropped); f.Lines != f.Frames+d {
		add("funnel", "conservation", "lines %d ≠ frames %d + Σ dropped %d = %d", f.Lines, f.Frames, d, f.Frames+d)
	}
	// The quarantine holds every dropped line, one row each.
	if q := m.Quarantine; q != nil && q.Rows != sum(f.Dropped) {
		add(cmp.Or(q.Path, "quarantine"), "quarantine_rows", "quarantine has %d rows, the funnel drops %d lines", q.Rows, sum(f.Dropped))
	}

	var lines, dups int64
	bySource := map[string]int64{}
	shaOf := map[string]string{}
	for i, s := range m.Sources {
		subject := "source " + s.Key
		if d := sum(s.Dropped); s.Lines != s.Kept+d {
			add(subject, "conservation", "lines %d ≠ kept %d + Σ dropped %d = %d", s.Lines, s.Kept, d, s.Kept+d)
		}
		if i > 0 && m.Sources[i-1].Key >= s.Key {
			add(subject, "order", "sources must be sorted by key, without repeats; %q comes after %q", s.Key, m.Sources[i-1].Key)
		}
		if s.DuplicateOf != nil {
			dups++
			if sha, ok := shaOf[*s.DuplicateOf]; !ok || sha != s.SHA256 {
				add(subject, "duplicate_of", "duplicate_of %q is not an earlier source with the same sha256", *s.DuplicateOf)
			}
		}
		if _, ok := shaOf[s.Key]; !ok {
			shaOf[s.Key] = s.SHA256
		}
		for _, p := range s.Files {
			if !files[p] {
				add(subject, "source_files", "names file %s, which the manifest does not list", p)
			}
		}
		lines += s.Lines
		for r, n := range s.Dropped {
			bySource[r] += n
		}
	}
	if f.Lines != lines {
		add("funnel", "conservation", "lines %d ≠ Σ sources lines %d", f.Lines, lines)
	}
	for _, r := range shReasons(f.Dropped) {
		if f.Dropped[r] != bySource[r] {
			add("funnel", "conservation", "dropped %s %d ≠ Σ sources dropped %s %d", r, f.Dropped[r], r, bySource[r])
		}
	}
	for r := range bySource {
		if _, ok := f.Dropped[r]; !ok && bySource[r] != 0 {
			add("funnel", "conservation", "sources drop %d lines as %s, the funnel has no such reason", bySource[r], r)
		}
	}
	vfRecordings(m, add)
	if int64(len(m.Sources)) != f.Objects {
		add("funnel", "conservation", "objects %d ≠ %d sources", f.Objects, len(m.Sources))
	}
	if dups != f.DuplicateObjects {
		add("funnel", "conservation", "duplicate_objects %d ≠ %d sources with duplicate_of", f.DuplicateObjects, dups)
	}

	var frameRows, pairRows, episodes int64
	for i, fl := range m.Files {
		if i > 0 && m.Files[i-1].Path > fl.Path {
			add(fl.Path, "order", "files must be sorted by path; it comes after %s", m.Files[i-1].Path)
		}
		switch fl.Table {
		case "frames":
			frameRows += fl.Rows
			episodes += fl.Episodes
		case "pairs":
			pairRows += fl.Rows
		}
	}
	if frameRows != f.Frames {
		add("files", "conservation", "frames files hold %d rows, funnel.frames is %d", frameRows, f.Frames)
	}
	if pairRows != f.Pairs {
		add("files", "conservation", "pairs files hold %d rows, funnel.pairs is %d", pairRows, f.Pairs)
	}
	// Every episode lies in one split and one partition: one frames file.
	if episodes != f.Episodes {
		add("files", "conservation", "frames files hold %d episodes, funnel.episodes is %d", episodes, f.Episodes)
	}

	var ce, cf, cp int64
	for _, c := range m.Counts {
		ce, cf, cp = ce+c.Episodes, cf+c.Frames, cp+c.Pairs
	}
	if ce != f.Episodes || cf != f.Frames || cp != f.Pairs {
		add("counts", "conservation", "counts sum to %d episodes, %d frames, %d pairs; funnel has %d, %d, %d",
			ce, cf, cp, f.Episodes, f.Frames, f.Pairs)
	}

	if got, err := vfConfigSHA(m.Config); err != nil {
		add("config", "config_sha256", "%v", err)
	} else if got != m.ConfigSHA256 {
		add("config_sha256", "config_sha256", "manifest says %s, its config hashes to %s", m.ConfigSHA256, got)
	}
	return ps
}

// vfConfigSHA recomputes config_sha256 from the manifest's config (SPEC §5):
// the canonical JSON (keys sorted, numbers as written, no HTML escaping)
// without source.uri, work, output, the storage connection settings and the
// gates (they decide whether a version is committed, never its bytes).
func vfConfigSHA(raw json.RawMessage) (string, error) {
	dec := json.NewDecoder(bytes.NewReader(raw))
	dec.UseNumber()
	var cfg map[string]any
	if err := dec.Decode(&cfg); err != nil || cfg == nil {
		return "", fmt.Errorf("the manifest's config is not a JSON object: %v", err)
	}
	delete(cfg, "work")
	delete(cfg, "output")
	delete(cfg, "storage")
	delete(cfg, "gates")
	if src, ok := cfg["source"].(map[string]any); ok {
		delete(src, "uri")
	}
	var buf bytes.Buffer
	enc := json.NewEncoder(&buf)
	enc.SetEscapeHTML(false)
	if err := enc.Encode(cfg); err != nil {
		return "", fmt.Errorf("re-encoding the manifest's config: %w", err)
	}
	sum := sha256.Sum256(bytes.TrimSuffix(buf.Bytes(), []byte("\n")))
	return hex.EncodeToString(sum[:]), nil
}

// WriteText writes the verdict and every problem as aligned plain text.
func (r *VerifyResult) WriteText(w io.Writer) error {
	p := &shWriter{w: w}
	p.printf("verify %s version %s\n", r.Dataset, r.Version)
	p.printf("uri       %s\n", r.URI)
	present := 0
	for _, f := range r.Files {
		if f.Present {
			present++
		}
	}
	p.printf("files     %d in the manifest, %d found, %s hashed\n", len(r.Files), present, shBytes(r.Bytes))
	if q := r.Quarantine; q != nil {
		switch {
		case q.Path == "":
			p.printf("quarantine listed without a path\n")
		case !q.Present:
			p.printf("quarantine %s: not found\n", q.Path)
		case q.Rows < 0:
			p.printf("quarantine %s: %s, footer unreadable\n", q.Path, shBytes(q.Bytes))
		default:
			p.printf("quarantine %s: %s, %d rows\n", q.Path, shBytes(q.Bytes), q.Rows)
		}
	}
	if r.DigestComputed == r.Digest {
		p.printf("digest    %s (recomputed, matches)\n", r.Digest)
	} else {
		p.printf("digest    %s (manifest)\n          %s (recomputed)\n", r.Digest, r.DigestComputed)
	}
	if r.OK() {
		p.printf("OK: the version matches its manifest\n")
		return p.err
	}
	word := "problems"
	if len(r.Problems) == 1 {
		word = "problem"
	}
	p.printf("FAILED: %d %s\n", len(r.Problems), word)
	rows := make([][]string, 0, len(r.Problems))
	for _, q := range r.Problems { // files first, in path order, then the manifest's fields
		rows = append(rows, []string{q.Subject, q.Check, q.Detail})
	}
	p.table(3, []string{"subject", "check", "detail"}, rows)
	return p.err
}
