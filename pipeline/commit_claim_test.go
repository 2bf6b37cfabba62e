package pipeline

// Concurrent commits to one version name: exactly one wins, its version is
// exactly what its manifest says, and the others fail saying why (the claim
// of the version, ClaimKey).

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io/fs"
	"path/filepath"
	"slices"
	"strings"
	"sync"
	"testing"
)

const claimDataset = "claim-fleet"

// claimPayload is one commit's content: shards of pseudo-random bytes in a
// work store, the pack summary that lists them, and a manifest naming them.
type claimPayload struct {
	tag string
	m   *Manifest
	res *Result
	sha map[string]string // path in the version folder → SHA-256
}

// claimPath is the version-folder path of shard i; payloads with
// overlapping ranges of i write to the same paths.
func claimPath(i int) string {
	return fmt.Sprintf("pairs/split=train/day=2026-01-01/part-%05d.parquet", i)
}

// newClaimPayload writes shards first..first+n-1 of the payload tag into
// work (under tag/) and returns the commit of them as version.
func newClaimPayload(t *testing.T, work Store, tag, version string, first, n int) claimPayload {
	t.Helper()
	ctx := context.Background()
	seed := sha256.Sum256([]byte(tag))
	p := claimPayload{tag: tag, sha: map[string]string{}}
	var packed []PackedFile
	var files []File
	for i := first; i < first+n; i++ {
		b := s3Bytes(uint64(seed[0])<<8|uint64(seed[1])+uint64(i)<<16, 3000+i)
		sum := sha256.Sum256(b)
		sha := hex.EncodeToString(sum[:])
		wk := fmt.Sprintf("%s/part-%05d.parquet", tag, i)
		if err := Put(ctx, work, wk, b, false); err != nil {
			t.Fatal(err)
		}
		packed = append(packed, PackedFile{Path: claimPath(i), Work: wk, Table: "pairs", Split: "train", Partition: i, Rows: 1, Bytes: int64(len(b)), SHA256: sha})
		files = append(files, File{Path: claimPath(i), Table: "pairs", Split: "train", Partition: i, Rows: 1, Bytes: int64(len(b)), SHA256: sha})
		p.sha[claimPath(i)] = sha
	}
	summary, err := json.Marshal(PackSummary{Files: packed})
	if err != nil {
		t.Fatal(err)
	}
	cs := sha256.Sum256([]byte("config " + tag))
	p.m = &Manifest{Dataset: claimDataset, Version: version, Created: "2026-12-04T05:00:00Z",
		ConfigSHA256: hex.EncodeToString(cs[:]), Files: files, Digest: "digest of " + tag}
	p.res = &Result{Sealed: map[string][]Sealed{StagePack: {{Item: Item{ID: "p00000"}, Summary: summary}}}}
	return p
}

// asVersion is the payload committed as another version (the same work files).
func (p claimPayload) asVersion(version string) claimPayload {
	m := *p.m
	m.Version = version
	p.m = &m
	return p
}

// claimCheckVersion asserts that the version folder holds exactly want's
// manifest and files, each with the SHA-256 its manifest entry gives, none
// with other's bytes, and that no claim is left beside it.
func claimCheckVersion(t *testing.T, out Store, version string, want, other claimPayload) {
	t.Helper()
	ctx := context.Background()
	prefix := VersionPrefix(claimDataset, version)
	raw, err := ReadAll(ctx, out, prefix+ManifestName)
	if err != nil {
		t.Errorf("%s: %v", version, err)
		return
	}
	var m Manifest
	if err := json.Unmarshal(raw, &m); err != nil {
		t.Fatalf("%s: manifest: %v", version, err)
	}
	if m.ConfigSHA256 != want.m.ConfigSHA256 {
		t.Errorf("%s: manifest of config %s, want %s's", version, short(m.ConfigSHA256), want.tag)
	}
	wantKeys := []string{prefix + ManifestName}
	for _, f := range m.Files {
		wantKeys = append(wantKeys, prefix+f.Path)
	}
	slices.Sort(wantKeys)
	var keys []string
	if err := out.List(ctx, prefix, func(o ObjectInfo) error { keys = append(keys, o.Key); return nil }); err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(keys, wantKeys) {
		t.Errorf("%s: folder holds %d files, manifest lists %d (+ manifest.json):\n%q\nwant\n%q", version, len(keys), len(m.Files), keys, wantKeys)
	}
	if len(m.Files) != len(want.sha) {
		t.Errorf("%s: manifest lists %d files, %s has %d", version, len(m.Files), want.tag, len(want.sha))
	}
	for _, f := range m.Files {
		b, err := ReadAll(ctx, out, prefix+f.Path)
		if err != nil {
			t.Errorf("%s: %v", version, err)
			continue
		}
		sum := sha256.Sum256(b)
		got := hex.EncodeToString(sum[:])
		if got != f.SHA256 || got != want.sha[f.Path] {
			t.Errorf("%s: %s has sha256 %s, manifest says %s", version, f.Path, short(got), short(f.SHA256))
		}
		if got == other.sha[f.Path] {
			t.Errorf("%s: %s holds %s's bytes under %s's manifest", version, f.Path, other.tag, want.tag)
		}
	}
	if _, err := out.Stat(ctx, ClaimKey(claimDataset, version)); !errors.Is(err, ErrNotFound) {
		t.Errorf("%s: claim after the commit: %v, want it removed", version, err)
	}
}

// claimRace runs two commits at once, each through its own store of the
// output (as two processes would), and returns their errors.
func claimRace(outs [2]Store, works [2]Store, ps [2]claimPayload) [2]error {
	var errs [2]error
	var wg sync.WaitGroup
	start := make(chan struct{})
	for i := range 2 {
		wg.Add(1)
		go func() {
			defer wg.Done()
			<-start
			errs[i] = Commit(context.Background(), works[i], outs[i], ps[i].m, ps[i].res)
		}()
	}
	close(start)
	wg.Wait()
	return errs
}

// claimTempFiles counts the local store's temporary files under dir.
func claimTempFiles(t *testing.T, dir string) int {
	t.Helper()
	n := 0
	err := filepath.WalkDir(dir, func(p string, d fs.DirEntry, err error) error {
		if err == nil && !d.IsDir() && strings.Contains(d.Name(), tempMarker) {
			n++
		}
		return err
	})
	if err != nil {
		t.Fatal(err)
	}
	return n
}

// claimRig is where the race tests commit: the output's stores (a fresh
// one per commit, as in two processes) and the work store of each try.
type claimRig struct {
	name     string
	out      func() Store
	work     func(try int) Store
	leftover func(t *testing.T) int // unfinished writes left in the output
}

func claimRigs(t *testing.T) []func(t *testing.T) claimRig {
	local := func(t *testing.T) claimRig {
		outDir, workDir := t.TempDir(), t.TempDir()
		return claimRig{
			name: "local",
			out: func() Store {
				s := NewLocalStore(outDir)
				s.Durable = true // as a run opens its output
				return s
			},
			work:     func(int) Store { return NewLocalStore(workDir) },
			leftover: func(t *testing.T) int { return claimTempFiles(t, outDir) },
		}
	}
	onS3 := func(t *testing.T) claimRig {
		r := newS3Rig(t, "hc-claim")
		open := func(prefix string) Store { s, _ := r.store(t, prefix, StorageConfig{}); return s }
		localWork := NewLocalStore(t.TempDir())
		return claimRig{
			name: "s3",
			out:  func() Store { return open("out/") },
			// Odd tries publish by server-side copy from S3 work, even
			// ones by upload from a local work area.
			work: func(try int) Store {
				if try%2 == 1 {
					return open("work/")
				}
				return localWork
			},
			leftover: func(t *testing.T) int { return len(r.pendingUploads(t)) },
		}
	}
	return []func(t *testing.T) claimRig{local, onS3}
}

// TestCommitClaimDifferentContent: 20 tries of two commits of different
// configs (20 and 24 shards, 16 paths in common) to one version at once.
// Before the claim, such races published versions whose manifest did not
// match their files (issue 13: 17 bad versions in 20 tries).
func TestCommitClaimDifferentContent(t *testing.T) {
	for _, mk := range claimRigs(t) {
		rig := mk(t)
		t.Run(rig.name, func(t *testing.T) {
			const tries = 20
			claimed, existed := 0, 0
			for try := range tries {
				version := fmt.Sprintf("v%02d", try)
				work := rig.work(try)
				a := newClaimPayload(t, work, fmt.Sprintf("a%02d", try), version, 0, 20)
				b := newClaimPayload(t, work, fmt.Sprintf("b%02d", try), version, 4, 24)
				errs := claimRace([2]Store{rig.out(), rig.out()}, [2]Store{work, work}, [2]claimPayload{a, b})
				won := -1
				for i, err := range errs {
					switch {
					case err == nil:
						if won >= 0 {
							t.Fatalf("try %d: both commits succeeded", try)
						}
						won = i
					case errors.Is(err, ErrVersionClaimed):
						claimed++
						claimURI := JoinURI(rig.out().URI(), ClaimKey(claimDataset, version))
						if !strings.Contains(err.Error(), claimURI) || !strings.Contains(err.Error(), "delete") || !strings.Contains(err.Error(), "choose another version") {
							t.Errorf("try %d: the claim error does not name %s and what to do: %v", try, claimURI, err)
						}
					case errors.Is(err, ErrVersionExists):
						existed++
					default:
						t.Errorf("try %d: commit %d failed with neither ErrVersionClaimed nor ErrVersionExists: %v", try, i, err)
					}
				}
				if won < 0 {
					t.Fatalf("try %d: no commit succeeded: %v", try, errs)
				}
				ps := [2]claimPayload{a, b}
				claimCheckVersion(t, rig.out(), version, ps[won], ps[1-won])
				if n := rig.leftover(t); n != 0 {
					t.Errorf("try %d: %d unfinished writes left in the output", try, n)
				}
			}
			if claimed+existed != tries {
				t.Errorf("%d losers refused (%d by the claim, %d by the manifest), want %d", claimed+existed, claimed, existed, tries)
			}
			t.Logf("%d tries: the loser met the claim %d times, the published manifest %d times", tries, claimed, existed)
		})
	}
}

// TestCommitClaimSameContent: 20 tries of two commits of the same content
// (two runs of one config) to one version at once. Both may publish the
// same bytes; exactly one writes the manifest, and the other says the
// version was published by another commit, never how its own write failed
// (before: "rename … no such file or directory").
func TestCommitClaimSameContent(t *testing.T) {
	for _, mk := range claimRigs(t) {
		rig := mk(t)
		t.Run(rig.name, func(t *testing.T) {
			const tries = 20
			meanwhile := 0
			for try := range tries {
				version := fmt.Sprintf("v%02d", try)
				work := rig.work(try)
				a := newClaimPayload(t, work, fmt.Sprintf("s%02d", try), version, 0, 20)
				a2 := a.asVersion(version)
				a2.m.Created = "2026-12-04T05:00:01Z" // the other run's manifest
				errs := claimRace([2]Store{rig.out(), rig.out()}, [2]Store{work, work}, [2]claimPayload{a, a2})
				wins := 0
				for i, err := range errs {
					switch {
					case err == nil:
						wins++
					case errors.Is(err, ErrVersionExists):
						if strings.Contains(err.Error(), publishedMeanwhile) {
							meanwhile++
						}
						if !strings.Contains(err.Error(), "version already exists") || !strings.Contains(err.Error(), VersionPrefix(claimDataset, version)) {
							t.Errorf("try %d: commit %d: %v; want it to name the version and say it exists", try, i, err)
						}
					default:
						t.Errorf("try %d: commit %d: %v; want ErrVersionExists", try, i, err)
					}
				}
				if wins != 1 {
					t.Fatalf("try %d: %d commits succeeded, want 1: %v", try, wins, errs)
				}
				claimCheckVersion(t, rig.out(), version, a, claimPayload{})
				if n := rig.leftover(t); n != 0 {
					t.Errorf("try %d: %d unfinished writes left in the output", try, n)
				}
			}
			t.Logf("%d tries: the loser found the version published while it ran %d times", tries, meanwhile)
		})
	}
}

// TestCommitClaimHeld: a commit that failed part way leaves its claim and
// some files. A commit of other content then fails, naming the claim and
// what to do, and changes nothing; a rerun of the same content finishes the
// version; once an abandoned claim is deleted by hand, another commit clears
// the leftovers and publishes.
func TestCommitClaimHeld(t *testing.T) {
	for _, mk := range claimRigs(t) {
		rig := mk(t)
		t.Run(rig.name, func(t *testing.T) {
			ctx := context.Background()
			out, work := rig.out(), rig.work(0)
			a := newClaimPayload(t, work, "a", "v1", 0, 20)
			b := newClaimPayload(t, work, "b", "v1", 4, 24)
			// A's work area loses its last 10 shards: its commit fails
			// after it published the first 10.
			for i := 10; i < 20; i++ {
				if err := work.Delete(ctx, fmt.Sprintf("a/part-%05d.parquet", i)); err != nil {
					t.Fatal(err)
				}
			}
			if err := Commit(ctx, work, out, a.m, a.res); err == nil || !errors.Is(err, ErrNotFound) {
				t.Fatalf("commit with shards missing from work: %v, want a not-found error", err)
			}
			keys := func() []string {
				var ks []string
				if err := out.List(ctx, claimDataset+"/", func(o ObjectInfo) error { ks = append(ks, o.Key); return nil }); err != nil {
					t.Fatal(err)
				}
				return ks
			}
			before := keys()
			if len(before) != 11 || before[0] != ClaimKey(claimDataset, "v1") {
				t.Fatalf("after the failed commit: %q; want its claim and 10 shards", before)
			}

			err := Commit(ctx, work, rig.out(), b.m, b.res)
			claimURI := JoinURI(out.URI(), ClaimKey(claimDataset, "v1"))
			if !errors.Is(err, ErrVersionClaimed) {
				t.Fatalf("commit of other content over a claimed version: %v, want ErrVersionClaimed", err)
			}
			for _, want := range []string{claimURI, JoinURI(out.URI(), VersionPrefix(claimDataset, "v1")), "if none is running", "delete", "choose another version", short(a.m.ConfigSHA256), short(b.m.ConfigSHA256)} {
				if !strings.Contains(err.Error(), want) {
					t.Errorf("claim error does not say %q: %v", want, err)
				}
			}
			if after := keys(); !slices.Equal(after, before) {
				t.Errorf("the refused commit changed the output:\n%q\nwas\n%q", after, before)
			}

			// The rerun of A's content finishes the version.
			if local, ok := Unwrap(out).(*LocalStore); ok {
				localWrite(t, local, VersionPrefix(claimDataset, "v1")+claimPath(3)+tempMarker+"99", "a killed write")
			}
			a = newClaimPayload(t, work, "a", "v1", 0, 20)
			if err := Commit(ctx, work, rig.out(), a.m, a.res); err != nil {
				t.Fatalf("rerun of the claim's content: %v", err)
			}
			claimCheckVersion(t, out, "v1", a, b)
			if n := rig.leftover(t); n != 0 {
				t.Errorf("%d unfinished writes left in the output", n)
			}

			// v2: A fails part way again and is abandoned; its claim is
			// deleted by hand, and B publishes over its leftovers.
			for i := 10; i < 20; i++ {
				if err := work.Delete(ctx, fmt.Sprintf("a/part-%05d.parquet", i)); err != nil {
					t.Fatal(err)
				}
			}
			if err := Commit(ctx, work, out, a.asVersion("v2").m, a.res); err == nil {
				t.Fatal("commit with shards missing from work succeeded")
			}
			if err := out.Delete(ctx, ClaimKey(claimDataset, "v2")); err != nil {
				t.Fatal(err)
			}
			if err := Commit(ctx, work, rig.out(), b.asVersion("v2").m, b.res); err != nil {
				t.Fatalf("commit after the abandoned claim was deleted: %v", err)
			}
			claimCheckVersion(t, out, "v2", b, a)
		})
	}
}

// TestCommitClaimContent: the claim holds the payload's identity, the same
// for the same content whatever the run, other for another config or
// another file.
func TestCommitClaimContent(t *testing.T) {
	files := []commitFile{{"w/1", "pairs/a.parquet", "11"}, {"w/2", "frames/b.parquet", "22"}}
	p := payloadSHA256("cfg", files)
	if q := payloadSHA256("cfg", []commitFile{files[1], files[0]}); q != p {
		t.Errorf("payload depends on the files' order: %s, %s", p, q)
	}
	if q := payloadSHA256("cfg", []commitFile{{"elsewhere/1", "pairs/a.parquet", "11"}, files[1]}); q != p {
		t.Errorf("payload depends on where the work area keeps a file")
	}
	for name, q := range map[string]string{
		"another config": payloadSHA256("cfg2", files),
		"another file":   payloadSHA256("cfg", []commitFile{files[0], {"w/2", "frames/b.parquet", "23"}}),
		"another path":   payloadSHA256("cfg", []commitFile{files[0], {"w/2", "frames/c.parquet", "22"}}),
		"one file fewer": payloadSHA256("cfg", files[:1]),
		"one file more":  payloadSHA256("cfg", append(slices.Clone(files), commitFile{"w/3", "q.parquet", "33"})),
	} {
		if q == p {
			t.Errorf("%s: same payload %s", name, p)
		}
	}
	if ClaimKey("ds", "v1") != "ds/v1+claim.json" || ValidVersion("v1+claim.json") == nil {
		t.Errorf("claim key %q can meet a version name", ClaimKey("ds", "v1"))
	}
}
