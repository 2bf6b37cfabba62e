package inspect

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"

	"github.com/parquet-go/parquet-go"

	"hindcast/pipeline"
	"hindcast/schemas"
)

// vfRewritePairs rewrites the pairs file at path with row's goal_episode set
// to goal, keeps its footer metadata, and updates the manifest's bytes,
// SHA-256 and digest so that only the goal itself is wrong.
func vfRewritePairs(t *testing.T, dir, path string, row int, goal string) {
	t.Helper()
	p := filepath.Join(dir, path)
	raw, err := os.ReadFile(p)
	if err != nil {
		t.Fatal(err)
	}
	pf, err := parquet.OpenFile(bytes.NewReader(raw), int64(len(raw)))
	if err != nil {
		t.Fatal(err)
	}
	rows, err := parquet.Read[schemas.PairRow[float32]](bytes.NewReader(raw), int64(len(raw)))
	if err != nil {
		t.Fatal(err)
	}
	rows[row].GoalEpisode = goal
	var opts []parquet.WriterOption
	for _, kv := range pf.Metadata().KeyValueMetadata {
		opts = append(opts, parquet.KeyValueMetadata(kv.Key, kv.Value))
	}
	var buf bytes.Buffer
	w := parquet.NewGenericWriter[schemas.PairRow[float32]](&buf, opts...)
	if _, err := w.Write(rows); err != nil {
		t.Fatal(err)
	}
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(p, buf.Bytes(), 0o644); err != nil {
		t.Fatal(err)
	}
	sum := sha256.Sum256(buf.Bytes())
	vfEditManifest(t, dir, func(m map[string]any) {
		for _, f := range m["files"].([]any) {
			if f := f.(map[string]any); f["path"] == path {
				f["sha256"] = fmt.Sprintf("%x", sum)
				f["bytes"] = json.Number(fmt.Sprint(buf.Len()))
			}
		}
	})
	v := vfOpen(t, dir)
	vfEditManifest(t, dir, func(m map[string]any) {
		m["digest"] = pipeline.Digest(v.Manifest.ConfigSHA256, v.Manifest.Sources, v.Manifest.Files)
	})
}

// TestVerifyGoalSplits: SPEC §3.3 says a pair's goal never comes from
// another split (or partition). A version built by hand to break it, one
// row at a time, fails verify naming the file and the row.
func TestVerifyGoalSplits(t *testing.T) {
	ctx := context.Background()
	_, dir := vfBase(t)
	eps := vfEpisodes()
	// An episode with its pairs file, and episodes of another split and of
	// the same split in another partition (SPEC §3.4, computed by vfSplit
	// and vfPartition).
	target := eps[1]
	path := fmt.Sprintf("pairs/split=%s/part-%05d.parquet", vfSplit(target.id), vfPartition(target.unit))
	var otherSplit, otherPart *vfEpisode
	for i := range eps {
		e := &eps[i]
		switch {
		case vfSplit(e.id) != vfSplit(target.id) && otherSplit == nil:
			otherSplit = e
		case vfSplit(e.id) == vfSplit(target.id) && vfPartition(e.unit) != vfPartition(target.unit) && otherPart == nil:
			otherPart = e
		}
	}
	if otherSplit == nil {
		t.Fatalf("fixture: no episode outside split %s", vfSplit(target.id))
	}
	// The row written for the target episode: pairs are sorted by episode,
	// so its first row follows the rows of the file's earlier episodes.
	first := 0
	for _, e := range eps {
		if e.id < target.id && vfSplit(e.id) == vfSplit(target.id) && vfPartition(e.unit) == vfPartition(target.unit) {
			first += int(vfPairs(e, 1))
		}
	}
	row := first + 2

	check := func(t *testing.T, goal *vfEpisode, want string) {
		d := vfCopy(t, dir)
		vfRewritePairs(t, d, path, row, goal.id)
		r, err := Verify(ctx, vfOpen(t, d))
		if err != nil {
			t.Fatal(err)
		}
		if got := vfProblems(r); !slices.Equal(got, []string{path + " goal_split"}) {
			t.Fatalf("problems %q, want one goal_split on %s: %+v", got, path, r.Problems)
		}
		d1 := r.Problems[0].Detail
		if !strings.HasPrefix(d1, fmt.Sprintf("row %d: episode %s ", row, target.id)) || !strings.Contains(d1, want) {
			t.Errorf("detail %q, want row %d of %s and %q", d1, row, target.id, want)
		}
		var buf bytes.Buffer
		if err := r.WriteText(&buf); err != nil {
			t.Fatal(err)
		}
		if !strings.Contains(buf.String(), path) || !strings.Contains(buf.String(), fmt.Sprintf("row %d", row)) {
			t.Errorf("text does not name %s row %d:\n%s", path, row, buf.String())
		}
	}
	t.Run("another split", func(t *testing.T) {
		check(t, otherSplit, fmt.Sprintf("episode %s of split %s", otherSplit.id, vfSplit(otherSplit.id)))
	})
	t.Run("another partition", func(t *testing.T) {
		if otherPart == nil {
			t.Fatalf("fixture: no episode of split %s outside partition %d", vfSplit(target.id), vfPartition(target.unit))
		}
		check(t, otherPart, fmt.Sprintf("episode %s of partition %d", otherPart.id, vfPartition(otherPart.unit)))
	})
}
