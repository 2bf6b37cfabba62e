package stages

import (
	"context"
	"path/filepath"
	"strings"
	"testing"

	"hindcast/pipeline"
)

// TestIngestLocalObjectTagChangedSinceListing: a local object whose size
// and modification time (its tag) are not those listed fails its item at
// open, naming it, even when its size is unchanged: the item's key holds the
// listing's tag, and other content must not be sealed under it.
func TestIngestLocalObjectTagChangedSinceListing(t *testing.T) {
	dir := t.TempDir()
	body := jsonLines(armLine("c1", 1000, ""), armLine("c1", 2000, ""))
	writeTree(t, filepath.Join(dir, "src"), map[string][]byte{"a.jsonl": body})
	cfg, err := pipeline.ParseConfig(withLocations(t, fixtureConfig(1000), "src", "work", "out"), dir, "c.yaml")
	if err != nil {
		t.Fatal(err)
	}
	src := pipeline.NewLocalStore(filepath.Join(dir, "src"))
	env := &pipeline.Env{Config: cfg, Source: src, Work: pipeline.NewLocalStore(filepath.Join(dir, "work"))}
	info, err := src.Stat(context.Background(), "a.jsonl")
	if err != nil {
		t.Fatal(err)
	}
	stale := info
	stale.ETag = "0-0" // the same size, another modification time
	_, err = Ingest{}.Do(context.Background(), env, pipeline.Item{ID: "a.jsonl", Key: "k", Meta: stale})
	if err == nil || !strings.Contains(err.Error(), "a.jsonl changed since it was listed (ETag "+info.ETag+", listed 0-0)") {
		t.Errorf("ingest of an object whose tag changed since listing: %v; want an error naming it and both tags", err)
	}
	if _, err := (Ingest{}).Do(context.Background(), env, pipeline.Item{ID: "a.jsonl", Key: "k2", Meta: info}); err != nil {
		t.Errorf("ingest of the object as listed: %v", err)
	}
}
