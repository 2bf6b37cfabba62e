package stages

import (
	"bytes"
	"compress/gzip"
	"context"
	"maps"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"

	"github.com/klauspost/compress/zstd"
	"github.com/parquet-go/parquet-go"
	"gopkg.in/yaml.v3"

	"hindcast/pipeline"
)

// Shared helpers of the stages tests. They run the real pipeline on a
// temporary folder, so a test states its config and its source objects and
// asserts on the manifest (SPEC §5) that comes out.

// pipelineRun is one finished test run: the manifest and where things are.
type pipelineRun struct {
	Manifest *pipeline.Manifest
	Config   *pipeline.Config
	Source   string // local folder of the source objects
	Version  string // local folder of the committed version
}

// runPipeline writes files (key relative to the source root → bytes) under a
// temporary source folder, completes cfgYAML with source.uri, work and
// output in the same temporary folder (the caller leaves those three keys
// out), runs every stage with version "v1" and returns the manifest.
func runPipeline(t *testing.T, cfgYAML string, files map[string][]byte) *pipeline.Manifest {
	t.Helper()
	return runPipelineAt(t, cfgYAML, files).Manifest
}

// runPipelineAt is runPipeline that also says where the run's folders are,
// for tests that read the committed Parquet files.
func runPipelineAt(t *testing.T, cfgYAML string, files map[string][]byte) *pipelineRun {
	t.Helper()
	dir := t.TempDir()
	r := &pipelineRun{Source: filepath.Join(dir, "src")}
	writeTree(t, r.Source, files)
	cfgPath := filepath.Join(dir, "hindcast.yaml")
	data := withLocations(t, cfgYAML, "src", "work", "out")
	if err := os.WriteFile(cfgPath, data, 0o644); err != nil {
		t.Fatalf("write config: %v", err)
	}
	cfg, err := pipeline.LoadConfig(cfgPath)
	if err != nil {
		t.Fatalf("load config:\n%s\nerror: %v", data, err)
	}
	r.Config = cfg
	m, err := pipeline.Execute(context.Background(), cfg, All(), pipeline.Options{Version: "v1", Parallel: 2})
	if err != nil {
		t.Fatalf("run pipeline: %v", err)
	}
	r.Manifest = m
	r.Version = filepath.Join(dir, "out", cfg.Dataset, "v1")
	return r
}

// writeTree writes each file under root, creating folders as needed; keys
// use "/" as the SPEC's object keys do.
func writeTree(t *testing.T, root string, files map[string][]byte) {
	t.Helper()
	if err := os.MkdirAll(root, 0o755); err != nil {
		t.Fatalf("create %s: %v", root, err)
	}
	for _, key := range slices.Sorted(maps.Keys(files)) {
		p := filepath.Join(root, filepath.FromSlash(key))
		if err := os.MkdirAll(filepath.Dir(p), 0o755); err != nil {
			t.Fatalf("create folder of %s: %v", key, err)
		}
		if err := os.WriteFile(p, files[key], 0o644); err != nil {
			t.Fatalf("write %s: %v", key, err)
		}
	}
}

// withLocations adds source.uri, work and output (plain paths, relative to
// the config file's folder, SPEC §2) to a config that has none of them. It
// edits the YAML node tree rather than the text, so a caller's source map
// (include, exclude, max_line_bytes) keeps its keys whatever its style.
func withLocations(t *testing.T, cfgYAML, src, work, out string) []byte {
	t.Helper()
	var doc yaml.Node
	if err := yaml.Unmarshal([]byte(cfgYAML), &doc); err != nil {
		t.Fatalf("test config is not YAML: %v\n%s", err, cfgYAML)
	}
	if len(doc.Content) != 1 || doc.Content[0].Kind != yaml.MappingNode {
		t.Fatalf("test config must be a YAML map:\n%s", cfgYAML)
	}
	root := doc.Content[0]
	scalar := func(v string) *yaml.Node { return &yaml.Node{Kind: yaml.ScalarNode, Tag: "!!str", Value: v} }
	var source *yaml.Node
	for i := 0; i+1 < len(root.Content); i += 2 {
		switch k := root.Content[i].Value; k {
		case "work", "output":
			t.Fatalf("test config must leave %s out: runPipeline sets it", k)
		case "source":
			source = root.Content[i+1]
		}
	}
	if source == nil {
		source = &yaml.Node{Kind: yaml.MappingNode, Tag: "!!map"}
		root.Content = append(root.Content, scalar("source"), source)
	}
	if source.Kind != yaml.MappingNode {
		t.Fatalf("test config: source must be a map")
	}
	for i := 0; i+1 < len(source.Content); i += 2 {
		if source.Content[i].Value == "uri" {
			t.Fatalf("test config must leave source.uri out: runPipeline sets it")
		}
	}
	source.Content = append(source.Content, scalar("uri"), scalar(src))
	root.Content = append(root.Content, scalar("work"), scalar(work), scalar("output"), scalar(out))
	b, err := yaml.Marshal(&doc)
	if err != nil {
		t.Fatalf("re-encode test config: %v", err)
	}
	return b
}

// sourceByKey returns the manifest entry of one source object.
func sourceByKey(t *testing.T, m *pipeline.Manifest, key string) pipeline.Source {
	t.Helper()
	for _, s := range m.Sources {
		if s.Key == key {
			return s
		}
	}
	keys := make([]string, 0, len(m.Sources))
	for _, s := range m.Sources {
		keys = append(keys, s.Key)
	}
	t.Fatalf("no source %q in the manifest (have %v)", key, keys)
	return pipeline.Source{}
}

// nonZero drops zero counts, so that "no drops of this reason" compares
// equal whether the map lists the reason with 0 or leaves it out.
func nonZero(m map[string]int64) map[string]int64 {
	out := map[string]int64{}
	for k, v := range m {
		if v != 0 {
			out[k] = v
		}
	}
	return out
}

// wantSource asserts one source's exact lines, kept and drops (every reason
// not in dropped must be 0), and the SPEC §5 identity lines = kept + Σ dropped.
func wantSource(t *testing.T, m *pipeline.Manifest, key string, lines, kept int64, dropped map[string]int64) {
	t.Helper()
	s := sourceByKey(t, m, key)
	if s.Lines != lines || s.Kept != kept {
		t.Errorf("%s: lines %d kept %d, want lines %d kept %d", key, s.Lines, s.Kept, lines, kept)
	}
	got, want := nonZero(s.Dropped), nonZero(dropped)
	if !maps.Equal(got, want) {
		t.Errorf("%s: dropped %v, want %v", key, got, want)
	}
	var sum int64
	for _, n := range s.Dropped {
		sum += n
	}
	if s.Lines != s.Kept+sum {
		t.Errorf("%s: lines %d != kept %d + Σ dropped %d (SPEC §5)", key, s.Lines, s.Kept, sum)
	}
}

// wantFunnel asserts the funnel's exact counts (every reason not in dropped
// must be 0) and the SPEC §5 identity lines = frames + Σ dropped.
func wantFunnel(t *testing.T, m *pipeline.Manifest, want pipeline.Funnel) {
	t.Helper()
	f := m.Funnel
	if f.Objects != want.Objects || f.DuplicateObjects != want.DuplicateObjects || f.Lines != want.Lines ||
		f.Frames != want.Frames || f.Episodes != want.Episodes || f.Pairs != want.Pairs {
		t.Errorf("funnel objects %d dup %d lines %d frames %d episodes %d pairs %d,\n"+
			"want   objects %d dup %d lines %d frames %d episodes %d pairs %d",
			f.Objects, f.DuplicateObjects, f.Lines, f.Frames, f.Episodes, f.Pairs,
			want.Objects, want.DuplicateObjects, want.Lines, want.Frames, want.Episodes, want.Pairs)
	}
	if got, w := nonZero(f.Dropped), nonZero(want.Dropped); !maps.Equal(got, w) {
		t.Errorf("funnel dropped %v, want %v", got, w)
	}
	var sum int64
	for _, n := range f.Dropped {
		sum += n
	}
	if f.Lines != f.Frames+sum {
		t.Errorf("funnel lines %d != frames %d + Σ dropped %d (SPEC §5)", f.Lines, f.Frames, sum)
	}
}

// jsonLines joins lines with "\n", each line ended, as a fleet logger
// writes them.
func jsonLines(lines ...string) []byte {
	if len(lines) == 0 {
		return nil
	}
	return []byte(strings.Join(lines, "\n") + "\n")
}

// gzipBytes and zstdBytes compress a whole object, as a fleet uploader does.
func gzipBytes(t *testing.T, b []byte) []byte {
	t.Helper()
	var buf bytes.Buffer
	w := gzip.NewWriter(&buf)
	if _, err := w.Write(b); err != nil {
		t.Fatal(err)
	}
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	return buf.Bytes()
}

func zstdBytes(t *testing.T, b []byte) []byte {
	t.Helper()
	enc, err := zstd.NewWriter(nil, zstd.WithEncoderConcurrency(1))
	if err != nil {
		t.Fatal(err)
	}
	defer enc.Close()
	return enc.EncodeAll(b, nil)
}

// shardFrame is one row of a committed frames table (SPEC §4), the columns
// the stages tests look at. F is the config's float type.
type shardFrame[F float32 | float64] struct {
	Episode    string  `parquet:"episode"`
	Step       int32   `parquet:"step"`
	T          int64   `parquet:"t,timestamp(nanosecond)"`
	Unit       string  `parquet:"unit"`
	Embodiment string  `parquet:"embodiment"`
	Obs        []F     `parquet:"obs,list"`
	Act        []F     `parquet:"act,optional,list"`
	Task       *string `parquet:"task,optional"`
	Success    *bool   `parquet:"success,optional"`
	Last       bool    `parquet:"last"`
	Src        string  `parquet:"src"`
	SrcLine    int64   `parquet:"src_line"`
}

// readShardFrames reads every frames file the manifest lists, in path
// order, and returns the rows sorted by (episode, step), the frames table's
// own order within a file (SPEC §4).
func readShardFrames[F float32 | float64](t *testing.T, r *pipelineRun) []shardFrame[F] {
	t.Helper()
	var rows []shardFrame[F]
	for _, f := range r.Manifest.Files {
		if f.Table != "frames" {
			continue
		}
		got, err := parquet.ReadFile[shardFrame[F]](filepath.Join(r.Version, filepath.FromSlash(f.Path)))
		if err != nil {
			t.Fatalf("read %s: %v", f.Path, err)
		}
		if int64(len(got)) != f.Rows {
			t.Fatalf("%s: %d rows, the manifest says %d", f.Path, len(got), f.Rows)
		}
		rows = append(rows, got...)
	}
	slices.SortStableFunc(rows, func(a, b shardFrame[F]) int {
		if c := strings.Compare(a.Episode, b.Episode); c != 0 {
			return c
		}
		return int(a.Step) - int(b.Step)
	})
	return rows
}
