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
	"hindcast/inspect"
	"hindcast/pipeline"
	"hindcast/stages"
)

// Exit codes (SPEC §6). A run ended by SIGINT or SIGTERM exits 128 plus the
// signal's number (130, 143), as a shell reports a process a signal ended
// (common practice), so that a scheduler can tell "stopped" from "broke".
const (
	exitOK       = 0
	exitRuntime  = 1
	exitUsage    = 2
	exitGate     = 3 // a quality gate failed: the data is bad, nothing was committed
	exitInternal = 4 // a bug (a panic): retrying will not help; report it
	exitSignal   = 128
)

// Kinds of failure, as the final log record names them (field "kind").
const (
	kindUsage       = "usage"       // a bad command line: exit 2
	kindConfig      = "config"      // a bad config: exit 2
	kindGate        = "gate"        // a quality gate failed: exit 3
	kindInput       = "input"       // a source object that cannot be read as one: exit 1
	kindRuntime     = "runtime"     // storage, an existing version, anything else: exit 1
	kindInternal    = "internal"    // a panic: exit 4
	kindInterrupted = "interrupted" // SIGINT or SIGTERM: exit 130 or 143
)

// usageError is a command-line or config problem: exit code 2. When
// ParseCommand returns one, cmd names the command whose usage follows the
// message ("" for the top-level usage: no command was recognised).
type usageError struct {
	err error
	cmd string
}

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
	// Recordings: for "demo", add the MCAP recordings (SPEC §7); for
	// "bench", time a recording fleet of RecordingMB megabytes instead.
	Recordings  bool
	RecordingMB int
	Profile     string
	Endpoint    string
	Bucket      string
	Stage       string // for "stage": the stage to run
	Worker      int    // for "stage": this worker's index, 0-based
	Workers     int    // for "stage": how many workers share the stage
	JSON        bool
	Help        bool
	// Inspection commands: version locations (a local path or a URI), the
	// trace query, the report's output file.
	Versions []string
	Source   string
	Episode  string
	File     string
	Row      int64
	Output   string
	// Gates are run's and commit's overrides of the quality gates.
	Gates pipeline.GateOptions
}

type commandSpec struct {
	synopsis string // the usage line, without "hindcast "
	summary  string
	flags    func(fs *flag.FlagSet, c *Command)
}

// commandOrder is the order of the commands in the top-level usage: the
// pipeline first, then inspection, then the tools.
var commandOrder = []string{"run", "stage", "commit", "plan", "show", "trace", "verify", "diff", "report", "demo", "bench", "version"}

func commands() map[string]commandSpec {
	gates := func(fs *flag.FlagSet, c *Command) {
		fs.Func("waive", "publish even when this quality `gate` fails (repeatable; recorded as waived)", func(v string) error {
			c.Gates.Waive = append(c.Gates.Waive, v)
			return nil
		})
		fs.StringVar(&c.Gates.Baseline, "baseline", "", "version the drift gate compares with (default: gates.baseline, else the latest version)")
	}
	parallel := func(fs *flag.FlagSet, c *Command) {
		fs.IntVar(&c.Parallel, "parallel", runtime.NumCPU(), "work items processed at once (never changes the output)")
	}
	return map[string]commandSpec{
		"run": {"run --config FILE [--version V] [--parallel N]", "run every stage and commit a dataset version", func(fs *flag.FlagSet, c *Command) {
			fs.StringVar(&c.Config, "config", "", "config file (YAML, see configs/)")
			fs.StringVar(&c.Version, "version", "", "version to commit (default: UTC time YYYYMMDDTHHMMSSZ)")
			fs.StringVar(&c.Profile, "cpuprofile", "", "write a CPU profile (runtime/pprof) to this file")
			parallel(fs, c)
			gates(fs, c)
		}},
		"stage": {"stage NAME --config FILE [--worker I/N | --workers N]", "run one worker's share of one stage (ingest, episodes, goals or pack)", func(fs *flag.FlagSet, c *Command) {
			fs.StringVar(&c.Config, "config", "", "config file (YAML, see configs/)")
			fs.Func("worker", "this worker's share as `I/N`, I from 0 (default 0/1; I may come from $JOB_COMPLETION_INDEX with --workers N)", func(v string) error {
				var i, n int
				if _, err := fmt.Sscanf(v, "%d/%d", &i, &n); err != nil || n < 1 || i < 0 || i >= n {
					return fmt.Errorf("want I/N with 0 <= I < N, got %q", v)
				}
				c.Worker, c.Workers = i, n
				return nil
			})
			fs.Func("workers", "how many workers (`N`) share the stage; this one's index is $JOB_COMPLETION_INDEX", func(v string) error {
				var n int
				if _, err := fmt.Sscanf(v, "%d", &n); err != nil || n < 1 {
					return fmt.Errorf("want a count >= 1, got %q", v)
				}
				c.Workers, c.Worker = n, -1
				return nil
			})
			parallel(fs, c)
		}},
		"commit": {"commit --config FILE [--version V]", "publish a version from the sealed outputs of every stage, manifest last", func(fs *flag.FlagSet, c *Command) {
			fs.StringVar(&c.Config, "config", "", "config file (YAML, see configs/)")
			fs.StringVar(&c.Version, "version", "", "version to commit (default: UTC time YYYYMMDDTHHMMSSZ)")
			gates(fs, c)
		}},
		"plan": {"plan --config FILE [--json]", "show what a run would do (objects new and cached, partitions to recompute, bytes to read); writes nothing", func(fs *flag.FlagSet, c *Command) {
			fs.StringVar(&c.Config, "config", "", "config file (YAML, see configs/)")
			fs.BoolVar(&c.JSON, "json", false, "print the plan as JSON")
		}},
		"show": {"show VERSION [--json]", "summarise a version: sources, funnel with every drop reason, episodes and pairs, episode lengths, files", func(fs *flag.FlagSet, c *Command) {
			fs.BoolVar(&c.JSON, "json", false, "print the answer as JSON")
		}},
		"trace": {"trace VERSION (--source KEY | --episode ID | --file PATH --row N) [--json]", "lineage both ways: a source to the files, episodes and rows holding its frames; an episode or a file row back to its sources and lines", func(fs *flag.FlagSet, c *Command) {
			fs.StringVar(&c.Source, "source", "", "a source object: key relative to the source root, or its full URI")
			fs.StringVar(&c.Episode, "episode", "", "an episode id")
			fs.StringVar(&c.File, "file", "", "a file of the version, relative to its folder (with --row)")
			fs.Int64Var(&c.Row, "row", -1, "a 0-based row of --file")
			fs.BoolVar(&c.JSON, "json", false, "print the answer as JSON")
		}},
		"verify": {"verify VERSION [--json]", "recompute every file's SHA-256 and rows, check the funnel and that the folder holds exactly the manifest's files", func(fs *flag.FlagSet, c *Command) {
			fs.BoolVar(&c.JSON, "json", false, "print the answer as JSON")
		}},
		"diff": {"diff A B [--json]", "what changed between two versions: config keys, sources, drop counts, episodes and pairs per split, files", func(fs *flag.FlagSet, c *Command) {
			fs.BoolVar(&c.JSON, "json", false, "print the answer as JSON")
		}},
		"report": {"report VERSION [-o report.html]", "write one self-contained HTML file with plots of a version", func(fs *flag.FlagSet, c *Command) {
			fs.StringVar(&c.Output, "o", "report.html", "the HTML file to write")
		}},
		"demo": {"demo [--dir DIR] [--recordings=false]", "write an invented fleet's logs to a folder and run the pipeline on them", func(fs *flag.FlagSet, c *Command) {
			fs.StringVar(&c.Dir, "dir", ".hindcast/demo", "folder for the demo fleet, work area and datasets")
			fs.BoolVar(&c.Recordings, "recordings", true, "also write MCAP recordings of both embodiments and read them (false: JSON Lines logs only)")
			parallel(fs, c)
		}},
		"bench": {"bench [--frames N] [--runs K] [--peer BIN] [--s3-endpoint URL] [--recordings [--recording-mb M]]", "generate a fault-free fleet and time whole runs (optionally beside the peer job)", func(fs *flag.FlagSet, c *Command) {
			fs.StringVar(&c.Dir, "dir", ".hindcast/bench", "folder for the benchmark fleet and its outputs")
			fs.IntVar(&c.Frames, "frames", 1000000, "frames in the benchmark fleet")
			fs.IntVar(&c.Runs, "runs", 3, "timed runs (the median is reported)")
			fs.StringVar(&c.Peer, "peer", "", "peer job binary to time on the same files, alternating with hindcast")
			fs.BoolVar(&c.Compress, "zst", false, "write the fleet as .jsonl.zst objects")
			fs.StringVar(&c.Endpoint, "s3-endpoint", "", "also time runs reading the fleet from this S3-compatible endpoint (credentials from the AWS environment)")
			fs.StringVar(&c.Bucket, "s3-bucket", "hindcast-bench", "bucket the fleet is uploaded to, under logs/, with --s3-endpoint")
			fs.BoolVar(&c.Recordings, "recordings", false, "time a fault-free fleet of MCAP recordings instead (see --recording-mb)")
			fs.IntVar(&c.RecordingMB, "recording-mb", 1000, "megabytes of recordings with --recordings")
			parallel(fs, c)
		}},
		"version": {"version", "print hindcast's release, commit and Go version", func(fs *flag.FlagSet, c *Command) {}},
	}
}

// topUsage is the help of hindcast as a whole, built from commandOrder so
// that it cannot drift from the commands' own usage lines.
func topUsage() string {
	var b strings.Builder
	b.WriteString("hindcast turns fleet logs into goal-conditioned training shards.\n\nUsage:\n")
	cmds := commands()
	for _, name := range commandOrder {
		fmt.Fprintf(&b, "  hindcast %s\n", cmds[name].synopsis)
	}
	b.WriteString("\nRun \"hindcast COMMAND --help\" for a command's flags.\n" +
		"Exit codes: 0 success, 1 runtime failure, 2 usage or config error, 3 a quality gate failed (nothing committed),\n" +
		"4 internal error (a bug), 130 or 143 interrupted by SIGINT or SIGTERM.\n")
	return b.String()
}

// writeCommandUsage writes one command's usage line and flags; with
// summary, it starts with what the command does (its --help), without it
// the usage follows an error message that already names the command.
func writeCommandUsage(w io.Writer, name string, summary bool) {
	spec := commands()[name]
	if summary {
		fmt.Fprintf(w, "hindcast %s: %s\n\n", name, spec.summary)
	}
	fmt.Fprintf(w, "Usage:\n  hindcast %s\n\nFlags:\n", spec.synopsis)
	fs := flag.NewFlagSet("hindcast "+name, flag.ContinueOnError)
	fs.SetOutput(w)
	spec.flags(fs, &Command{})
	printFlags(w, fs)
}

// printFlags lists a command's flags with two dashes, as README and every
// example write them (the flag package accepts both, but its own
// PrintDefaults shows one). Defaults are shown unless they are the zero value.
func printFlags(w io.Writer, fs *flag.FlagSet) {
	n := 0
	fs.VisitAll(func(f *flag.Flag) {
		n++
		name, usage := flag.UnquoteUsage(f)
		dash := "--"
		if len(f.Name) == 1 {
			dash = "-" // a one-letter flag keeps one dash, as in -o
		}
		line := "  " + dash + f.Name
		if name != "" {
			line += " " + name
		}
		line += "\n    \t" + strings.ReplaceAll(usage, "\n", "\n    \t")
		if d := f.DefValue; d != "" && d != "0" && d != "false" && d != "-1" {
			if name == "string" {
				d = strconv.Quote(d)
			}
			line += fmt.Sprintf(" (default %s)", d)
		}
		fmt.Fprintln(w, line)
	})
	if n == 0 {
		fmt.Fprintln(w, "  (none)")
	}
}

// ParseCommand parses a hindcast command line (without the program name).
// It writes nothing: every problem comes back as a usageError, which Main
// prints once with the command's usage. stderr is unused and kept so that
// callers need not change.
func ParseCommand(args []string, stderr io.Writer) (*Command, error) {
	if len(args) == 0 {
		return nil, usageError{err: errors.New("no command given")}
	}
	cmds := commands()
	if args[0] == "-h" || args[0] == "--help" || args[0] == "-help" || args[0] == "help" {
		switch len(args) {
		case 1:
			return &Command{Name: "help", Help: true}, nil
		case 2:
			// `hindcast help run` is `hindcast run --help`.
			if _, ok := cmds[args[1]]; !ok {
				return nil, usageError{err: fmt.Errorf("help: unknown command %q", args[1])}
			}
			return &Command{Name: args[1], Help: true}, nil
		}
		return nil, usageError{err: fmt.Errorf("help: want at most one command name, got %q", args[1:])}
	}
	spec, ok := cmds[args[0]]
	if !ok {
		return nil, usageError{err: fmt.Errorf("unknown command %q", args[0])}
	}
	c := &Command{Name: args[0], Workers: 1, Parallel: 1}
	fail := func(format string, a ...any) (*Command, error) {
		return nil, usageError{err: fmt.Errorf(format, a...), cmd: c.Name}
	}
	fs := flag.NewFlagSet("hindcast "+args[0], flag.ContinueOnError)
	// The flag package would print the error and the flags itself, and Main
	// prints them again; keep it quiet and let Main speak once.
	fs.SetOutput(io.Discard)
	fs.Usage = func() {}
	spec.flags(fs, c)
	rest := args[1:]
	if c.Name == "stage" && len(rest) > 0 && !strings.HasPrefix(rest[0], "-") {
		c.Stage, rest = rest[0], rest[1:]
	}
	// Inspection commands take their versions as arguments, before or
	// between the flags: `hindcast show V --json`, `hindcast diff A --json B`.
	// Parse stops at each argument, which is taken and parsing resumed.
	wantVersions := map[string]int{"show": 1, "trace": 1, "verify": 1, "diff": 2, "report": 1}[c.Name]
	err := fs.Parse(rest)
	for err == nil && len(c.Versions) < wantVersions && fs.NArg() > 0 {
		c.Versions = append(c.Versions, fs.Arg(0))
		err = fs.Parse(fs.Args()[1:])
	}
	if errors.Is(err, flag.ErrHelp) {
		c.Help = true
		return c, nil
	}
	if err != nil {
		return nil, usageError{err: err, cmd: c.Name}
	}
	if len(c.Versions) < wantVersions {
		return fail("want %s (a folder or an s3:// URI)", countOf(wantVersions, "version location", "version locations"))
	}
	if c.Name == "trace" {
		n := 0
		for _, set := range []bool{c.Source != "", c.Episode != "", c.File != ""} {
			if set {
				n++
			}
		}
		if n != 1 || (c.File != "") != (c.Row >= 0) {
			return fail("give one of --source KEY, --episode ID, or --file PATH --row N")
		}
	}
	if c.Name == "stage" && c.Stage == "" && fs.NArg() > 0 {
		return fail("the stage name must come first: hindcast stage NAME --config FILE ... (got %q after the flags)", fs.Arg(0))
	}
	if fs.NArg() > 0 {
		return fail("unexpected argument %q", fs.Arg(0))
	}
	switch c.Name {
	case "run", "stage", "commit", "plan":
		if c.Config == "" {
			return fail("--config is required")
		}
	}
	if c.Version != "" {
		if err := pipeline.ValidVersion(c.Version); err != nil {
			return nil, usageError{err: err, cmd: c.Name}
		}
	}
	if c.Name == "stage" {
		if !slices.Contains(stageNames(), c.Stage) {
			return fail("want a stage name (%s) before the flags, got %q", strings.Join(stageNames(), ", "), c.Stage)
		}
	}
	if c.Parallel < 1 && c.Name != "commit" && c.Name != "plan" {
		return fail("--parallel must be at least 1, got %d", c.Parallel)
	}
	if c.Name == "bench" {
		// Zero runs leave no time to take the median of, and zero frames no
		// fleet to run on.
		if c.Runs < 1 {
			return fail("--runs must be at least 1, got %d", c.Runs)
		}
		if c.Frames < 1 {
			return fail("--frames must be at least 1, got %d", c.Frames)
		}
		if c.RecordingMB < 1 {
			return fail("--recording-mb must be at least 1, got %d", c.RecordingMB)
		}
	}
	return c, nil
}

func main() {
	tuneGC()
	ctx, stop := notifyInterrupt(context.Background())
	code := Main(ctx, os.Args[1:], os.Stdout, os.Stderr)
	stop()
	os.Exit(code)
}

// interruptedError is the cause of a run's context when SIGINT or SIGTERM
// ended it. It is a context.Canceled, as any cancellation.
type interruptedError struct{ sig syscall.Signal }

func (e interruptedError) Error() string {
	return fmt.Sprintf("interrupted by signal %d (%v)", int(e.sig), e.sig)
}
func (e interruptedError) Is(target error) bool { return target == context.Canceled }

// notifyInterrupt returns a context cancelled, with an interruptedError as
// its cause, by the first SIGINT or SIGTERM. The signals' default action
// comes back then, so a second one ends the process at once.
func notifyInterrupt(parent context.Context) (context.Context, func()) {
	ctx, cancel := context.WithCancelCause(parent)
	ch := make(chan os.Signal, 1)
	signal.Notify(ch, syscall.SIGINT, syscall.SIGTERM)
	go func() {
		select {
		case s := <-ch:
			signal.Stop(ch)
			sig, _ := s.(syscall.Signal)
			cancel(interruptedError{sig: sig})
		case <-ctx.Done():
		}
	}()
	return ctx, func() { signal.Stop(ch); cancel(nil) }
}

// Main runs one command line and returns its exit code. Every error exit
// ends with one structured log record (see failed); a panic in the command
// becomes an "internal" record and exit code 4, never Go's exit code 2 of a
// crash, which a scheduler would take for a config error.
func Main(ctx context.Context, args []string, stdout, stderr io.Writer) (code int) {
	ui := newUI(stderr)
	name := ""
	defer func() {
		if r := recover(); r != nil {
			err := fmt.Errorf("%w: %v\n%s", pipeline.ErrInternal, r, debug.Stack())
			fmt.Fprintf(stderr, "hindcast %s: %v\n", name, err)
			code = failed(ui, name, kindInternal, exitInternal, err)
		}
	}()
	c, err := ParseCommand(args, stderr)
	if err != nil {
		var ue usageError
		if errors.As(err, &ue) && ue.cmd != "" {
			fmt.Fprintf(stderr, "hindcast %s: %v\n\n", ue.cmd, err)
			writeCommandUsage(stderr, ue.cmd, false)
		} else {
			fmt.Fprintf(stderr, "hindcast: %v\n\n%s", err, topUsage())
		}
		return failed(ui, ue.cmd, kindUsage, exitUsage, err)
	}
	name = c.Name
	if c.Help {
		// Asked-for help is the answer, so it goes to stdout (and can be
		// piped to a pager); only help after an error goes to stderr.
		if c.Name == "help" {
			fmt.Fprint(stdout, topUsage())
		} else {
			writeCommandUsage(stdout, c.Name, true)
		}
		return exitOK
	}
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
	case "version":
		err = versionCommand(stdout)
	}
	if err == nil {
		return exitOK
	}
	kind, code := classify(ctx, err)
	if kind == kindInterrupted {
		err = fmt.Errorf("%w: stopped; run it again to go on (finished items are kept, unfinished ones redone)", context.Cause(ctx))
	}
	fmt.Fprintf(stderr, "hindcast %s: %v\n", c.Name, err)
	return failed(ui, c.Name, kind, code, err)
}

// classify tells what kind of failure err is, and its exit code. A run whose
// context a signal cancelled was interrupted, whatever error the
// cancellation surfaced as.
func classify(ctx context.Context, err error) (kind string, code int) {
	var ie interruptedError
	if errors.As(context.Cause(ctx), &ie) {
		return kindInterrupted, exitSignal + int(ie.sig)
	}
	var ue usageError
	var ce *pipeline.ConfigError
	switch {
	case errors.As(err, &ue):
		return kindUsage, exitUsage
	case errors.As(err, &ce):
		return kindConfig, exitUsage
	case errors.Is(err, pipeline.ErrGateFailed):
		return kindGate, exitGate
	case errors.Is(err, pipeline.ErrInternal):
		return kindInternal, exitInternal
	case errors.Is(err, pipeline.ErrNotRegular), errors.Is(err, pipeline.ErrChanged):
		return kindInput, exitRuntime
	}
	return kindRuntime, exitRuntime
}

// failed writes the final record of an error exit, one JSON line (when the
// log is not a terminal: see newLogger) that a scheduler can read without
// parsing the message: level ERROR, msg "command failed", the command, the
// kind of failure, the error and the exit code. It returns the code.
func failed(ui *ui, command, kind string, code int, err error) int {
	ui.log.Error("command failed", "command", command, "kind", kind, "error", err.Error(), "exit", code)
	return code
}

// Build stamps set by the linker, for builds without VCS information (a
// container build from a copied tree, -buildvcs=false):
//
//	go build -ldflags "-X main.buildVersion=0.1.0 -X main.buildCommit=$(git rev-parse HEAD)"
//
// They are package variables only because -X can set nothing else; nothing
// writes them at run time.
var (
	buildVersion string
	buildCommit  string
)

// toolInfo names the running build: the release (ToolVersion, or the
// linker's buildVersion when set) and the commit, taken from the VCS stamp
// of the binary, else from the linker's buildCommit, else "unknown".
func toolInfo() pipeline.ToolInfo {
	return toolInfoFrom(readBuildInfo(), buildVersion, buildCommit)
}

func readBuildInfo() *debug.BuildInfo {
	bi, ok := debug.ReadBuildInfo()
	if !ok {
		return nil
	}
	return bi
}

// toolInfoFrom is toolInfo with its inputs given, so that every fallback
// can be tested.
func toolInfoFrom(bi *debug.BuildInfo, version, commit string) pipeline.ToolInfo {
	t := pipeline.ToolInfo{Version: pipeline.ToolVersion, Commit: "unknown"}
	if version != "" {
		t.Version = version
	}
	modified := false
	if bi != nil {
		for _, s := range bi.Settings {
			switch {
			case s.Key == "vcs.revision" && s.Value != "":
				t.Commit = s.Value
			case s.Key == "vcs.modified" && s.Value == "true":
				modified = true
			}
		}
	}
	if t.Commit == "unknown" && commit != "" {
		t.Commit = commit
	}
	// A build from an edited tree is not that commit's code.
	if modified && t.Commit != "unknown" {
		t.Commit += "+modified"
	}
	return t
}

// versionCommand prints the tool's release, commit and Go version, one per
// line, so that a script can read them and a person can paste them.
func versionCommand(w io.Writer) error {
	t := toolInfo()
	goVersion := runtime.Version()
	if bi := readBuildInfo(); bi != nil && bi.GoVersion != "" {
		goVersion = bi.GoVersion
	}
	_, err := fmt.Fprintf(w, "hindcast %s\ncommit %s\ngo %s %s/%s\n", t.Version, t.Commit, goVersion, runtime.GOOS, runtime.GOARCH)
	return err
}

// runConfig loads the config and runs the pipeline on it.
func runConfig(ctx context.Context, path, version string, parallel int, gates pipeline.GateOptions, stdout io.Writer, ui *ui) (*pipeline.Manifest, error) {
	cfg, err := pipeline.LoadConfig(path)
	if err != nil {
		return nil, err
	}
	ui.log.Info("run", "config", path, "dataset", cfg.Dataset, "source", cfg.Source.URI, "parallel", parallel)
	metrics := &pipeline.Metrics{}
	m, err := pipeline.Execute(ctx, cfg, stages.All(), pipeline.Options{
		Version: version, Parallel: parallel, Log: ui.log, Progress: ui.progress(), Tool: toolInfo(), Metrics: metrics,
		Code: pipeline.CodeID(), Gates: gates, Drift: inspect.MaxDrift,
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
	_, err := runConfig(ctx, c.Config, c.Version, c.Parallel, c.Gates, stdout, ui)
	return err
}

func demoCommand(ctx context.Context, c *Command, stdout io.Writer, ui *ui) error {
	dir, err := filepath.Abs(c.Dir)
	if err != nil {
		return err
	}
	if err := fleet.DemoWith(dir, fleet.DemoOptions{Recordings: c.Recordings}); err != nil {
		return fmt.Errorf("write demo fleet in %s: %w", dir, err)
	}
	fmt.Fprintf(stdout, "demo fleet of Larkspur Depot written to %s\n", filepath.Join(dir, "logs"))
	_, err = runConfig(ctx, filepath.Join(dir, "hindcast.yaml"), "", c.Parallel, pipeline.GateOptions{}, stdout, ui)
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
		Tool: toolInfo(), Metrics: metrics, Code: pipeline.CodeID(), Gates: c.Gates, Drift: inspect.MaxDrift}
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
			return usageError{err: fmt.Errorf("--workers %d needs JOB_COMPLETION_INDEX in 0…%d, got %q", c.Workers, c.Workers-1, idx)}
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
		one, many := "partition", "partitions"
		if p.Name == pipeline.StageIngest {
			one, many = "object", "objects"
		}
		if !p.Known {
			fmt.Fprintf(stdout, "%-8s not known until the stage before it has run\n", p.Name)
			continue
		}
		fmt.Fprintf(stdout, "%-8s %s: %d cached, %d to compute", p.Name, countOf(p.Items, one, many), p.Cached, len(p.ToRun))
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
