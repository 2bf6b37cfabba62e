package main

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"sort"
	"strconv"
	"strings"
	"syscall"
	"time"

	"hindcast/fleet"
	"hindcast/pipeline"
)

// benchConfig is the benchmark fleet's config: the two embodiments of the
// peer job (../shared/peer/README.md) and its goals (2 future, 1 geometric
// with γ = 0.99, 1 final, no negatives).
const benchConfig = `dataset: bench-fleet
source:
  uri: logs
work: work
output: datasets
partitions: 8
seed: 7
embodiments:
  picker6:
    obs: 10
    act: 7
    obs_low: -10
    obs_high: 10
    goal_dims: [7, 8, 9]
    goal_tolerance: 0.03
  cart2:
    obs: 5
    act: 2
    obs_low: -10
    obs_high: 10
    goal_dims: [0, 1]
    goal_tolerance: 0.25
episodes:
  max_gap: 500ms
  min_steps: 10
  max_steps: 500
goals:
  future: 2
  geometric: 1
  final: 1
  negative: 0
  gamma: 0.99
splits: {train: 0.8, val: 0.1, test: 0.1}
float: float32
parquet:
  compression: zstd
`

// timing is one timed child process.
type timing struct {
	wall   time.Duration
	maxRSS int64 // bytes
}

// timeChild runs a command to completion and returns its wall time and peak
// resident set size (getrusage of the child).
func timeChild(ctx context.Context, stderr io.Writer, name string, args ...string) (timing, error) {
	cmd := exec.CommandContext(ctx, name, args...)
	cmd.Stdout = io.Discard
	cmd.Stderr = stderr
	start := time.Now()
	if err := cmd.Run(); err != nil {
		return timing{}, fmt.Errorf("%s: %w", name, err)
	}
	t := timing{wall: time.Since(start)}
	if ru, ok := cmd.ProcessState.SysUsage().(*syscall.Rusage); ok {
		t.maxRSS = ru.Maxrss * 1024 // Linux reports kilobytes
	}
	return t, nil
}

func median(ds []time.Duration) time.Duration {
	s := append([]time.Duration(nil), ds...)
	sort.Slice(s, func(i, j int) bool { return s[i] < s[j] })
	return s[len(s)/2]
}

func benchCommand(ctx context.Context, c *Command, stdout io.Writer, ui *ui) error {
	dir, err := filepath.Abs(c.Dir)
	if err != nil {
		return err
	}
	if c.Recordings {
		return benchRecordings(ctx, c, dir, stdout, ui)
	}
	logs := filepath.Join(dir, "logs")
	stamp := filepath.Join(dir, "fleet.json")
	var meta struct {
		Frames, Written int
		Bytes           int64
		Zst             bool
	}
	if b, err := os.ReadFile(stamp); err == nil && json.Unmarshal(b, &meta) == nil && meta.Frames == c.Frames && meta.Zst == c.Compress {
		fmt.Fprintf(stdout, "reusing benchmark fleet in %s (%d frames, %.1f MB)\n", logs, meta.Written, float64(meta.Bytes)/1e6)
	} else {
		os.RemoveAll(logs)
		start := time.Now()
		n, bytes, err := fleet.Bench(logs, fleet.BenchOptions{Frames: c.Frames, Seed: 1, Compress: c.Compress})
		if err != nil {
			return fmt.Errorf("write benchmark fleet: %w", err)
		}
		meta.Frames, meta.Written, meta.Bytes, meta.Zst = c.Frames, n, bytes, c.Compress
		b, _ := json.Marshal(meta)
		if err := os.WriteFile(stamp, b, 0o644); err != nil {
			return err
		}
		fmt.Fprintf(stdout, "wrote benchmark fleet: %d frames, %.1f MB in %.1fs\n", n, float64(bytes)/1e6, time.Since(start).Seconds())
	}
	cfgPath := filepath.Join(dir, "bench.yaml")
	if err := os.WriteFile(cfgPath, []byte(benchConfig), 0o644); err != nil {
		return err
	}
	self, err := os.Executable()
	if err != nil {
		return err
	}
	var s3Cfg string
	if c.Endpoint != "" {
		if s3Cfg, err = prepareS3Bench(ctx, dir, logs, c.Endpoint, c.Bucket, stdout); err != nil {
			return err
		}
	}
	var ours, peers, fromS3 []time.Duration
	var rss, peerRSS, s3RSS int64
	var last *pipeline.Manifest
	for i := range c.Runs {
		for _, sub := range []string{"work", "datasets", "peer-out"} {
			os.RemoveAll(filepath.Join(dir, sub))
		}
		version := "bench-" + strconv.Itoa(i)
		t, err := timeChild(ctx, ui.w, self, "run", "--config", cfgPath, "--version", version, "--parallel", strconv.Itoa(c.Parallel))
		if err != nil {
			return err
		}
		ours = append(ours, t.wall)
		rss = max(rss, t.maxRSS)
		b, err := os.ReadFile(filepath.Join(dir, "datasets", "bench-fleet", version, pipeline.ManifestName))
		if err != nil {
			return err
		}
		last = &pipeline.Manifest{}
		if err := json.Unmarshal(b, last); err != nil {
			return err
		}
		fmt.Fprintf(stdout, "run %d: hindcast %.2fs, peak RSS %.0f MiB\n", i+1, t.wall.Seconds(), float64(t.maxRSS)/(1<<20))
		if s3Cfg != "" {
			for _, sub := range []string{"work", "datasets"} {
				os.RemoveAll(filepath.Join(dir, sub))
			}
			st, err := timeChild(ctx, ui.w, self, "run", "--config", s3Cfg, "--version", version, "--parallel", strconv.Itoa(c.Parallel))
			if err != nil {
				return err
			}
			fromS3 = append(fromS3, st.wall)
			s3RSS = max(s3RSS, st.maxRSS)
			fmt.Fprintf(stdout, "run %d: hindcast from S3 %.2fs, peak RSS %.0f MiB\n", i+1, st.wall.Seconds(), float64(st.maxRSS)/(1<<20))
		}
		if c.Peer != "" {
			out := filepath.Join(dir, "peer-out")
			if err := os.MkdirAll(out, 0o755); err != nil {
				return err
			}
			pt, err := timeChild(ctx, ui.w, c.Peer, "-f", peerSQL(c.Peer), "SRC="+logs, "OUT="+out)
			if err != nil {
				return err
			}
			peers = append(peers, pt.wall)
			peerRSS = max(peerRSS, pt.maxRSS)
			fmt.Fprintf(stdout, "run %d: peer     %.2fs, peak RSS %.0f MiB\n", i+1, pt.wall.Seconds(), float64(pt.maxRSS)/(1<<20))
		}
	}
	med := median(ours).Seconds()
	f := last.Funnel
	fmt.Fprintf(stdout, "\nhindcast, median of %d runs, --parallel %d: %.2fs\n", c.Runs, c.Parallel, med)
	fmt.Fprintf(stdout, "  frames/s   %.0f (%d frames)\n", float64(f.Frames)/med, f.Frames)
	fmt.Fprintf(stdout, "  input MB/s %.1f (%.1f MB)\n", float64(meta.Bytes)/1e6/med, float64(meta.Bytes)/1e6)
	fmt.Fprintf(stdout, "  pairs/s    %.0f (%d pairs)\n", float64(f.Pairs)/med, f.Pairs)
	fmt.Fprintf(stdout, "  peak RSS   %.0f MiB (largest of the runs)\n", float64(rss)/(1<<20))
	for _, s := range last.Stages {
		fmt.Fprintf(stdout, "  stage %-9s %.2fs (last run)\n", s.Name, s.Seconds)
	}
	if len(fromS3) > 0 {
		sm := median(fromS3).Seconds()
		fmt.Fprintf(stdout, "hindcast with the source on S3, median of %d runs: %.2fs, peak RSS %.0f MiB\n", len(fromS3), sm, float64(s3RSS)/(1<<20))
		fmt.Fprintf(stdout, "ratio S3/local (medians): %.2fx\n", sm/med)
	}
	if len(peers) > 0 {
		pm := median(peers).Seconds()
		fmt.Fprintf(stdout, "peer, median of %d runs: %.2fs, peak RSS %.0f MiB\n", len(peers), pm, float64(peerRSS)/(1<<20))
		fmt.Fprintf(stdout, "ratio peer/hindcast (medians): %.2fx\n", pm/med)
	}
	return nil
}

// peerSQL finds job.sql beside the peer binary, or in ../shared/peer.
func peerSQL(bin string) string {
	if p := filepath.Join(filepath.Dir(bin), "job.sql"); fileExists(p) {
		return p
	}
	if p, err := filepath.Abs(filepath.Join("..", "shared", "peer", "job.sql")); err == nil {
		return p
	}
	return "job.sql"
}

func fileExists(p string) bool {
	_, err := os.Stat(p)
	return err == nil
}

// prepareS3Bench uploads the benchmark fleet to s3://bucket/logs/ (once: an
// object already there with the same size is kept) and writes a config that
// reads it from there, with work and output local as in the local runs.
func prepareS3Bench(ctx context.Context, dir, logs, endpoint, bucket string, stdout io.Writer) (string, error) {
	opener := &pipeline.Opener{Storage: pipeline.StorageConfig{Endpoint: endpoint}}
	dst, err := opener.Open(ctx, "s3://"+bucket+"/logs/")
	if err != nil {
		return "", err
	}
	src := pipeline.NewLocalStore(logs)
	have := map[string]int64{}
	if err := dst.List(ctx, "", func(o pipeline.ObjectInfo) error { have[o.Key] = o.Size; return nil }); err != nil {
		return "", fmt.Errorf("list the benchmark bucket: %w", err)
	}
	start, sent := time.Now(), int64(0)
	err = src.List(ctx, "", func(o pipeline.ObjectInfo) error {
		if have[o.Key] == o.Size {
			return nil
		}
		r, err := src.Open(ctx, o.Key, 0)
		if err != nil {
			return err
		}
		defer r.Close()
		up, err := dst.Create(ctx, o.Key)
		if err != nil {
			return err
		}
		if _, err := io.Copy(up, r); err != nil {
			up.Abort()
			return err
		}
		sent += o.Size
		return up.Commit(false)
	})
	if err != nil {
		return "", fmt.Errorf("upload the benchmark fleet: %w", err)
	}
	if sent > 0 {
		fmt.Fprintf(stdout, "uploaded %.1f MB to s3://%s/logs/ in %.1fs\n", float64(sent)/1e6, bucket, time.Since(start).Seconds())
	}
	cfg := strings.Replace(benchConfig, "source:\n  uri: logs\n", "source:\n  uri: s3://"+bucket+"/logs/\n", 1) +
		"storage:\n  endpoint: " + endpoint + "\n"
	path := filepath.Join(dir, "bench-s3.yaml")
	return path, os.WriteFile(path, []byte(cfg), 0o644)
}

// benchRecordings writes (or reuses) a fault-free recording fleet of
// c.RecordingMB megabytes under dir/recordings and times whole runs over it:
// recording MB/s, ticks/s and the children's peak RSS (getrusage), the figures
// SPEC §7's reader is judged by.
func benchRecordings(ctx context.Context, c *Command, dir string, stdout io.Writer, ui *ui) error {
	root := filepath.Join(dir, "recordings")
	logs := filepath.Join(root, "logs")
	stamp := filepath.Join(root, "fleet.json")
	var meta struct {
		MB, Recordings int
		Ticks, Bytes   int64
	}
	if b, err := os.ReadFile(stamp); err == nil && json.Unmarshal(b, &meta) == nil && meta.MB == c.RecordingMB {
		fmt.Fprintf(stdout, "reusing recording fleet in %s (%d recordings, %.1f MB)\n", logs, meta.Recordings, float64(meta.Bytes)/1e6)
	} else {
		os.RemoveAll(logs)
		start := time.Now()
		n, ticks, size, err := fleet.BenchRecordings(logs, fleet.BenchRecordingOptions{Bytes: int64(c.RecordingMB) * 1e6, Seed: 1})
		if err != nil {
			return fmt.Errorf("write recording fleet: %w", err)
		}
		meta.MB, meta.Recordings, meta.Ticks, meta.Bytes = c.RecordingMB, n, ticks, size
		b, _ := json.Marshal(meta)
		if err := os.WriteFile(stamp, b, 0o644); err != nil {
			return fmt.Errorf("write %s: %w", stamp, err)
		}
		fmt.Fprintf(stdout, "wrote recording fleet: %d recordings, %d ticks, %.1f MB in %.1fs\n", n, ticks, float64(size)/1e6, time.Since(start).Seconds())
	}
	cfgPath := filepath.Join(root, "bench.yaml")
	if err := os.WriteFile(cfgPath, []byte(fleet.BenchRecordingConfig), 0o644); err != nil {
		return fmt.Errorf("write %s: %w", cfgPath, err)
	}
	self, err := os.Executable()
	if err != nil {
		return err
	}
	var walls []time.Duration
	var rss int64
	for i := range c.Runs {
		for _, sub := range []string{"work", "datasets"} {
			os.RemoveAll(filepath.Join(root, sub))
		}
		version := "bench-" + strconv.Itoa(i)
		t, err := timeChild(ctx, ui.w, self, "run", "--config", cfgPath, "--version", version, "--parallel", strconv.Itoa(c.Parallel))
		if err != nil {
			return err
		}
		walls = append(walls, t.wall)
		rss = max(rss, t.maxRSS)
		fmt.Fprintf(stdout, "run %d: hindcast %.2fs, peak RSS %.0f MiB\n", i+1, t.wall.Seconds(), float64(t.maxRSS)/(1<<20))
	}
	med := median(walls).Seconds()
	fmt.Fprintf(stdout, "\nhindcast on recordings, median of %d runs, --parallel %d: %.2fs\n", c.Runs, c.Parallel, med)
	fmt.Fprintf(stdout, "  recording MB/s %.1f (%.1f MB in %d recordings)\n", float64(meta.Bytes)/1e6/med, float64(meta.Bytes)/1e6, meta.Recordings)
	fmt.Fprintf(stdout, "  ticks/s        %.0f (%d ticks)\n", float64(meta.Ticks)/med, meta.Ticks)
	fmt.Fprintf(stdout, "  peak RSS       %.0f MiB (largest of the runs)\n", float64(rss)/(1<<20))
	return nil
}
