package pipeline

import (
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"net/url"
	"os"
	"path"
	"path/filepath"
	"regexp"
	"slices"
	"sort"
	"strconv"
	"strings"
	"time"

	"gopkg.in/yaml.v3"
)

// Defaults of SPEC §2. Where the spec shows an example value for an optional
// key, that value is the default, so a minimal config behaves like the
// documented one.
const (
	defaultMaxLineBytes = 1 << 20
	defaultWork         = ".hindcast/work"
	defaultOutput       = "datasets"
	defaultPartitions   = 8
	defaultMaxGap       = 500 * time.Millisecond
	defaultMinSteps     = 10
	defaultMaxSteps     = 500
	defaultFuture       = 2
	defaultGeometric    = 1
	defaultFinal        = 1
	defaultGamma        = 0.99
	defaultRowGroupRows = 65536
	// defaultMaxImageBytes is SPEC §1's source.max_image_bytes (16 MiB).
	defaultMaxImageBytes = 16 << 20
	// maxMaxImageBytes bounds source.max_image_bytes: one image is held
	// whole in memory while it is checked, so its bound is a memory bound.
	maxMaxImageBytes = 1 << 30
	// maxPartitions bounds partitions: every stage keeps per-partition
	// state (open writers, counters), so their number drives memory.
	maxPartitions = 4096
	// maxRowGroupRows bounds parquet.row_group_rows: pack buffers one row
	// group in memory before writing it.
	maxRowGroupRows = 1 << 20
	// maxEpisodeSteps bounds episodes.min_steps/max_steps: episodes and goals
	// hold one whole episode (max_steps frames) in memory.
	maxEpisodeSteps = 1_000_000
	// maxGoalsPerStrategy bounds goals.future, geometric, final and negative:
	// each step yields that many pairs, allocated per step.
	maxGoalsPerStrategy = 1024
	// maxUploadBuffer bounds storage.part_size × storage.max_concurrency,
	// the bytes one upload holds in memory.
	maxUploadBuffer = 4 << 30
	// maxCameras bounds an embodiment's cameras: pack holds a row group of
	// every camera's bytes in memory.
	maxCameras = 64
	// maxFrameSources bounds the sources of one frames list.
	maxFrameSources = 1024
	// maxRate bounds frames.rate: the period round(1e9/rate) ns must be >= 1.
	maxRate = 1e9

	// maxDims bounds obs and act lengths. A longer vector could not fit a
	// default-sized line anyway, and the bound keeps the expansion of a scalar
	// bound (one value per dim) from allocating without limit.
	maxDims = 1_000_000
	// maxMaxLineBytes bounds source.max_line_bytes: readers size their line
	// buffer from it, so an absurd value must fail here, not at run time.
	maxMaxLineBytes = 64 << 20
	// splitSumTolerance is how far train + val + test may be from 1, so that
	// decimal fractions such as 0.7 + 0.2 + 0.1 are accepted.
	splitSumTolerance = 1e-9
)

func defaultInclude() []string {
	return []string{"**/*.jsonl", "**/*.jsonl.gz", "**/*.jsonl.zst", "**/*.mcap"}
}

// configKeys lists the keys allowed in each map of the config file;
// "embodiments.*" is the map of one embodiment. The loader rejects every other
// key, and a test checks that the JSON Schema lists exactly these.
func configKeys() map[string][]string {
	return map[string][]string{
		"":              {"dataset", "source", "work", "output", "partitions", "seed", "embodiments", "episodes", "goals", "splits", "split_by", "float", "parquet", "storage", "quarantine", "recordings", "gates"},
		"source":        {"uri", "include", "exclude", "max_line_bytes", "image_roots", "max_image_bytes"},
		"embodiments.*": {"obs", "act", "obs_low", "obs_high", "act_low", "act_high", "cameras", "goal_dims", "goal_tolerance", "frames"},
		"recordings":    {"unit", "embodiment", "time"},
		"recordings.*":  {"metadata", "key", "path"},
		"frames":        {"rate", "clock", "max_age", "obs", "act", "cameras", "events", "task", "success"},
		"frames.source": {"topic", "field", "align", "max_age"},
		"frames.label":  {"topic", "field"},
		"gates":         {"max_dropped", "max_dropped_by", "max_source_dropped", "max_skipped", "max_incomplete", "min_episodes", "min_frames", "max_drift", "baseline"},
		"episodes":      {"max_gap", "min_steps", "max_steps"},
		"goals":         {"future", "geometric", "final", "negative", "gamma", "horizon"},
		"splits":        {"train", "val", "test"},
		"parquet":       {"compression", "row_group_rows"},
		"storage":       {"endpoint", "path_style", "region", "max_concurrency", "part_size", "attempts", "timeout"},
	}
}

// LoadConfig reads, validates and resolves the YAML config at path (SPEC §2).
// Any problem is a *ConfigError naming the key and its line; the whole file is
// checked before anything else runs, so a bad config never starts work.
func LoadConfig(path string) (*Config, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, &ConfigError{File: path, Msg: fmt.Sprintf("cannot read the config: %v", err)}
	}
	return ParseConfig(data, filepath.Dir(path), path)
}

// ParseConfig does what LoadConfig does, from bytes: dir is the folder plain
// paths are relative to, name is the file name used in messages and kept as
// Config.Path.
func ParseConfig(data []byte, dir, name string) (*Config, error) {
	absDir, err := filepath.Abs(dir)
	if err != nil {
		return nil, &ConfigError{File: name, Msg: fmt.Sprintf("cannot resolve the config folder %q: %v", dir, err)}
	}
	doc, cerr := parseYAML(data, name)
	if cerr != nil {
		return nil, cerr
	}
	l := &configLoader{file: name, dir: absDir}
	c := l.config(doc)
	if err := l.first(); err != nil {
		return nil, err
	}
	c.Dir = absDir
	c.Path = name
	return c, nil
}

// parseYAML decodes the single YAML document of a config into a node tree,
// which keeps the line of every key for messages.
func parseYAML(data []byte, name string) (*yaml.Node, *ConfigError) {
	dec := yaml.NewDecoder(bytes.NewReader(data))
	var doc yaml.Node
	err := dec.Decode(&doc)
	if errors.Is(err, io.EOF) || (err == nil && len(doc.Content) == 0) {
		return nil, &ConfigError{File: name, Msg: "the config is empty; it needs at least dataset, source.uri and embodiments"}
	}
	if err != nil {
		return nil, yamlError(name, err)
	}
	var next yaml.Node
	switch err := dec.Decode(&next); {
	case errors.Is(err, io.EOF):
	case err != nil:
		return nil, yamlError(name, err)
	default:
		return nil, &ConfigError{File: name, Line: next.Line, Msg: "only one YAML document is allowed"}
	}
	return doc.Content[0], nil
}

// yamlError turns a YAML syntax error ("yaml: line 3: ...") into a
// ConfigError carrying that line.
func yamlError(name string, err error) *ConfigError {
	msg := strings.TrimPrefix(err.Error(), "yaml: ")
	line := 0
	if rest, ok := strings.CutPrefix(msg, "line "); ok {
		if num, after, ok := strings.Cut(rest, ": "); ok {
			if n, err := strconv.Atoi(num); err == nil {
				line, msg = n, after
			}
		}
	}
	return &ConfigError{File: name, Line: line, Msg: "invalid YAML: " + msg}
}

// configLoader walks the node tree of one config file and collects every
// problem, so that the one nearest the top of the file can be reported
// whatever order the checks ran in.
type configLoader struct {
	file string
	dir  string // absolute folder of the config file
	errs []*ConfigError
	// suggested holds the dotted keys that an unknown key was reported as a
	// likely misspelling of, so that the same key is not also reported as
	// missing: the typo is the problem to fix.
	suggested map[string]bool
}

// cfgField is one key of a YAML map with its value.
type cfgField struct {
	name string     // the key as written, e.g. "gamma"
	key  string     // dotted key, e.g. "goals.gamma"
	line int        // line of the key
	val  *yaml.Node // the value, aliases resolved
}

func (l *configLoader) fail(key string, line int, format string, args ...any) {
	l.errs = append(l.errs, &ConfigError{File: l.file, Key: key, Line: line, Msg: fmt.Sprintf(format, args...)})
}

// first returns the problem on the earliest line (the first found among
// those on the same line), or nil.
func (l *configLoader) first() error {
	if len(l.errs) == 0 {
		return nil
	}
	sort.SliceStable(l.errs, func(i, j int) bool { return l.errs[i].Line < l.errs[j].Line })
	return l.errs[0]
}

func joinConfigKey(parent, name string) string {
	if parent == "" {
		return name
	}
	return parent + "." + name
}

func derefNode(n *yaml.Node) *yaml.Node {
	for n != nil && n.Kind == yaml.AliasNode {
		n = n.Alias
	}
	return n
}

// describeNode names a value for a message, quoting strings so that "2" is told
// apart from 2.
func describeNode(n *yaml.Node) string {
	n = derefNode(n)
	switch {
	case n == nil:
		return "nothing"
	case n.Kind == yaml.MappingNode:
		return "a map"
	case n.Kind == yaml.SequenceNode:
		return "a list"
	}
	v := n.Value
	if len(v) > 40 {
		v = v[:40] + "..."
	}
	switch n.ShortTag() {
	case "!!null":
		return "null"
	case "!!str":
		return strconv.Quote(v)
	}
	return v
}

// entries reads a map, reporting duplicate and merge keys, and returns its
// fields in file order.
func (l *configLoader) entries(key string, line int, n *yaml.Node, want string) ([]cfgField, bool) {
	n = derefNode(n)
	if n == nil || n.Kind != yaml.MappingNode {
		l.fail(key, line, "must be %s, got %s", want, describeNode(n))
		return nil, false
	}
	seen := make(map[string]int, len(n.Content)/2)
	out := make([]cfgField, 0, len(n.Content)/2)
	for i := 0; i+1 < len(n.Content); i += 2 {
		k := derefNode(n.Content[i])
		name := k.Value
		fkey := joinConfigKey(key, name)
		switch {
		case k.Kind != yaml.ScalarNode:
			l.fail(key, k.Line, "keys must be plain names, got %s", describeNode(k))
			continue
		case k.ShortTag() == "!!merge":
			l.fail(fkey, k.Line, "merge keys (<<) are not supported; repeat the keys instead")
			continue
		}
		if first, dup := seen[name]; dup {
			l.fail(fkey, k.Line, "duplicate key (first at line %d)", first)
			continue
		}
		seen[name] = k.Line
		out = append(out, cfgField{name: name, key: fkey, line: k.Line, val: derefNode(n.Content[i+1])})
	}
	return out, true
}

// fields reads a map with a fixed set of keys: an unknown key is reported
// with the keys that are allowed.
func (l *configLoader) fields(key string, line int, n *yaml.Node, allowed []string) map[string]cfgField {
	list, ok := l.entries(key, line, n, "a map of "+strings.Join(allowed, ", "))
	if !ok {
		return nil
	}
	out := make(map[string]cfgField, len(list))
	for _, f := range list {
		known := false
		for _, a := range allowed {
			known = known || a == f.name
		}
		if !known {
			if near := nearestKey(f.name, allowed); near != "" {
				if l.suggested == nil {
					l.suggested = map[string]bool{}
				}
				l.suggested[joinConfigKey(key, near)] = true
				l.fail(f.key, f.line, "unknown key; did you mean %s? (allowed: %s)", near, strings.Join(allowed, ", "))
				continue
			}
			l.fail(f.key, f.line, "unknown key (allowed: %s)", strings.Join(allowed, ", "))
			continue
		}
		out[f.name] = f
	}
	return out
}

func intRangeText(min, max int64) string {
	switch {
	case min == math.MinInt64 && max == math.MaxInt64:
		return "a 64-bit integer"
	case max == math.MaxInt64:
		return fmt.Sprintf("an integer >= %d", min)
	}
	return fmt.Sprintf("an integer from %d to %d", min, max)
}

// integer reads a YAML int: 2.5, "2" and 2.0 are rejected, so that a typo is
// never rounded into a different config.
func (l *configLoader) integer(f cfgField, min, max int64) (int64, bool) {
	var v int64
	if f.val.Kind != yaml.ScalarNode || f.val.ShortTag() != "!!int" || f.val.Decode(&v) != nil || v < min || v > max {
		l.fail(f.key, f.line, "must be %s, got %s", intRangeText(min, max), describeNode(f.val))
		return 0, false
	}
	return v, true
}

// number reads a finite YAML int or float.
func (l *configLoader) number(f cfgField, want string) (float64, bool) {
	v, ok := nodeNumber(f.val)
	if !ok {
		l.fail(f.key, f.line, "must be %s, got %s", want, describeNode(f.val))
	}
	return v, ok
}

func nodeNumber(n *yaml.Node) (float64, bool) {
	n = derefNode(n)
	var v float64
	if n.Kind != yaml.ScalarNode || (n.ShortTag() != "!!int" && n.ShortTag() != "!!float") || n.Decode(&v) != nil {
		return 0, false
	}
	return v, !math.IsNaN(v) && !math.IsInf(v, 0)
}

func formatNumber(v float64) string { return strconv.FormatFloat(v, 'g', -1, 64) }

// formatSum formats a computed sum such as train + val + test. Decimal
// fractions add up with binary noise (0.7 + 0.1 + 0.1 is 0.8999999999999999),
// which formatNumber would show; 10 significant digits hide that noise yet
// still show any sum that splitSumTolerance (1e-9) rejects as different from 1.
func formatSum(v float64) string { return strconv.FormatFloat(v, 'g', 10, 64) }

func (l *configLoader) str(f cfgField, want string) (string, bool) {
	if f.val.Kind != yaml.ScalarNode || f.val.ShortTag() != "!!str" {
		l.fail(f.key, f.line, "must be %s, got %s", want, describeNode(f.val))
		return "", false
	}
	return f.val.Value, true
}

func (l *configLoader) oneOf(f cfgField, allowed ...string) (string, bool) {
	want := strings.Join(allowed[:len(allowed)-1], ", ") + " or " + allowed[len(allowed)-1]
	s, ok := l.str(f, want)
	if !ok {
		return "", false
	}
	for _, a := range allowed {
		if s == a {
			return s, true
		}
	}
	l.fail(f.key, f.line, "must be %s, got %s", want, describeNode(f.val))
	return "", false
}

// strList reads a list of strings; element problems are reported on the
// element's own line.
func (l *configLoader) strList(f cfgField, want string) ([]string, []int, bool) {
	if f.val.Kind != yaml.SequenceNode {
		l.fail(f.key, f.line, "must be a list of %s, got %s", want, describeNode(f.val))
		return nil, nil, false
	}
	out := make([]string, 0, len(f.val.Content))
	lines := make([]int, 0, len(f.val.Content))
	ok := true
	for _, e := range f.val.Content {
		e = derefNode(e)
		if e.Kind != yaml.ScalarNode || e.ShortTag() != "!!str" {
			l.fail(f.key, e.Line, "must be a list of %s, got %s in it", want, describeNode(e))
			ok = false
			continue
		}
		out = append(out, e.Value)
		lines = append(lines, e.Line)
	}
	return out, lines, ok
}

// isConfigName reports whether s is 1 to max bytes, each an ASCII letter or digit
// (lower case only when lowerOnly) or one of extra.
func isConfigName(s string, max int, lowerOnly bool, extra string) bool {
	if len(s) < 1 || len(s) > max {
		return false
	}
	for i := 0; i < len(s); i++ {
		c := s[i]
		ok := c >= 'a' && c <= 'z' || c >= '0' && c <= '9' || !lowerOnly && c >= 'A' && c <= 'Z' || strings.IndexByte(extra, c) >= 0
		if !ok {
			return false
		}
	}
	return true
}

func (l *configLoader) config(doc *yaml.Node) *Config {
	c := &Config{
		Source: SourceConfig{
			Include:       defaultInclude(),
			Exclude:       []string{},
			MaxLineBytes:  defaultMaxLineBytes,
			MaxImageBytes: defaultMaxImageBytes,
		},
		Partitions:  defaultPartitions,
		Embodiments: map[string]*Embodiment{},
		Episodes:    EpisodeConfig{MaxGap: Duration(defaultMaxGap), MinSteps: defaultMinSteps, MaxSteps: defaultMaxSteps},
		Goals:       GoalConfig{Future: defaultFuture, Geometric: defaultGeometric, Final: defaultFinal, Gamma: defaultGamma},
		Splits:      SplitConfig{Train: 0.8, Val: 0.1, Test: 0.1},
		SplitBy:     "episode",
		Float:       "float32",
		Parquet:     ParquetConfig{Compression: "zstd", RowGroupRows: defaultRowGroupRows},
		Storage:     StorageConfig{MaxConcurrency: 8, PartSize: 16 << 20, Attempts: 6, Timeout: Duration(60 * time.Second)},
	}
	keys := configKeys()
	fs := l.fields("", doc.Line, doc, keys[""])
	if fs == nil {
		return c
	}

	if f, ok := fs["dataset"]; ok {
		if s, ok := l.str(f, "a name of 1-64 of a-z, 0-9 and -"); ok {
			if isConfigName(s, 64, true, "-") {
				c.Dataset = s
			} else {
				l.fail(f.key, f.line, "must be a name of 1-64 of a-z, 0-9 and -, got %s", describeNode(f.val))
			}
		}
	} else {
		l.missing("dataset", doc.Line, "required: the dataset name, 1-64 of a-z, 0-9 and -")
	}

	if f, ok := fs["source"]; ok {
		l.source(f, keys["source"], &c.Source)
	} else {
		l.missing("source", doc.Line, "required: a map with at least uri")
	}

	c.Work = l.locationOr(fs, "work", defaultWork, doc.Line)
	c.Output = l.locationOr(fs, "output", defaultOutput, doc.Line)

	if f, ok := fs["partitions"]; ok {
		v, _ := l.integer(f, 1, maxPartitions)
		c.Partitions = int(v)
	}
	if f, ok := fs["seed"]; ok {
		c.Seed, _ = l.integer(f, math.MinInt64, math.MaxInt64)
	}

	if f, ok := fs["embodiments"]; ok {
		list, ok := l.entries(f.key, f.line, f.val, "a map of embodiment name to its settings")
		if ok && len(list) == 0 {
			l.fail(f.key, f.line, "must declare at least one embodiment")
		}
		for _, e := range list {
			if !isConfigName(e.name, 64, false, "._-") {
				l.fail(e.key, e.line, "embodiment names must be 1-64 of A-Z, a-z, 0-9, ., _ and -, got %q", e.name)
				continue
			}
			c.Embodiments[e.name] = l.embodiment(e, keys["embodiments.*"])
		}
	} else {
		l.missing("embodiments", doc.Line, "required: a map of embodiment name to its settings (obs, goal_tolerance, ...)")
	}

	if f, ok := fs["episodes"]; ok {
		l.episodes(f, keys["episodes"], &c.Episodes)
	}
	if f, ok := fs["goals"]; ok {
		l.goals(f, keys["goals"], &c.Goals)
	}
	if f, ok := fs["splits"]; ok {
		l.splits(f, keys["splits"], &c.Splits)
	}
	if f, ok := fs["split_by"]; ok {
		c.SplitBy, _ = l.oneOf(f, "episode", "unit")
	}
	if f, ok := fs["float"]; ok {
		c.Float, _ = l.oneOf(f, "float32", "float64")
	}
	if f, ok := fs["parquet"]; ok {
		pf := l.fields(f.key, f.line, f.val, keys["parquet"])
		if g, ok := pf["compression"]; ok {
			c.Parquet.Compression, _ = l.oneOf(g, "zstd", "snappy", "gzip", "none")
		}
		if g, ok := pf["row_group_rows"]; ok {
			v, _ := l.integer(g, 1, maxRowGroupRows)
			c.Parquet.RowGroupRows = int(v)
		}
	}
	if f, ok := fs["storage"]; ok {
		l.storage(f, keys["storage"], &c.Storage)
	}
	if f, ok := fs["recordings"]; ok {
		c.Recordings = l.recordings(f, keys)
	}
	if c.Recordings == nil {
		for _, e := range c.Embodiments {
			if e.Frames != nil {
				c.Recordings = defaultRecordings()
				break
			}
		}
	}
	if f, ok := fs["gates"]; ok {
		c.Gates = l.gates(f, keys["gates"])
	}
	if f, ok := fs["quarantine"]; ok {
		if f.val.Kind != yaml.ScalarNode || f.val.ShortTag() != "!!bool" {
			l.fail(f.key, f.line, "must be true or false, got %s", describeNode(f.val))
		} else {
			c.Quarantine = f.val.Value == "true"
		}
	}
	return c
}

// storage reads the object-store connection settings.
func (l *configLoader) storage(f cfgField, allowed []string, s *StorageConfig) {
	fs := l.fields(f.key, f.line, f.val, allowed)
	if fs == nil {
		return
	}
	if g, ok := fs["endpoint"]; ok {
		const want = "an http:// or https:// URL"
		if v, ok := l.str(g, want); ok {
			u, err := url.Parse(v)
			if err != nil || (u.Scheme != "http" && u.Scheme != "https") || u.Host == "" || u.User != nil {
				l.fail(g.key, g.line, "must be %s without credentials, got %s", want, RedactURI(v))
			} else {
				s.Endpoint = v
			}
		}
	}
	if g, ok := fs["path_style"]; ok {
		if g.val.Kind != yaml.ScalarNode || g.val.ShortTag() != "!!bool" {
			l.fail(g.key, g.line, "must be true or false, got %s", describeNode(g.val))
		} else {
			b := g.val.Value == "true"
			s.PathStyle = &b
		}
	}
	if g, ok := fs["region"]; ok {
		if v, ok := l.str(g, "a region name such as us-east-1"); ok {
			if v == "" {
				l.fail(g.key, g.line, "must not be empty")
			}
			s.Region = v
		}
	}
	if g, ok := fs["max_concurrency"]; ok {
		v, _ := l.integer(g, 1, 1024)
		s.MaxConcurrency = int(v)
	}
	if g, ok := fs["part_size"]; ok {
		// S3 parts are at least 5 MiB (except the last) and at most 5 GiB.
		v, _ := l.integer(g, 5<<20, 5<<30)
		s.PartSize = v
	}
	// An upload buffers up to max_concurrency parts at once.
	if buf := int64(s.MaxConcurrency) * s.PartSize; buf > maxUploadBuffer {
		g, ok := fs["part_size"]
		if !ok {
			g = fs["max_concurrency"]
		}
		l.fail(g.key, g.line, "part_size × max_concurrency (%d × %d) must be at most %d (4 GiB): an upload buffers that many bytes at once", s.PartSize, s.MaxConcurrency, int64(maxUploadBuffer))
	}
	if g, ok := fs["attempts"]; ok {
		v, _ := l.integer(g, 1, 100)
		s.Attempts = int(v)
	}
	if g, ok := fs["timeout"]; ok {
		const want = "a Go duration > 0 such as 30s"
		if v, ok := l.str(g, want); ok {
			d, err := time.ParseDuration(v)
			if err != nil || d <= 0 {
				l.fail(g.key, g.line, "must be %s, got %s", want, describeNode(g.val))
			} else {
				s.Timeout = Duration(d)
			}
		}
	}
}

func (l *configLoader) source(f cfgField, allowed []string, s *SourceConfig) {
	fs := l.fields(f.key, f.line, f.val, allowed)
	if fs == nil {
		return
	}
	if g, ok := fs["uri"]; ok {
		s.URI, _ = l.location(g)
	} else {
		l.missing("source.uri", f.line, "required: s3://bucket/prefix, file:///abs/dir or a plain path")
	}
	if g, ok := fs["include"]; ok {
		s.Include = l.globs(g)
		if s.Include != nil && len(s.Include) == 0 {
			l.fail(g.key, g.line, "must list at least one pattern (leave it out for the default)")
		}
	}
	if g, ok := fs["exclude"]; ok {
		s.Exclude = l.globs(g)
	}
	if g, ok := fs["max_line_bytes"]; ok {
		v, _ := l.integer(g, 1, maxMaxLineBytes)
		s.MaxLineBytes = int(v)
	}
	if g, ok := fs["image_roots"]; ok {
		s.ImageRoots = l.imageRoots(g)
	}
	if g, ok := fs["max_image_bytes"]; ok {
		s.MaxImageBytes, _ = l.integer(g, 1, maxMaxImageBytes)
	}
}

// globs reads a list of key patterns and checks each with path.Match, with
// "**" (which crosses folders) read as "*", which has the same syntax.
func (l *configLoader) globs(f cfgField) []string {
	pats, lines, ok := l.strList(f, "glob patterns")
	if !ok {
		return nil
	}
	for i, p := range pats {
		switch {
		case p == "":
			l.fail(f.key, lines[i], "patterns must not be empty")
			ok = false
		case strings.HasPrefix(p, "/"):
			l.fail(f.key, lines[i], "pattern %q starts with /, but keys are relative to the source root", p)
			ok = false
		default:
			if _, err := path.Match(strings.ReplaceAll(p, "**", "*"), "x"); err != nil {
				l.fail(f.key, lines[i], "pattern %q is not a valid glob: %v", p, err)
				ok = false
			}
		}
	}
	if !ok {
		return nil
	}
	return pats
}

// locationOr resolves the optional storage location key of fs, or its
// default when the key is absent.
func (l *configLoader) locationOr(fs map[string]cfgField, key, def string, line int) string {
	if f, ok := fs[key]; ok {
		s, _ := l.location(f)
		return s
	}
	s, err := resolveLocation(def, l.dir)
	if err != nil {
		l.fail(key, line, "default %q: %v", def, err)
	}
	return s
}

func (l *configLoader) location(f cfgField) (string, bool) {
	s, ok := l.str(f, "s3://bucket/prefix, file:///abs/dir or a plain path")
	if !ok {
		return "", false
	}
	out, err := resolveLocation(s, l.dir)
	if err != nil {
		l.fail(f.key, f.line, "%v", err)
		return "", false
	}
	return out, true
}

// resolveLocation turns a storage location into an absolute URI ending in
// "/", so that joining it with a key never needs a separator check:
// s3://bucket/prefix/ stays as written, file:///abs/dir/ is cleaned, and a
// plain path is taken relative to dir. A resolved file URI is "file://"
// followed by the absolute slash path, without percent-encoding, so the OS
// path is the rest after "file://".
func resolveLocation(s, dir string) (string, error) {
	const want = "s3://bucket/prefix, file:///abs/dir or a plain path"
	if s == "" {
		return "", fmt.Errorf("must be %s, got an empty string", want)
	}
	scheme, rest, isURI := strings.Cut(s, "://")
	if isURI && !isURIScheme(scheme) {
		isURI = false
	}
	if !isURI {
		if l := strings.ToLower(s); strings.HasPrefix(l, "s3:") || strings.HasPrefix(l, "file:") {
			return "", fmt.Errorf("must be %s, got %q", want, s)
		}
		p := filepath.FromSlash(s)
		if !filepath.IsAbs(p) {
			p = filepath.Join(dir, p)
		}
		return withTrailingSlash("file://" + filepath.ToSlash(filepath.Clean(p))), nil
	}
	// URI schemes are case-insensitive (RFC 3986 §3.1).
	switch strings.ToLower(scheme) {
	case "s3":
		bucket, _, _ := strings.Cut(rest, "/")
		if !isS3Bucket(bucket) {
			return "", fmt.Errorf("s3 bucket %q must be 3-63 of a-z, 0-9, . and -, starting and ending with a letter or digit", bucket)
		}
		return withTrailingSlash("s3://" + rest), nil
	case "file":
		u, err := url.Parse("file://" + rest)
		if err != nil {
			return "", fmt.Errorf("not a valid file URI: %v", err)
		}
		// RFC 8089 §2: an empty host or "localhost" is the local machine.
		if (u.Host != "" && u.Host != "localhost") || !strings.HasPrefix(u.Path, "/") {
			return "", fmt.Errorf("a file URI must name an absolute path (file:///abs/dir), got %q", s)
		}
		if u.RawQuery != "" || u.ForceQuery || u.Fragment != "" {
			return "", fmt.Errorf("a file URI must not have a query or fragment, got %q", s)
		}
		return withTrailingSlash("file://" + path.Clean(u.Path)), nil
	}
	return "", fmt.Errorf("must be %s, got %q", want, s)
}

// isURIScheme reports whether s is a URI scheme (RFC 3986 §3.1: a letter, then
// letters, digits, +, - and .); a plain path such as "logs://x" is rare
// enough that reading it as a URI with an unsupported scheme is the safer error.
func isURIScheme(s string) bool {
	if s == "" || !(s[0] >= 'a' && s[0] <= 'z' || s[0] >= 'A' && s[0] <= 'Z') {
		return false
	}
	return isConfigName(s, len(s), false, "+-.")
}

// isS3Bucket checks the S3 bucket naming rules: 3-63 characters of lower-case
// letters, digits, dots and hyphens, beginning and ending with a letter or
// digit.
func isS3Bucket(b string) bool {
	if !isConfigName(b, 63, true, ".-") || len(b) < 3 {
		return false
	}
	edge := func(c byte) bool { return c >= 'a' && c <= 'z' || c >= '0' && c <= '9' }
	return edge(b[0]) && edge(b[len(b)-1])
}

func withTrailingSlash(s string) string {
	if strings.HasSuffix(s, "/") {
		return s
	}
	return s + "/"
}

func (l *configLoader) embodiment(f cfgField, allowed []string) *Embodiment {
	e := &Embodiment{Cameras: []string{}}
	fs := l.fields(f.key, f.line, f.val, allowed)
	if fs == nil {
		return e
	}
	obsOK := false
	if g, ok := fs["obs"]; ok {
		var v int64
		v, obsOK = l.integer(g, 1, maxDims)
		e.Obs = int(v)
	} else {
		l.missing(f.key+".obs", f.line, "required: the obs length, %s", intRangeText(1, maxDims))
	}
	actOK := true
	if g, ok := fs["act"]; ok {
		var v int64
		v, actOK = l.integer(g, 0, maxDims)
		e.Act = int(v)
	}
	e.ObsLow = l.bound(fs, "obs_low", "obs", e.Obs, obsOK)
	e.ObsHigh = l.bound(fs, "obs_high", "obs", e.Obs, obsOK)
	e.ActLow = l.bound(fs, "act_low", "act", e.Act, actOK)
	e.ActHigh = l.bound(fs, "act_high", "act", e.Act, actOK)
	l.boundOrder(fs, "obs_low", "obs_high", e.ObsLow, e.ObsHigh)
	l.boundOrder(fs, "act_low", "act_high", e.ActLow, e.ActHigh)

	if g, ok := fs["cameras"]; ok {
		e.Cameras = l.cameras(g)
	}
	if g, ok := fs["frames"]; ok {
		e.Frames = l.frames(g, e, actOK)
	}

	if g, ok := fs["goal_dims"]; ok {
		e.GoalDims = l.goalDims(g, e.Obs, obsOK)
	} else if obsOK {
		e.GoalDims = make([]int, e.Obs)
		for i := range e.GoalDims {
			e.GoalDims[i] = i
		}
	}

	if g, ok := fs["goal_tolerance"]; ok {
		if v, ok := l.number(g, "a finite number >= 0"); ok {
			if v < 0 {
				l.fail(g.key, g.line, "must be a finite number >= 0, got %s", describeNode(g.val))
			}
			e.GoalTolerance = v
		}
	} else {
		l.missing(f.key+".goal_tolerance", f.line, "required: the largest L2 distance to the goal that counts as reached, a finite number >= 0")
	}
	return e
}

// bound reads obs_low, obs_high, act_low or act_high: a number for every dim,
// or a list with one number per dim. It is expanded to one value per dim so
// the ingest check is a plain loop. dimsOK is false when the length itself
// was invalid; then only the numbers are checked.
func (l *configLoader) bound(fs map[string]cfgField, name, vec string, dims int, dimsOK bool) []float64 {
	f, ok := fs[name]
	if !ok {
		return nil
	}
	want := fmt.Sprintf("a finite number or a list of %d finite numbers (one per %s dim)", dims, vec)
	if !dimsOK {
		want = "a finite number or a list of finite numbers, one per " + vec + " dim"
	}
	if dimsOK && dims == 0 {
		l.fail(f.key, f.line, "%s is 0, so there is nothing to bound; leave %s out", vec, name)
		return nil
	}
	switch f.val.Kind {
	case yaml.ScalarNode:
		v, ok := l.number(f, want)
		if !ok || !dimsOK {
			return nil
		}
		out := make([]float64, dims)
		for i := range out {
			out[i] = v
		}
		return out
	case yaml.SequenceNode:
		out := make([]float64, 0, len(f.val.Content))
		ok := true
		for i, e := range f.val.Content {
			v, isNum := nodeNumber(e)
			if !isNum {
				l.fail(f.key, derefNode(e).Line, "must be %s, got %s at index %d", want, describeNode(e), i)
				ok = false
			}
			out = append(out, v)
		}
		if dimsOK && len(out) != dims {
			l.fail(f.key, f.line, "must be %s, got a list of %d", want, len(out))
			ok = false
		}
		if !ok || !dimsOK {
			return nil
		}
		return out
	}
	l.fail(f.key, f.line, "must be %s, got %s", want, describeNode(f.val))
	return nil
}

// boundOrder checks low <= high per dim when both bounds are given; a range
// that admits no value would drop every frame as out_of_range.
func (l *configLoader) boundOrder(fs map[string]cfgField, lowName, highName string, low, high []float64) {
	if low == nil || high == nil || len(low) != len(high) {
		return
	}
	f := fs[lowName]
	for i := range low {
		if low[i] > high[i] {
			l.fail(f.key, f.line, "must be <= %s in every dim, got %s > %s at dim %d", highName, formatNumber(low[i]), formatNumber(high[i]), i)
			return
		}
	}
}

// cameras reads camera names, which become Parquet columns img_<camera>:
// they must be column-safe and unique even ignoring case, since some Parquet
// readers fold column names.
func (l *configLoader) cameras(f cfgField) []string {
	names, lines, ok := l.strList(f, "camera names")
	if !ok {
		return nil
	}
	if len(names) > maxCameras {
		l.fail(f.key, f.line, "must list at most %d cameras, got %d", maxCameras, len(names))
		return nil
	}
	seen := make(map[string]string, len(names))
	for i, c := range names {
		if !isConfigName(c, 64, false, "_") {
			l.fail(f.key, lines[i], "camera names must be 1-64 of A-Z, a-z, 0-9 and _ (they become columns img_<camera>), got %q", c)
			continue
		}
		if prev, dup := seen[strings.ToLower(c)]; dup {
			l.fail(f.key, lines[i], "camera %q repeats %q (names must differ even ignoring case)", c, prev)
			continue
		}
		seen[strings.ToLower(c)] = c
	}
	return names
}

func (l *configLoader) goalDims(f cfgField, obs int, obsOK bool) []int {
	if f.val.Kind != yaml.SequenceNode {
		l.fail(f.key, f.line, "must be a list of obs indices (0-based), got %s", describeNode(f.val))
		return nil
	}
	if len(f.val.Content) == 0 {
		l.fail(f.key, f.line, "must list at least one obs index (leave it out for all)")
		return nil
	}
	max := int64(math.MaxInt32)
	if obsOK {
		max = int64(obs) - 1
	}
	out := make([]int, 0, len(f.val.Content))
	seen := make(map[int64]bool, len(f.val.Content))
	for _, e := range f.val.Content {
		e = derefNode(e)
		var d int64
		if e.Kind != yaml.ScalarNode || e.ShortTag() != "!!int" || e.Decode(&d) != nil || d < 0 || d > max {
			if obsOK {
				l.fail(f.key, e.Line, "obs indices must be integers from 0 to %d (obs is %d), got %s", max, obs, describeNode(e))
			} else {
				l.fail(f.key, e.Line, "obs indices must be integers >= 0, got %s", describeNode(e))
			}
			continue
		}
		if seen[d] {
			l.fail(f.key, e.Line, "obs index %d is listed twice", d)
			continue
		}
		seen[d] = true
		out = append(out, int(d))
	}
	return out
}

func (l *configLoader) episodes(f cfgField, allowed []string, ep *EpisodeConfig) {
	fs := l.fields(f.key, f.line, f.val, allowed)
	if fs == nil {
		return
	}
	if g, ok := fs["max_gap"]; ok {
		const want = "a Go duration > 0 such as 500ms or 2s"
		if s, ok := l.str(g, want); ok {
			d, err := time.ParseDuration(s)
			if err != nil || d <= 0 {
				l.fail(g.key, g.line, "must be %s, got %s", want, describeNode(g.val))
			} else {
				ep.MaxGap = Duration(d)
			}
		}
	}
	minOK, maxOK := true, true
	if g, ok := fs["min_steps"]; ok {
		var v int64
		v, minOK = l.integer(g, 2, maxEpisodeSteps)
		ep.MinSteps = int(v)
	}
	if g, ok := fs["max_steps"]; ok {
		var v int64
		v, maxOK = l.integer(g, 2, maxEpisodeSteps)
		ep.MaxSteps = int(v)
	}
	if minOK && maxOK && ep.MaxSteps < ep.MinSteps {
		if g, ok := fs["max_steps"]; ok {
			l.fail(g.key, g.line, "must be >= episodes.min_steps (%d), got %d", ep.MinSteps, ep.MaxSteps)
		} else {
			g := fs["min_steps"]
			l.fail(g.key, g.line, "must be <= episodes.max_steps (%d, the default), got %d", ep.MaxSteps, ep.MinSteps)
		}
	}
}

func (l *configLoader) goals(f cfgField, allowed []string, g *GoalConfig) {
	fs := l.fields(f.key, f.line, f.val, allowed)
	if fs == nil {
		return
	}
	counts := []struct {
		name string
		dst  *int
	}{{"future", &g.Future}, {"geometric", &g.Geometric}, {"final", &g.Final}, {"negative", &g.Negative}, {"horizon", &g.Horizon}}
	for _, c := range counts {
		if h, ok := fs[c.name]; ok {
			max := int64(maxGoalsPerStrategy)
			if c.name == "horizon" {
				max = maxEpisodeSteps
			}
			v, _ := l.integer(h, 0, max)
			*c.dst = int(v)
		}
	}
	if h, ok := fs["gamma"]; ok {
		const want = "> 0 and < 1"
		if v, ok := l.number(h, "a number "+want); ok {
			if !(v > 0 && v < 1) {
				l.fail(h.key, h.line, "must be %s, got %s", want, describeNode(h.val))
			}
			g.Gamma = v
		}
	}
}

// splits reads the split fractions. When the map is given, a missing member
// is 0, so {train: 1} means everything is train.
func (l *configLoader) splits(f cfgField, allowed []string, s *SplitConfig) {
	fs := l.fields(f.key, f.line, f.val, allowed)
	if fs == nil {
		return
	}
	*s = SplitConfig{}
	members := []struct {
		name string
		dst  *float64
	}{{"train", &s.Train}, {"val", &s.Val}, {"test", &s.Test}}
	ok := true
	for _, m := range members {
		g, given := fs[m.name]
		if !given {
			continue
		}
		const want = "a number from 0 to 1"
		v, isNum := l.number(g, want)
		if isNum && (v < 0 || v > 1) {
			l.fail(g.key, g.line, "must be %s, got %s", want, describeNode(g.val))
			isNum = false
		}
		ok = ok && isNum
		*m.dst = v
	}
	if sum := s.Train + s.Val + s.Test; ok && math.Abs(sum-1) > splitSumTolerance {
		l.fail(f.key, f.line, "train + val + test must be 1, got %s", formatSum(sum))
	}
}

// genericJSON returns the config's JSON as a generic value, numbers kept as
// their exact JSON text, so re-encoding sorts every object's keys.
func (c *Config) genericJSON() map[string]any {
	raw, err := json.Marshal(c)
	if err != nil {
		// Only a Config not made by ParseConfig (say, a NaN bound set by
		// hand) gets here; hashing it anyway would name no real config.
		panic(fmt.Sprintf("pipeline: config is not valid JSON data: %v", err))
	}
	dec := json.NewDecoder(bytes.NewReader(raw))
	dec.UseNumber()
	var m map[string]any
	if err := dec.Decode(&m); err != nil {
		panic(fmt.Sprintf("pipeline: re-reading the config JSON: %v", err))
	}
	return m
}

func encodeCanonicalJSON(v any) []byte {
	var buf bytes.Buffer
	enc := json.NewEncoder(&buf)
	// Paths with & or < stay readable; the bytes are as stable either way.
	enc.SetEscapeHTML(false)
	if err := enc.Encode(v); err != nil {
		panic(fmt.Sprintf("pipeline: encoding the config JSON: %v", err))
	}
	return bytes.TrimSuffix(buf.Bytes(), []byte("\n"))
}

// CanonicalJSON returns the resolved config as canonical JSON: object keys
// sorted, no insignificant white space, storage locations included. It is
// what the manifest records under "config".
func (c *Config) CanonicalJSON() []byte {
	return encodeCanonicalJSON(c.genericJSON())
}

// HashJSON returns the canonical JSON without the storage locations
// (source.uri, work, output, and a storage connection section), so that
// moving the logs, the work area or the output does not change
// config_sha256 (SPEC §5). The gates are left out too: like the connection
// settings they decide whether a version is committed, never a byte of it,
// and the pack stage's key and the shards' footers carry config_sha256, so a
// changed gate must not re-run any stage.
func (c *Config) HashJSON() []byte {
	m := c.genericJSON()
	delete(m, "work")
	delete(m, "output")
	delete(m, "storage")
	delete(m, "gates")
	if src, ok := m["source"].(map[string]any); ok {
		delete(src, "uri")
	}
	return encodeCanonicalJSON(m)
}

// SHA256 returns the hex SHA-256 of HashJSON(): the manifest's config_sha256.
func (c *Config) SHA256() string {
	sum := sha256.Sum256(c.HashJSON())
	return hex.EncodeToString(sum[:])
}

// missing reports a required key that is absent, unless an unknown key was
// already reported as its likely misspelling.
func (l *configLoader) missing(key string, line int, format string, args ...any) {
	if l.suggested[key] {
		return
	}
	l.fail(key, line, format, args...)
}

// nearestKey returns the allowed key nearest to name by edit distance, when
// it is near enough to be a typo (at most a third of the longer name, and at
// most 3 edits), else "".
func nearestKey(name string, allowed []string) string {
	best, bestD := "", 4
	for _, a := range allowed {
		d := editDistance(name, a)
		limit := max(len(name), len(a)) / 3
		if d <= limit && d < bestD {
			best, bestD = a, d
		}
	}
	return best
}

// editDistance is the Levenshtein distance between a and b, in bytes (keys
// are ASCII).
func editDistance(a, b string) int {
	prev := make([]int, len(b)+1)
	cur := make([]int, len(b)+1)
	for j := range prev {
		prev[j] = j
	}
	for i := 1; i <= len(a); i++ {
		cur[0] = i
		for j := 1; j <= len(b); j++ {
			cost := 1
			if a[i-1] == b[j-1] {
				cost = 0
			}
			cur[j] = min(prev[j]+1, cur[j-1]+1, prev[j-1]+cost)
		}
		prev, cur = cur, prev
	}
	return prev[len(b)]
}

// defaultRecordings is SPEC §7.1's example, used when an embodiment has
// frames but the config has no recordings section, and for the rules a
// recordings section leaves out.
func defaultRecordings() *RecordingsConfig {
	return &RecordingsConfig{
		Unit:       IdentityRule{Metadata: "robot", Key: "unit"},
		Embodiment: IdentityRule{Metadata: "robot", Key: "model"},
		Time:       "log_time",
	}
}

// recordings reads SPEC §7.1's recordings section.
func (l *configLoader) recordings(f cfgField, keys map[string][]string) *RecordingsConfig {
	r := defaultRecordings()
	fs := l.fields(f.key, f.line, f.val, keys["recordings"])
	if fs == nil {
		return r
	}
	if g, ok := fs["unit"]; ok {
		r.Unit = l.identityRule(g, keys["recordings.*"])
	}
	if g, ok := fs["embodiment"]; ok {
		r.Embodiment = l.identityRule(g, keys["recordings.*"])
	}
	if g, ok := fs["time"]; ok {
		r.Time, _ = l.oneOf(g, "log_time", "publish_time")
	}
	return r
}

// identityRule reads {metadata, key} or {path}: exactly one form.
func (l *configLoader) identityRule(f cfgField, allowed []string) IdentityRule {
	var r IdentityRule
	fs := l.fields(f.key, f.line, f.val, allowed)
	if fs == nil {
		return r
	}
	_, hasMeta := fs["metadata"]
	_, hasKey := fs["key"]
	p, hasPath := fs["path"]
	switch {
	case hasPath && (hasMeta || hasKey):
		l.fail(f.key, f.line, "must be either {metadata, key} or {path}, not both")
		return r
	case hasPath:
		s, ok := l.str(p, "an RE2 regular expression with a capture group")
		if !ok {
			return r
		}
		re, err := regexp.Compile(s)
		switch {
		case err != nil:
			l.fail(p.key, p.line, "not a valid RE2 regular expression: %v", err)
		case re.NumSubexp() < 1:
			l.fail(p.key, p.line, "must have a capture group (its first group is the value), got %q", s)
		default:
			r.Path = s
		}
	case hasMeta && hasKey:
		r.Metadata = l.nonEmpty(fs["metadata"], "a Metadata record name")
		r.Key = l.nonEmpty(fs["key"], "a key of that Metadata record")
	case hasMeta:
		l.fail(f.key+".key", f.line, "required with metadata: the key of the Metadata record")
	case hasKey:
		l.fail(f.key+".metadata", f.line, "required with key: the name of the Metadata record")
	default:
		l.fail(f.key, f.line, "must be {metadata, key} or {path}")
	}
	return r
}

// nonEmpty reads a non-empty string.
func (l *configLoader) nonEmpty(f cfgField, want string) string {
	s, ok := l.str(f, want)
	if ok && s == "" {
		l.fail(f.key, f.line, "must be %s, got an empty string", want)
	}
	return s
}

// duration reads a Go duration > 0.
func (l *configLoader) duration(f cfgField) (Duration, bool) {
	const want = "a Go duration > 0 such as 150ms or 2s"
	s, ok := l.str(f, want)
	if !ok {
		return 0, false
	}
	d, err := time.ParseDuration(s)
	if err != nil || d <= 0 {
		l.fail(f.key, f.line, "must be %s, got %s", want, describeNode(f.val))
		return 0, false
	}
	return Duration(d), true
}

// frames reads an embodiment's frames section (SPEC §7.3). Every camera the
// embodiment declares must have a source: SPEC §2 requires each declared
// camera on every frame, so a camera without one would drop every tick.
func (l *configLoader) frames(f cfgField, e *Embodiment, actOK bool) *FramesConfig {
	keys := configKeys()
	fr := &FramesConfig{}
	fs := l.fields(f.key, f.line, f.val, keys["frames"])
	if fs == nil {
		return fr
	}
	rate, hasRate := fs["rate"]
	clock, hasClock := fs["clock"]
	switch {
	case hasRate && hasClock:
		l.fail(clock.key, clock.line, "give either rate or clock, not both")
	case hasRate:
		if v, ok := l.number(rate, "a number > 0 (ticks per second)"); ok {
			if v <= 0 || v > maxRate {
				l.fail(rate.key, rate.line, "must be a number > 0 and <= 1e9 (ticks per second), got %s", describeNode(rate.val))
			} else {
				fr.Rate = v
			}
		}
	case hasClock:
		fr.Clock = l.nonEmpty(clock, "a topic name")
	default:
		l.missing(f.key+".rate", f.line, "required: rate (ticks per second) or clock (a topic)")
	}
	if g, ok := fs["max_age"]; ok {
		fr.MaxAge, _ = l.duration(g)
	} else {
		l.missing(f.key+".max_age", f.line, "required: the oldest value a tick may take, a Go duration > 0 such as 150ms")
	}
	if g, ok := fs["obs"]; ok {
		fr.Obs = l.frameSources(g, keys["frames.source"], fr.MaxAge, true)
		if g.val.Kind == yaml.SequenceNode && len(g.val.Content) == 0 {
			l.fail(g.key, g.line, "must list at least one source")
		}
	} else {
		l.missing(f.key+".obs", f.line, "required: the list of obs sources {topic, field}")
	}
	if g, ok := fs["act"]; ok {
		if actOK && e.Act == 0 {
			l.fail(g.key, g.line, "the embodiment has act 0 (observation only), so it takes no act sources")
		} else {
			fr.Act = l.frameSources(g, keys["frames.source"], fr.MaxAge, true)
		}
	}
	declared := make(map[string]bool, len(e.Cameras))
	for _, c := range e.Cameras {
		declared[c] = true
	}
	if g, ok := fs["cameras"]; ok {
		list, ok := l.entries(g.key, g.line, g.val, "a map of camera name to its source {topic, field}")
		if ok {
			fr.Cameras = make(map[string]FieldSource, len(list))
			for _, c := range list {
				if !declared[c.name] {
					l.fail(c.key, c.line, "camera %q is not declared in the embodiment's cameras %v", c.name, e.Cameras)
					continue
				}
				if src, ok := l.frameSource(c, keys["frames.source"], fr.MaxAge, false); ok {
					fr.Cameras[c.name] = src
				}
			}
		}
	}
	for _, c := range e.Cameras {
		if _, ok := fr.Cameras[c]; !ok {
			if g, given := fs["cameras"]; given {
				l.fail(g.key, g.line, "declared camera %q has no source (every declared camera must be on every frame)", c)
			} else {
				l.fail(f.key+".cameras", f.line, "required: a source for each declared camera, missing %q", c)
			}
			break
		}
	}
	for _, name := range []string{"events", "task", "success"} {
		g, ok := fs[name]
		if !ok {
			continue
		}
		ref := l.fieldRef(g, keys["frames.label"])
		switch name {
		case "events":
			fr.Events = ref
		case "task":
			fr.Task = ref
		case "success":
			fr.Success = ref
		}
	}
	return fr
}

// frameSources reads a list of obs or act sources.
func (l *configLoader) frameSources(f cfgField, allowed []string, maxAge Duration, linearOK bool) []FieldSource {
	if f.val.Kind != yaml.SequenceNode {
		l.fail(f.key, f.line, "must be a list of sources {topic, field}, got %s", describeNode(f.val))
		return nil
	}
	if len(f.val.Content) > maxFrameSources {
		l.fail(f.key, f.line, "must list at most %d sources, got %d", maxFrameSources, len(f.val.Content))
		return nil
	}
	out := make([]FieldSource, 0, len(f.val.Content))
	for i, n := range f.val.Content {
		n = derefNode(n)
		g := cfgField{name: strconv.Itoa(i), key: fmt.Sprintf("%s[%d]", f.key, i), line: n.Line, val: n}
		if src, ok := l.frameSource(g, allowed, maxAge, linearOK); ok {
			out = append(out, src)
		}
	}
	return out
}

// frameSource reads one {topic, field, align, max_age}; align defaults to
// hold and max_age to the section's.
func (l *configLoader) frameSource(f cfgField, allowed []string, maxAge Duration, linearOK bool) (FieldSource, bool) {
	src := FieldSource{Align: AlignHold, MaxAge: maxAge}
	fs := l.fields(f.key, f.line, f.val, allowed)
	if fs == nil {
		return src, false
	}
	ok := l.topicField(f, fs, &src.Topic, &src.Field)
	if g, given := fs["align"]; given {
		if linearOK {
			src.Align, _ = l.oneOf(g, AlignHold, AlignNext, AlignNearest, AlignLinear)
		} else if v, isStr := l.str(g, "hold, next or nearest"); isStr && v == AlignLinear {
			l.fail(g.key, g.line, "linear interpolates numbers, so it cannot align a camera; use hold, next or nearest")
		} else if isStr {
			src.Align, _ = l.oneOf(g, AlignHold, AlignNext, AlignNearest)
		}
	}
	if g, given := fs["max_age"]; given {
		src.MaxAge, _ = l.duration(g)
	}
	return src, ok
}

// fieldRef reads a label source {topic, field}.
func (l *configLoader) fieldRef(f cfgField, allowed []string) *FieldRef {
	ref := &FieldRef{}
	fs := l.fields(f.key, f.line, f.val, allowed)
	if fs == nil {
		return ref
	}
	l.topicField(f, fs, &ref.Topic, &ref.Field)
	return ref
}

// topicField reads the required topic and field keys; the field path is
// parsed here so that a bad one fails at load, naming its key.
func (l *configLoader) topicField(f cfgField, fs map[string]cfgField, topic, field *string) bool {
	ok := true
	if g, given := fs["topic"]; given {
		*topic = l.nonEmpty(g, "a topic name")
	} else {
		l.missing(f.key+".topic", f.line, "required: the topic name")
		ok = false
	}
	if g, given := fs["field"]; given {
		if s, isStr := l.str(g, "a field path such as position or pose.position[0:3]"); isStr {
			if _, err := ParseFieldPath(s); err != nil {
				l.fail(g.key, g.line, "%v", err)
				ok = false
			}
			*field = s
		}
	} else {
		l.missing(f.key+".field", f.line, "required: the field path")
		ok = false
	}
	return ok
}

// imageRoots reads source.image_roots: s3:// or file:/// prefixes, resolved
// with a trailing slash. A plain path is refused: image references come from
// the field, so the places they may name must be spelled out absolutely.
func (l *configLoader) imageRoots(f cfgField) []string {
	list, lines, ok := l.strList(f, "s3://bucket/prefix or file:///abs/dir prefixes")
	if !ok {
		return nil
	}
	out := make([]string, 0, len(list))
	for i, s := range list {
		scheme, rest, isURI := strings.Cut(s, "://")
		if !isURI || (strings.ToLower(scheme) != "s3" && strings.ToLower(scheme) != "file") {
			l.fail(f.key, lines[i], "must be an s3://bucket/prefix or file:///abs/dir prefix, got %q", s)
			continue
		}
		for _, seg := range strings.Split(rest, "/") {
			if seg == ".." || seg == "." {
				l.fail(f.key, lines[i], "must not hold . or .. segments, got %q", s)
				ok = false
				break
			}
		}
		if !ok {
			ok = true
			continue
		}
		r, err := resolveLocation(s, l.dir)
		if err != nil {
			l.fail(f.key, lines[i], "%v", err)
			continue
		}
		out = append(out, r)
	}
	return out
}

// gates reads the quality gates checked before commit.
func (l *configLoader) gates(f cfgField, allowed []string) *GatesConfig {
	g := &GatesConfig{}
	fs := l.fields(f.key, f.line, f.val, allowed)
	if fs == nil {
		return g
	}
	share := func(name string) *float64 {
		h, ok := fs[name]
		if !ok {
			return nil
		}
		v, ok := l.shareValue(h)
		if !ok {
			return nil
		}
		return &v
	}
	g.MaxDropped = share("max_dropped")
	g.MaxSourceDropped = share("max_source_dropped")
	if h, ok := fs["max_dropped_by"]; ok {
		known := gateReasons()
		list, ok := l.entries(h.key, h.line, h.val, "a map of drop reason to a share from 0 to 1")
		if ok {
			g.MaxDroppedBy = make(map[string]float64, len(list))
			for _, e := range list {
				if !slices.Contains(known, e.name) {
					if near := nearestKey(e.name, known); near != "" {
						l.fail(e.key, e.line, "unknown drop reason; did you mean %s? (known: %s)", near, strings.Join(known, ", "))
					} else {
						l.fail(e.key, e.line, "unknown drop reason (known: %s)", strings.Join(known, ", "))
					}
					continue
				}
				if v, ok := l.shareValue(e); ok {
					g.MaxDroppedBy[e.name] = v
				}
			}
		}
	}
	count := func(name string) *int {
		h, ok := fs[name]
		if !ok {
			return nil
		}
		v, ok := l.integer(h, 0, math.MaxInt32)
		if !ok {
			return nil
		}
		n := int(v)
		return &n
	}
	g.MaxSkipped = count("max_skipped")
	g.MaxIncomplete = count("max_incomplete")
	g.MinEpisodes = l.perSplit(fs, "min_episodes")
	g.MinFrames = l.perSplit(fs, "min_frames")
	if h, ok := fs["max_drift"]; ok {
		if v, ok := l.number(h, "a number > 0 (standard deviations)"); ok {
			if v <= 0 {
				l.fail(h.key, h.line, "must be a number > 0 (standard deviations), got %s", describeNode(h.val))
			} else {
				g.MaxDrift = &v
			}
		}
	}
	if h, ok := fs["baseline"]; ok {
		if s, ok := l.str(h, "a version name"); ok {
			if err := ValidVersion(s); err != nil {
				l.fail(h.key, h.line, "%v", err)
			} else {
				g.Baseline = s
			}
		}
	}
	return g
}

// shareValue reads a number from 0 to 1.
func (l *configLoader) shareValue(f cfgField) (float64, bool) {
	const want = "a share from 0 to 1"
	v, ok := l.number(f, want)
	if ok && (v < 0 || v > 1) {
		l.fail(f.key, f.line, "must be %s, got %s", want, describeNode(f.val))
		return 0, false
	}
	return v, ok
}

// perSplit reads a map of split name (train, val, test) to a count >= 0.
func (l *configLoader) perSplit(fs map[string]cfgField, name string) map[string]int64 {
	h, ok := fs[name]
	if !ok {
		return nil
	}
	splits := []string{"train", "val", "test"}
	list, ok := l.entries(h.key, h.line, h.val, "a map of split (train, val, test) to a count")
	if !ok {
		return nil
	}
	out := make(map[string]int64, len(list))
	for _, e := range list {
		if !slices.Contains(splits, e.name) {
			l.fail(e.key, e.line, "unknown split (known: train, val, test)")
			continue
		}
		if v, ok := l.integer(e, 0, math.MaxInt64); ok {
			out[e.name] = v
		}
	}
	return out
}

// gateReasons lists the drop reasons a gate may bound: every reason of
// Reasons(), and stale (SPEC §7.4) where that list does not have it yet.
func gateReasons() []string {
	rs := Reasons()
	if !slices.Contains(rs, Stale) {
		rs = append(rs, Stale)
	}
	return rs
}
