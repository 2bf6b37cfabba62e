package inspect

import (
	"context"
	"errors"
	"fmt"
	"io"

	"github.com/parquet-go/parquet-go"

	"hindcast/pipeline"
	"hindcast/schemas"
)

// QuarantinedLine is one dropped line from a version's quarantine file.
type QuarantinedLine struct {
	Src     string `json:"src"`
	SrcLine int64  `json:"src_line"`
	Reason  string `json:"reason"`
	Stage   string `json:"stage"`
	Unit    string `json:"unit,omitempty"`
	Line    string `json:"line,omitempty"`
}

// QuarantineLines reads the dropped lines of a version (config quarantine:
// true) that keep returns true for, at most limit of them (0: all). It
// returns nil when the version has no quarantine file. The file is read one
// row group at a time.
func QuarantineLines(ctx context.Context, v *pipeline.Version, keep func(src, reason string) bool, limit int) ([]QuarantinedLine, error) {
	q := v.Manifest.Quarantine
	if q == nil {
		return nil, nil
	}
	f, ra, err := trOpenParquet(ctx, v.Store, q.Path)
	if err != nil {
		return nil, err
	}
	defer ra.Close()
	out := []QuarantinedLine{}
	for _, rg := range f.RowGroups() {
		rows := parquet.NewGenericRowGroupReader[schemas.QuarantineRow](rg)
		buf := make([]schemas.QuarantineRow, 256)
		for {
			n, err := rows.Read(buf)
			for _, r := range buf[:n] {
				if keep != nil && !keep(r.Src, r.Reason) {
					continue
				}
				l := QuarantinedLine{Src: r.Src, SrcLine: r.SrcLine, Reason: r.Reason, Stage: r.Stage, Line: string(r.Line)}
				if r.Unit != nil {
					l.Unit = *r.Unit
				}
				out = append(out, l)
				if limit > 0 && len(out) == limit {
					rows.Close()
					return out, nil
				}
			}
			if errors.Is(err, io.EOF) {
				break
			}
			if err != nil {
				rows.Close()
				return nil, fmt.Errorf("read %s: %w", q.Path, err)
			}
		}
		rows.Close()
	}
	return out, nil
}

// WriteQuarantineText prints dropped lines, one per line, the raw text cut
// to a screen's width.
func WriteQuarantineText(w io.Writer, title string, lines []QuarantinedLine) error {
	if _, err := fmt.Fprintf(w, "\n%s\n", title); err != nil {
		return err
	}
	for _, l := range lines {
		text := l.Line
		if len(text) > 72 {
			text = text[:72] + "…"
		}
		if _, err := fmt.Fprintf(w, "  %-18s %s:%d  %s\n", l.Reason, l.Src, l.SrcLine, text); err != nil {
			return err
		}
	}
	return nil
}
