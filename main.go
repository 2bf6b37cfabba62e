// Command hindcast turns fleet logs in object storage into goal-conditioned
// training shards for offline reinforcement learning. See README.md.
package main

import (
	"context"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"os"
	"os/signal"
	"path/filepath"
	"runtime"
	"runtime/debug"
	"runtime/pprof"
	"slices"
	"strconv"
	"strings"
	"syscall"

	"github.com/mattn/go-isatty"

	"hindcast/fleet"
	"hindcast/pipeline"
	"hindcast/stages"
)

// Exit codes (SPEC §6).
const (
	exitOK      = 0
	exitRuntime = 1
	exitUsage   = 2
)

// usageError is a command-line or config problem: exit code 2.
type usageError struct{ err error }

func (e usageError) Error() string { return e.err.Error() }
func (e usageError) Unwrap() error { return e.err }

// Command is a parsed command line: the command's name and its flag values.
// Parsing is kept apart from running so that cluster manifests can be checked
// against the same parser.
type Command struct {
	Name     string
	Config   string
	Version  string
	Parallel int
	Dir      string
	Frames   int
	Runs     int
	Peer     string
	Compress bool
	Profile  string
	Endpoint string
	Bucket   string
	Stage    string // for "stage": the stage to run
	Worker   int    // for "stage": this worker's index, 0-based
	Workers  int    // for "stage": how many workers share the stage
	JSON     bool
	Help     bool
	// Inspection commands: version locations (a local path or a URI), the
	// trace query, the report's output file.
	Versions []string
	Source   string
	Episode  string
	File     string
	Row      int64
	Output   string
}

type commandSpec struct {
	summary string
	flags   func(fs *flag.FlagSet, c *Command)
}

func commands() map[string]commandSpec {
	parallel := func(fs *flag.FlagSet, c *Command) {
		fs.IntVar(&c.Parallel, "parallel", runtime.NumCPU(), "work items processed at once (never changes the output)")
	}
	return map[string]commandSpec{
		"run": {"run every stage and commit a dataset version", func(fs *flag.FlagSet, c *Command) {
			fs.StringVar(&c.Config, "config", "", "config file (YAML, see configs/)")
			fs.StringVar(&c.Version, "version", "", "version to commit (default: UTC time YYYYMMDDTHHMMSSZ)")
			fs.StringVar(&c.Profile, "cpuprofile", "", "write a CPU profile (runtime/pprof) to this file")
			parallel(fs, c)
		}},
		"stage": {"run one worker's share of one stage (ingest, episodes, goals or pack)", func(fs *flag.FlagSet, c *Command) {
			fs.StringVar(&c.Config, "config", "", "config file (YAML, see configs/)")
			fs.Func("worker", "this worker's share as I/N, I from 0 (default 0/1; I may come from $JOB_COMPLETION_INDEX with --workers N)", func(v string) error {
				var i, n int
				if _, err := fmt.Sscanf(v, "%d/%d", &i, &n); err != nil || n < 1 || i < 0 || i >= n {
					return fmt.Errorf("want I/N with 0 <= I < N, got %q", v)
				}
				c.Worker, c.Workers = i, n
				return nil
			})
			fs.Func("workers", "how many workers share the stage; this one's index is $JOB_COMPLETION_INDEX", func(v string) error {
				var n int
				if _, err := fmt.Sscanf(v, "%d", &n); err != nil || n < 1 {
					return fmt.Errorf("want a count >= 1, got %q", v)
				}
				c.Workers, c.Worker = n, -1
				return nil
			})
			parallel(fs, c)
		}},
		"commit": {"publish a version from the sealed outputs of every stage, manifest last", func(fs *flag.FlagSet, c *Command) {
			fs.StringVar(&c.Config, "config", "", "config file (YAML, see configs/)")
			fs.StringVar(&c.Version, "version", "", "version to commit (default: UTC time YYYYMMDDTHHMMSSZ)")
		}},
		"plan": {"show what a run would do (objects new and cached, partitions to recompute, bytes to read); writes nothing", func(fs *flag.FlagSet, c *Command) {
			fs.StringVar(&c.Config, "config", "", "config file (YAML, see configs/)")
			fs.BoolVar(&c.JSON, "json", false, "print the plan as JSON")
		}},
		"show": {"summarise a version: sources, funnel with every drop reason, episodes and pairs, episode lengths, files", func(fs *flag.FlagSet, c *Command) {
			fs.BoolVar(&c.JSON, "json", false, "print the answer as JSON")
		}},
		"trace": {"lineage both ways: a source to the files, episodes and rows holding its frames; an episode or a file row back to its sources and lines", func(fs *flag.FlagSet, c *Command) {
			fs.StringVar(&c.Source, "source", "", "a source object: key relative to the source root, or its full URI")
			fs.StringVar(&c.Episode, "episode", "", "an episode id")
			fs.StringVar(&c.File, "file", "", "a file of the version, relative to its folder (with --row)")
			fs.Int64Var(&c.Row, "row", -1, "a 0-based row of --file")
			fs.BoolVar(&c.JSON, "json", false, "print the answer as JSON")
		}},
		"verify": {"recompute every file's SHA-256 and rows, check the funnel and that the folder holds exactly the manifest's files", func(fs *flag.FlagSet, c *Command) {
			fs.BoolVar(&c.JSON, "json", false, "print the answer as JSON")
		}},
		"diff": {"what changed between two versions: config keys, sources, drop counts, episodes and pairs per split, files", func(fs *flag.FlagSet, c *Command) {
			fs.BoolVar(&c.JSON, "json", false, "print the answer as JSON")
		}},
		"report": {"write one self-contained HTML file with plots of a version", func(fs *flag.FlagSet, c *Command) {
			fs.StringVar(&c.Output, "o", "report.html", "the HTML file to write")
		}},
		"demo": {"write an invented fleet's logs to a folder and run the pipeline on them", func(fs *flag.FlagSet, c *Command) {
			fs.StringVar(&c.Dir, "dir", ".hindcast/demo", "folder for the demo fleet, work area and datasets")
			parallel(fs, c)
		}},
		"bench": {"generate a fault-free fleet and time whole runs (optionally beside the peer job)", func(fs *flag.FlagSet, c *Command) {
			fs.StringVar(&c.Dir, "dir", ".hindcast/bench", "folder for the benchmark fleet and its outputs")
			fs.IntVar(&c.Frames, "frames", 1000000, "frames in the benchmark fleet")
			fs.IntVar(&c.Runs, "runs", 3, "timed runs (the median is reported)")
			fs.StringVar(&c.Peer, "peer", "", "peer job binary to time on the same files, alternating with hindcast")
			fs.BoolVar(&c.Compress, "zst", false, "write the fleet as .jsonl.zst objects")
			fs.StringVar(&c.Endpoint, "s3-endpoint", "", "also time runs reading the fleet from this S3-compatible endpoint (credentials from the AWS environment)")
			fs.StringVar(&c.Bucket, "s3-bucket", "hindcast-bench", "bucket the fleet is uploaded to, under logs/, with --s3-endpoint")
			parallel(fs, c)
		}},
	}
}

const topUsage = `hindcast turns fleet logs into goal-conditioned training shards.

Usage:
  hindcast run --config FILE [--version V] [--parallel N]
  hindcast stage NAME --config FILE [--worker I/N | --workers N]
  hindcast commit --config FILE [--version V]
  hindcast plan --config FILE [--json]
  hindcast show VERSION [--json]
  hindcast trace VERSION (--source KEY | --episode ID | --file PATH --row N) [--json]
  hindcast verify VERSION [--json]
  hindcast diff A B [--json]
  hindcast report VERSION [-o report.html]
  hindcast demo [--dir DIR]
  hindcast bench [--frames N] [--runs K] [--peer BIN]

Run "hindcast COMMAND --help" for a command's flags.
Exit codes: 0 success, 1 runtime failure, 2 usage or config error.
`

// ParseCommand parses a hindcast command line (without the program name).
func ParseCommand(args []string, stderr io.Writer) (*Command, error) {
	if len(args) == 0 {
		return nil, usageError{errors.New("no command given")}
	}
	if args[0] == "-h" || args[0] == "--help" || args[0] == "help" {
		return &Command{Name: "help", Help: true}, nil
	}
	spec, ok := commands()[args[0]]
	if !ok {
		return nil, usageError{fmt.Errorf("unknown command %q", args[0])}
	}
	c := &Command{Name: args[0], Workers: 1, Parallel: 1}
	fs := flag.NewFlagSet("hindcast "+args[0], flag.ContinueOnError)
	fs.SetOutput(stderr)
	spec.flags(fs, c)
	rest := args[1:]
	if c.Name == "stage" && len(rest) > 0 && !strings.HasPrefix(rest[0], "-") {
		c.Stage, rest = rest[0], rest[1:]
	}
	// Inspection commands take their versions first: `hindcast show V --json`.
	wantVersions := map[string]int{"show": 1, "trace": 1, "verify": 1, "diff": 2, "report": 1}[c.Name]
	for len(c.Versions) < wantVersions && len(rest) > 0 && !strings.HasPrefix(rest[0], "-") {
		c.Versions, rest = append(c.Versions, rest[0]), rest[1:]
	}
	fs.Usage = func() {
		fmt.Fprintf(stderr, "hindcast %s: %s\n\nFlags:\n", args[0], spec.summary)
		fs.PrintDefaults()
	}
	if err := fs.Parse(rest); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			c.Help = true
			return c, nil
		}
		return nil, usageError{err}
	}
	for len(c.Versions) < wantVersions && fs.NArg() > 0 {
		c.Versions = append(c.Versions, fs.Arg(0))
		fs.Parse(fs.Args()[1:])
	}
	if len(c.Versions) < wantVersions {
		return nil, usageError{fmt.Errorf("%s: want %d version location(s) (a folder or an s3:// URI)", c.Name, wantVersions)}
	}
	if c.Name == "trace" {
		n := 0
		for _, set := range []bool{c.Source != "", c.Episode != "", c.File != ""} {
			if set {
				n++
			}
		}
		if n != 1 || (c.File != "") != (c.Row >= 0) {
			return nil, usageError{errors.New("trace: give one of --source KEY, --episode ID, or --file PATH --row N")}
		}
	}
	if fs.NArg() > 0 {
		return nil, usageError{fmt.Errorf("%s: unexpected argument %q", c.Name, fs.Arg(0))}
	}
	switch c.Name {
	case "run", "stage", "commit", "plan":
		if c.Config == "" {
			return nil, usageError{fmt.Errorf("%s: --config is required", c.Name)}
		}
	}
	if c.Name == "stage" {
		if !slices.Contains(stageNames(), c.Stage) {
			return nil, usageError{fmt.Errorf("stage: want a stage name (%s) before the flags, got %q", strings.Join(stageNames(), ", "), c.Stage)}
		}
	}
	if c.Parallel < 1 && c.Name != "commit" && c.Name != "plan" {
		return nil, usageError{fmt.Errorf("%s: --parallel must be at least 1", c.Name)}
	}
	return c, nil
}

func main() {
	tuneGC()
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	code := Main(ctx, os.Args[1:], os.Stdout, os.Stderr)
	stop()
	os.Exit(code)
}

// Main runs one command line and returns its exit code.
func Main(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	c, err := ParseCommand(args, stderr)
	if err != nil {
		fmt.Fprintf(stderr, "hindcast: %v\n\n%s", err, topUsage)
		return exitUsage
	}
	if c.Help {
		if c.Name == "help" {
			fmt.Fprint(stdout, topUsage)
		}
		return exitOK
	}
	ui := newUI(stderr)
	switch c.Name {
	case "run":
		err = runCommand(ctx, c, stdout, ui)
	case "stage":
		err = stageCommand(ctx, c, stdout, ui)
	case "commit":
		err = commitCommand(ctx, c, stdout, ui)
	case "plan":
		err = planCommand(ctx, c, stdout, ui)
	case "show", "trace", "verify", "diff", "report":
		err = inspectCommand(ctx, c, stdout)
	case "demo":
		err = demoCommand(ctx, c, stdout, ui)
	case "bench":
		err = benchCommand(ctx, c, stdout, ui)
	}
	if err == nil {
		return exitOK
	}
	fmt.Fprintf(stderr, "hindcast %s: %v\n", c.Name, err)
	var ue usageError
	var ce *pipeline.ConfigError
	if errors.As(err, &ue) || errors.As(err, &ce) {
		return exitUsage
	}
	return exitRuntime
}

func toolInfo() pipeline.ToolInfo {
	t := pipeline.ToolInfo{Version: pipeline.ToolVersion, Commit: "unknown"}
	if bi, ok := debug.ReadBuildInfo(); ok {
		for _, s := range bi.Settings {
			if s.Key == "vcs.revision" && s.Value != "" {
				t.Commit = s.Value
			}
		}
	}
	return t
}

// runConfig loads the config and runs the pipeline on it.
func runConfig(ctx context.Context, path, version string, parallel int, stdout io.Writer, ui *ui) (*pipeline.Manifest, error) {
	cfg, err := pipeline.LoadConfig(path)
	if err != nil {
		return nil, err
	}
	if version != "" {
		if err := pipeline.ValidVersion(version); err != nil {
			return nil, usageError{err}
		}
	}
	ui.log.Info("run", "config", path, "dataset", cfg.Dataset, "source", cfg.Source.URI, "parallel", parallel)
	metrics := &pipeline.Metrics{}
	m, err := pipeline.Execute(ctx, cfg, stages.All(), pipeline.Options{
		Version: version, Parallel: parallel, Log: ui.log, Progress: ui.progress(), Tool: toolInfo(), Metrics: metrics,
		Code: pipeline.CodeID(),
	})
	if r := metrics.Retries.Load(); err != nil && r > 0 {
		fmt.Fprintf(ui.w, "storage: %d requests retried before the failure\n", r)
	}
	if err != nil {
		return nil, err
	}
	printSummary(stdout, m, pipeline.JoinURI(cfg.Output, pipeline.VersionPrefix(m.Dataset, m.Version)))
	fmt.Fprintf(stdout, "storage   %d requests, %d retries, %.1f MB read, %.1f MB written\n",
		metrics.Requests.Load(), metrics.Retries.Load(), float64(metrics.BytesRead.Load())/1e6, float64(metrics.BytesWritten.Load())/1e6)
	return m, nil
}

func runCommand(ctx context.Context, c *Command, stdout io.Writer, ui *ui) error {
	if c.Profile != "" {
		f, err := os.Create(c.Profile)
		if err != nil {
			return err
		}
		defer f.Close()
		if err := pprof.StartCPUProfile(f); err != nil {
			return err
		}
		defer pprof.StopCPUProfile()
	}
	_, err := runConfig(ctx, c.Config, c.Version, c.Parallel, stdout, ui)
	return err
}

func demoCommand(ctx context.Context, c *Command, stdout io.Writer, ui *ui) error {
	dir, err := filepath.Abs(c.Dir)
	if err != nil {
		return err
	}
	if err := fleet.Demo(dir); err != nil {
		return fmt.Errorf("write demo fleet in %s: %w", dir, err)
	}
	fmt.Fprintf(stdout, "demo fleet of Larkspur Depot written to %s\n", filepath.Join(dir, "logs"))
	_, err = runConfig(ctx, filepath.Join(dir, "hindcast.yaml"), "", c.Parallel, stdout, ui)
	return err
}

// newLogger logs JSON lines (log/slog) for machines, or nothing on a terminal
// where the progress lines speak instead.
func newLogger(w io.Writer, tty bool) *slog.Logger {
	if tty {
		return slog.New(slog.DiscardHandler)
	}
	return slog.New(slog.NewJSONHandler(w, nil))
}

func isTTY(w io.Writer) bool {
	f, ok := w.(*os.File)
	return ok && (isatty.IsTerminal(f.Fd()) || isatty.IsCygwinTerminal(f.Fd()))
}

func stageNames() []string {
	var names []string
	for _, st := range stages.All() {
		names = append(names, st.Name())
	}
	return names
}

// jobOptions are the settings every command passes to the pipeline.
func jobOptions(c *Command, ui *ui, metrics *pipeline.Metrics) pipeline.Options {
	return pipeline.Options{Version: c.Version, Parallel: c.Parallel, Log: ui.log, Progress: ui.progress(),
		Tool: toolInfo(), Metrics: metrics, Code: pipeline.CodeID()}
}

func stageCommand(ctx context.Context, c *Command, stdout io.Writer, ui *ui) error {
	cfg, err := pipeline.LoadConfig(c.Config)
	if err != nil {
		return err
	}
	worker := c.Worker
	if worker < 0 {
		idx := os.Getenv("JOB_COMPLETION_INDEX")
		i, err := strconv.Atoi(idx)
		if err != nil || i < 0 || i >= c.Workers {
			return usageError{fmt.Errorf("stage: --workers %d needs JOB_COMPLETION_INDEX in 0…%d, got %q", c.Workers, c.Workers-1, idx)}
		}
		worker = i
	}
	metrics := &pipeline.Metrics{}
	r, err := pipeline.RunWorker(ctx, cfg, stages.All(), c.Stage, worker, c.Workers, jobOptions(c, ui, metrics))
	if err != nil {
		return err
	}
	fmt.Fprintf(stdout, "stage %s worker %d/%d: %d items, %d reused, %.2fs; storage %d requests, %d retries\n",
		r.Name, worker, c.Workers, r.Items, r.Reused, r.Seconds, metrics.Requests.Load(), metrics.Retries.Load())
	return nil
}

func commitCommand(ctx context.Context, c *Command, stdout io.Writer, ui *ui) error {
	cfg, err := pipeline.LoadConfig(c.Config)
	if err != nil {
		return err
	}
	if c.Version != "" {
		if err := pipeline.ValidVersion(c.Version); err != nil {
			return usageError{err}
		}
	}
	metrics := &pipeline.Metrics{}
	m, err := pipeline.CommitVersion(ctx, cfg, stages.All(), jobOptions(c, ui, metrics))
	if err != nil {
		return err
	}
	printSummary(stdout, m, pipeline.JoinURI(cfg.Output, pipeline.VersionPrefix(m.Dataset, m.Version)))
	return nil
}

func planCommand(ctx context.Context, c *Command, stdout io.Writer, ui *ui) error {
	cfg, err := pipeline.LoadConfig(c.Config)
	if err != nil {
		return err
	}
	plans, err := pipeline.Plan(ctx, cfg, stages.All(), jobOptions(c, ui, &pipeline.Metrics{}))
	if err != nil {
		return err
	}
	if c.JSON {
		enc := json.NewEncoder(stdout)
		enc.SetIndent("", "  ")
		return enc.Encode(map[string]any{"config": c.Config, "stages": plans})
	}
	for _, p := range plans {
		unit := "partitions"
		if p.Name == pipeline.StageIngest {
			unit = "objects"
		}
		if !p.Known {
			fmt.Fprintf(stdout, "%-8s not known until the stage before it has run\n", p.Name)
			continue
		}
		fmt.Fprintf(stdout, "%-8s %d %s: %d cached, %d to compute", p.Name, p.Items, unit, p.Cached, len(p.ToRun))
		if p.Name == pipeline.StageIngest {
			fmt.Fprintf(stdout, ", %.1f MB to read", float64(p.Bytes)/1e6)
		}
		fmt.Fprintln(stdout)
		for i, id := range p.ToRun {
			if i == 10 {
				fmt.Fprintf(stdout, "         … and %d more\n", len(p.ToRun)-10)
				break
			}
			fmt.Fprintf(stdout, "         %s\n", id)
		}
	}
	return nil
}

// tuneGC trades memory the pipeline does not use for less collector work:
// a batch run holds little live data (bounded buffers) but allocates a lot,
// so the default GOGC=100 collects far more often than needed. A soft memory
// limit keeps the heap bounded whatever the percentage (common practice for
// batch jobs). GOGC and GOMEMLIMIT in the environment win.
func tuneGC() {
	if os.Getenv("GOGC") == "" {
		debug.SetGCPercent(400)
	}
	if os.Getenv("GOMEMLIMIT") == "" {
		debug.SetMemoryLimit(512 << 20)
	}
}
