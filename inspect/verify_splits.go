package inspect

import (
	"context"
	"errors"
	"fmt"
	"io"

	"github.com/parquet-go/parquet-go"

	"hindcast/pipeline"
)

// vfMaxSplitProblems bounds the goal problems named per pairs file: a draw
// gone wrong touches thousands of rows, and the first few name it.
const vfMaxSplitProblems = 10

type vfHome struct {
	split     string
	partition int
}

type vfEpisodeRow struct {
	Episode string `parquet:"episode"`
}

type vfPairRow struct {
	Episode     string `parquet:"episode"`
	GoalEpisode string `parquet:"goal_episode"`
}

// vfGoalSplits checks SPEC §3.3: a pair's goal episode lies in the pair's
// own split and partition. Where each episode lives is read from the frames
// files; each pairs row whose goal_episode lives elsewhere (or nowhere) is
// a problem naming the file and the row (0-based, in file order). Files
// already found wrong are skipped, and with a wrong frames file the check is
// not made at all: episodes would seem homeless for a problem reported already.
func vfGoalSplits(ctx context.Context, st pipeline.Store, m *pipeline.Manifest, bad map[string]bool) ([]VerifyProblem, error) {
	for _, f := range m.Files {
		if f.Table == "frames" && bad[f.Path] {
			return nil, nil
		}
	}
	home := map[string]vfHome{}
	for _, f := range m.Files {
		if f.Table != "frames" || bad[f.Path] {
			continue
		}
		err := vfReadRows(ctx, st, f.Path, func(r *vfEpisodeRow, _ int64) {
			home[r.Episode] = vfHome{f.Split, f.Partition}
		})
		if err != nil {
			return nil, err
		}
	}
	var ps []VerifyProblem
	for _, f := range m.Files {
		if f.Table != "pairs" || bad[f.Path] {
			continue
		}
		n := 0
		err := vfReadRows(ctx, st, f.Path, func(r *vfPairRow, row int64) {
			h, ok := home[r.GoalEpisode]
			var msg string
			switch {
			case !ok:
				msg = fmt.Sprintf("row %d: episode %s takes its goal from episode %s, which no frames file holds", row, r.Episode, r.GoalEpisode)
			case h.split != f.Split:
				msg = fmt.Sprintf("row %d: episode %s (split %s) takes its goal from episode %s of split %s", row, r.Episode, f.Split, r.GoalEpisode, h.split)
			case h.partition != f.Partition:
				msg = fmt.Sprintf("row %d: episode %s (partition %d) takes its goal from episode %s of partition %d", row, r.Episode, f.Partition, r.GoalEpisode, h.partition)
			default:
				return
			}
			n++
			if n <= vfMaxSplitProblems {
				ps = append(ps, VerifyProblem{f.Path, "goal_split", msg})
			}
		})
		if err != nil {
			return nil, err
		}
		if n > vfMaxSplitProblems {
			ps = append(ps, VerifyProblem{f.Path, "goal_split", fmt.Sprintf("%d more rows take their goal from another split or partition (%d in all)", n-vfMaxSplitProblems, n)})
		}
	}
	return ps, nil
}

// vfReadRows streams the rows of one Parquet file, reading only the columns
// of T, and calls fn with each and its 0-based row number.
func vfReadRows[T any](ctx context.Context, st pipeline.Store, path string, fn func(*T, int64)) error {
	pf, ra, err := trOpenParquet(ctx, st, path)
	if err != nil {
		return fmt.Errorf("verify goals: %w", err)
	}
	defer ra.Close()
	rd := parquet.NewGenericReader[T](pf)
	defer rd.Close()
	buf := make([]T, 256)
	var row int64
	for {
		n, err := rd.Read(buf)
		for i := range n {
			fn(&buf[i], row)
			row++
		}
		if errors.Is(err, io.EOF) {
			return nil
		}
		if err != nil {
			return fmt.Errorf("verify goals: read %s: %w", path, err)
		}
	}
}
