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

	// maxDims bounds obs and act lengths. A longer vector could not fit a
	// default-sized line anyway, and the bound keeps the expansion of a scalar
	// bound (one value per dim) from allocating without limit.
	maxDims = 1_000_000
	// maxMaxLineBytes bounds source.max_line_bytes: readers size their line
	// buffer from it, so an absurd value must fail here, not at run time.
	maxMaxLineBytes = 1 << 30
	// splitSumTolerance is how far train + val + test may be from 1, so that
	// decimal fractions such as 0.7 + 0.2 + 0.1 are accepted.
	splitSumTolerance = 1e-9
)

func defaultInclude() []string {
	return []string{"**/*.jsonl", "**/*.jsonl.gz", "**/*.jsonl.zst"}
}

// configKeys lists the keys allowed in each map of the config file;
// "embodiments.*" is the map of one embodiment. The loader rejects every other
// key, and a test checks that the JSON Schema lists exactly these.
func configKeys() map[string][]string {
	return map[string][]string{
		"":              {"dataset", "source", "work", "output", "partitions", "seed", "embodiments", "episodes", "goals", "splits", "split_by", "float", "parquet", "storage", "quarantine"},
		"source":        {"uri", "include", "exclude", "max_line_bytes"},
		"embodiments.*": {"obs", "act", "obs_low", "obs_high", "act_low", "act_high", "cameras", "goal_dims", "goal_tolerance"},
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
			Include:      defaultInclude(),
			Exclude:      []string{},
			MaxLineBytes: defaultMaxLineBytes,
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
		l.fail("dataset", doc.Line, "required: the dataset name, 1-64 of a-z, 0-9 and -")
	}

	if f, ok := fs["source"]; ok {
		l.source(f, keys["source"], &c.Source)
	} else {
		l.fail("source", doc.Line, "required: a map with at least uri")
	}

	c.Work = l.locationOr(fs, "work", defaultWork, doc.Line)
	c.Output = l.locationOr(fs, "output", defaultOutput, doc.Line)

	if f, ok := fs["partitions"]; ok {
		v, _ := l.integer(f, 1, 100000)
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
		l.fail("embodiments", doc.Line, "required: a map of embodiment name to its settings (obs, goal_tolerance, ...)")
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
			v, _ := l.integer(g, 1, 10_000_000)
			c.Parquet.RowGroupRows = int(v)
		}
	}
	if f, ok := fs["storage"]; ok {
		l.storage(f, keys["storage"], &c.Storage)
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
		l.fail("source.uri", f.line, "required: s3://bucket/prefix, file:///abs/dir or a plain path")
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
		l.fail(f.key+".obs", f.line, "required: the obs length, %s", intRangeText(1, maxDims))
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
		l.fail(f.key+".goal_tolerance", f.line, "required: the largest L2 distance to the goal that counts as reached, a finite number >= 0")
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
		v, minOK = l.integer(g, 2, math.MaxInt32)
		ep.MinSteps = int(v)
	}
	if g, ok := fs["max_steps"]; ok {
		var v int64
		v, maxOK = l.integer(g, 2, math.MaxInt32)
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
			v, _ := l.integer(h, 0, math.MaxInt32)
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
// config_sha256 (SPEC §5).
func (c *Config) HashJSON() []byte {
	m := c.genericJSON()
	delete(m, "work")
	delete(m, "output")
	delete(m, "storage")
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
