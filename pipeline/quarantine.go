package pipeline

import (
	"bufio"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"io"

	"github.com/parquet-go/parquet-go"
	"github.com/parquet-go/parquet-go/compress/zstd"

	"hindcast/schemas"
)

// QuarantinePath is where a version keeps its dropped lines.
const QuarantinePath = "quarantine/part-00000.parquet"

// QuarantineFile describes the quarantine shard of a version.
type QuarantineFile struct {
	Path   string `json:"path"`
	Work   string `json:"-"`
	Rows   int64  `json:"rows"`
	Bytes  int64  `json:"bytes"`
	SHA256 string `json:"sha256"`
}

type countingHash struct {
	w io.Writer
	h interface {
		io.Writer
		Sum([]byte) []byte
	}
	n int64
}

func (c *countingHash) Write(p []byte) (int, error) {
	n, err := c.w.Write(p)
	c.h.Write(p[:n])
	c.n += int64(n)
	return n, err
}

// A quarantine row group holds at most quarantineGroupRows rows and is cut
// once its lines pass about quarantineGroupBytes: the writer buffers a row
// group in memory, and a run may drop millions of lines of up to
// max_line_bytes each.
const (
	quarantineGroupRows  = 65536
	quarantineGroupBytes = 32 << 20
)

// writeQuarantine gathers the dropped lines of a run into one Parquet file in
// the work area: first ingest's (objects in key order, lines in order; a
// duplicate object's are left out, as its lines are), then the episodes
// stage's (partitions in order). Both orders are fixed, so the file is the
// same whatever ran first. It returns nil when nothing was dropped.
func writeQuarantine(ctx context.Context, cfg *Config, work Store, res *Result) (*QuarantineFile, error) {
	var keys []string
	srcs, err := Sources(res.Sealed[StageIngest])
	if err != nil {
		return nil, err
	}
	for _, s := range srcs {
		if s.DuplicateOf == "" && s.Quarantine != "" {
			keys = append(keys, s.Quarantine)
		}
	}
	for _, s := range res.Sealed[StageEpisodes] {
		var e EpisodesSummary
		if err := json.Unmarshal(s.Summary, &e); err != nil {
			return nil, err
		}
		if e.Quarantine != "" {
			keys = append(keys, e.Quarantine)
		}
	}
	if len(keys) == 0 {
		return nil, nil
	}
	key := "quarantine/" + HashParts("quarantine", cfg.SHA256(), keys) + "/" + QuarantinePath
	up, err := work.Create(ctx, key)
	if err != nil {
		return nil, err
	}
	ch := &countingHash{w: up, h: sha256.New()}
	bw := bufio.NewWriterSize(ch, 1<<20)
	w := parquet.NewGenericWriter[schemas.QuarantineRow](bw,
		parquet.Compression(&zstd.Codec{Level: zstd.SpeedFastest}),
		parquet.CreatedBy("hindcast", ToolVersion, ""),
		parquet.KeyValueMetadata("dataset", cfg.Dataset),
		parquet.KeyValueMetadata("table", "quarantine"),
		parquet.KeyValueMetadata("config_sha256", cfg.SHA256()),
		parquet.MaxRowsPerRowGroup(quarantineGroupRows))
	var rows, groupBytes int64
	batch := make([]schemas.QuarantineRow, 0, 1024)
	flush := func() error {
		if len(batch) == 0 {
			return nil
		}
		_, err := w.Write(batch)
		batch = batch[:0]
		if err == nil && groupBytes >= quarantineGroupBytes {
			// A row group is buffered whole until it is written: cut it
			// by the bytes of its lines too, which may be long.
			err, groupBytes = w.Flush(), 0
		}
		if err != nil {
			return fmt.Errorf("write %s: %w", key, err)
		}
		return nil
	}
	for _, k := range keys {
		err := ReadDropped(ctx, work, k, func(d *schemas.Dropped) error {
			r := schemas.QuarantineRow{Src: d.Src, SrcLine: d.SrcLine, Reason: d.Reason, Stage: d.Stage, Line: d.Line}
			if d.Unit != "" {
				u := d.Unit
				r.Unit = &u
			}
			if d.HasT {
				t := d.T
				r.T = &t
			}
			batch = append(batch, r)
			rows++
			groupBytes += int64(len(d.Line) + len(d.Src) + len(d.Unit) + 32)
			if len(batch) == cap(batch) || groupBytes >= quarantineGroupBytes {
				return flush()
			}
			return nil
		})
		if err != nil {
			up.Abort()
			return nil, fmt.Errorf("quarantine from %s: %w", k, err)
		}
	}
	if err := flush(); err != nil {
		up.Abort()
		return nil, err
	}
	if err := w.Close(); err != nil {
		up.Abort()
		return nil, fmt.Errorf("write %s: %w", key, err)
	}
	if err := bw.Flush(); err != nil {
		up.Abort()
		return nil, fmt.Errorf("write %s: %w", key, err)
	}
	if err := up.Commit(false); err != nil {
		return nil, err
	}
	return &QuarantineFile{Path: QuarantinePath, Work: key, Rows: rows, Bytes: ch.n, SHA256: hex.EncodeToString(ch.h.Sum(nil))}, nil
}
