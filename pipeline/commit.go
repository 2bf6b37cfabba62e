package pipeline

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"regexp"
	"sort"
	"time"
)

var versionPattern = regexp.MustCompile(`^[A-Za-z0-9._-]{1,64}$`)

// ValidVersion checks a version name (SPEC §6).
func ValidVersion(v string) error {
	if v == "." || v == ".." {
		return fmt.Errorf("version %q: \".\" and \"..\" are not allowed (they name folders)", v)
	}
	if !versionPattern.MatchString(v) {
		return fmt.Errorf("version %q: want 1–64 of A-Za-z0-9._-", v)
	}
	return nil
}

// DefaultVersion is the UTC time as YYYYMMDDTHHMMSSZ.
func DefaultVersion(now time.Time) string { return now.UTC().Format("20060102T150405Z") }

// ManifestName is the file whose presence makes a version exist.
const ManifestName = "manifest.json"

// VersionPrefix is a version's folder in the output store.
func VersionPrefix(dataset, version string) string { return dataset + "/" + version + "/" }

// ErrVersionExists is returned when committing a version that already exists.
var ErrVersionExists = errors.New("version already exists")

// ErrVersionClaimed is returned when another commit, of other content, holds
// the version name: its claim object is there and its manifest is not.
var ErrVersionClaimed = errors.New("version claimed by a commit of other content")

// publishedMeanwhile is what a commit says when it finds, part way, that a
// commit of the same content running at once published the version first.
const publishedMeanwhile = "another commit published it while this one ran"

// ClaimKey is the claim object of a version: beside the version folder, not
// in it, so that the folder holds exactly what its manifest lists, and named
// with a "+", which no version name may hold, so that no version folder can
// meet it. A commit writes it exclusively before it writes anything into the
// folder, and removes it once the manifest is in place.
func ClaimKey(dataset, version string) string { return dataset + "/" + version + "+claim.json" }

// Claim is the content of a claim object. Payload identifies what the commit
// publishes: two commits with the same payload write the same bytes to the
// same paths, so one may finish what the other began. Host, PID and Created
// only help an operator tell whether the holder still runs.
type Claim struct {
	Dataset      string `json:"dataset"`
	Version      string `json:"version"`
	ConfigSHA256 string `json:"config_sha256"`
	Payload      string `json:"payload_sha256"`
	Files        int    `json:"files"`
	Host         string `json:"host,omitempty"`
	PID          int    `json:"pid,omitempty"`
	Created      string `json:"created,omitempty"`
}

// commitFile is one file a commit publishes: where pack left it in the work
// area, its path in the version folder, and its SHA-256.
type commitFile struct{ work, path, sha string }

// payloadSHA256 is SHA-256 over the config's SHA-256 and the sorted
// (path, SHA-256) of every file the commit publishes.
func payloadSHA256(configSHA string, files []commitFile) string {
	lines := make([]string, 0, len(files))
	for _, f := range files {
		lines = append(lines, f.path+"\t"+f.sha+"\n")
	}
	sort.Strings(lines)
	h := sha256.New()
	io.WriteString(h, "hindcast commit payload 1\n"+configSHA+"\n")
	for _, l := range lines {
		io.WriteString(h, l)
	}
	return hex.EncodeToString(h.Sum(nil))
}

// Commit publishes the packed shards into output/<dataset>/<version>/ and
// writes the manifest last, with an exclusive write, so that the version
// exists only once it is complete and an existing version is never replaced.
//
// Before it deletes or publishes anything it claims the version name (see
// ClaimKey): of concurrent commits of different content to one version,
// exactly one gets past the claim, and the others fail with
// ErrVersionClaimed having touched nothing. Commits of the same content
// (two runs of one config, or a rerun after a commit was killed) share the
// claim: they publish the same bytes, exactly one writes the manifest, and
// the others fail with ErrVersionExists, saying another commit published it.
func Commit(ctx context.Context, work, out Store, m *Manifest, res *Result) error {
	prefix := VersionPrefix(m.Dataset, m.Version)
	where := JoinURI(out.URI(), prefix)
	exists, err := versionExists(ctx, out, prefix)
	if err != nil {
		return fmt.Errorf("commit %s: %w", where, err)
	}
	if exists {
		return fmt.Errorf("commit %s: %w", where, ErrVersionExists)
	}
	var files []commitFile
	for _, s := range res.Sealed[StagePack] {
		var p PackSummary
		if err := json.Unmarshal(s.Summary, &p); err != nil {
			return fmt.Errorf("commit: pack %s: %w", s.Item.ID, err)
		}
		for _, f := range p.Files {
			files = append(files, commitFile{f.Work, f.Path, f.SHA256})
		}
	}
	if q := m.Quarantine; q != nil {
		files = append(files, commitFile{q.Work, q.Path, q.SHA256})
	}
	c := Claim{Dataset: m.Dataset, Version: m.Version, ConfigSHA256: m.ConfigSHA256,
		Payload: payloadSHA256(m.ConfigSHA256, files), Files: len(files), PID: os.Getpid(), Created: m.Created}
	c.Host, _ = os.Hostname()
	if err := claim(ctx, out, c); err != nil {
		return fmt.Errorf("commit %s: %w", where, err)
	}
	// Any failure from here on may come of a commit of the same content
	// that finished first and cleared this one's unfinished writes: when
	// the manifest is there, say so, not how this commit's write failed.
	published := func(err error) error {
		if exists, serr := versionExists(ctx, out, prefix); serr == nil && exists {
			return fmt.Errorf("commit %s: %w: %s", where, ErrVersionExists, publishedMeanwhile)
		}
		return err
	}
	if err := publishAll(ctx, work, out, prefix, files); err != nil {
		return published(err)
	}
	b, err := json.MarshalIndent(m, "", "  ")
	if err != nil {
		return fmt.Errorf("commit: manifest: %w", err)
	}
	if err := Put(ctx, out, prefix+ManifestName, append(b, '\n'), true); err != nil {
		return published(err)
	}
	// The version exists. What follows only tidies: a failure leaves
	// temporary files that List does not show, or a claim beside a
	// version, which every commit ignores (it finds the manifest first).
	if u, ok := Unwrap(out).(UnfinishedDeleter); ok {
		_ = u.DeleteUnfinished(ctx, prefix)
	}
	_ = out.Delete(ctx, ClaimKey(m.Dataset, m.Version))
	return nil
}

// versionExists reports whether the version folder prefix holds a manifest.
func versionExists(ctx context.Context, out Store, prefix string) (bool, error) {
	_, err := out.Stat(ctx, prefix+ManifestName)
	if err == nil {
		return true, nil
	}
	if errors.Is(err, ErrNotFound) {
		return false, nil
	}
	return false, err
}

// claim takes the version name for c's payload: it writes the claim object
// exclusively, or finds one of the same payload (a commit of the same
// content that runs, or was killed, is finished by this one). The commit
// that writes the manifest removes the claim, whoever wrote it: they all
// hold the same content.
func claim(ctx context.Context, out Store, c Claim) error {
	key := ClaimKey(c.Dataset, c.Version)
	prefix := VersionPrefix(c.Dataset, c.Version)
	b, err := json.MarshalIndent(c, "", "  ")
	if err != nil {
		return err
	}
	b = append(b, '\n')
	// Twice at most: a claim removed between a failed write and its read
	// was its commit's last step, and the manifest then says so.
	for range 2 {
		err := Put(ctx, out, key, b, true)
		if err == nil {
			// A commit that finished between the first look for the
			// manifest and this claim removed its own claim last.
			if exists, err := versionExists(ctx, out, prefix); err != nil || exists {
				_ = out.Delete(ctx, key)
				if err != nil {
					return err
				}
				return fmt.Errorf("%w: %s", ErrVersionExists, publishedMeanwhile)
			}
			return nil
		}
		if !errors.Is(err, ErrExists) {
			return fmt.Errorf("claim the version: %w", err)
		}
		raw, err := ReadAll(ctx, out, key)
		if errors.Is(err, ErrNotFound) {
			continue
		}
		if err != nil {
			return fmt.Errorf("claim the version: %w", err)
		}
		var held Claim
		if err := json.Unmarshal(raw, &held); err != nil || held.Payload == "" {
			return fmt.Errorf("%w: %s is not a claim this hindcast can read; if no commit of this version is running, delete it or choose another version",
				ErrVersionClaimed, JoinURI(out.URI(), key))
		}
		if held.Payload == c.Payload && held.ConfigSHA256 == c.ConfigSHA256 {
			return nil
		}
		if exists, err := versionExists(ctx, out, prefix); err == nil && exists {
			return fmt.Errorf("%w: %s", ErrVersionExists, publishedMeanwhile)
		}
		return fmt.Errorf("%w: %s holds this version name for other content (config_sha256 %s, payload %s; claimed by %s) than this commit's (config_sha256 %s, payload %s). "+
			"Another commit of a different config or of other inputs is publishing this version; if none is running (it was killed), delete %s, or choose another version",
			ErrVersionClaimed, JoinURI(out.URI(), key), short(held.ConfigSHA256), short(held.Payload), holder(held),
			short(c.ConfigSHA256), short(c.Payload), JoinURI(out.URI(), key))
	}
	return fmt.Errorf("claim the version: %s was removed twice while this commit read it", JoinURI(out.URI(), key))
}

// short is the first 12 hex digits of a SHA-256, enough to tell two apart.
func short(sha string) string {
	if len(sha) > 12 {
		return sha[:12]
	}
	return sha
}

// holder says who wrote a claim, as far as it says.
func holder(c Claim) string {
	s := "a commit"
	if c.Host != "" {
		s += " on " + c.Host
	}
	if c.PID != 0 {
		s += fmt.Sprintf(" (pid %d)", c.PID)
	}
	if c.Created != "" {
		s += " of a run created " + c.Created
	}
	return s
}

// publishAll clears from the version folder what a commit killed part way
// left there that this one will not list, then publishes every file and
// syncs the folders. Unfinished writes (temporary files, pending uploads)
// are left alone here: they may be a commit's of the same content running
// at once; Commit removes them once the manifest is in place.
func publishAll(ctx context.Context, work, out Store, prefix string, files []commitFile) error {
	keep := map[string]bool{}
	for _, f := range files {
		keep[prefix+f.path] = true
	}
	if err := clearStale(ctx, out, prefix, keep); errors.Is(err, ErrVersionExists) {
		return fmt.Errorf("commit %s: %w: %s", JoinURI(out.URI(), prefix), ErrVersionExists, publishedMeanwhile)
	} else if err != nil {
		return fmt.Errorf("commit %s: clear what an unfinished commit left: %w", JoinURI(out.URI(), prefix), err)
	}
	for _, f := range files {
		if err := publish(ctx, work, f.work, out, prefix+f.path, f.sha); err != nil {
			return fmt.Errorf("commit %s: %w", JoinURI(out.URI(), prefix+f.path), err)
		}
	}
	if fs, ok := Unwrap(out).(FolderSyncer); ok {
		if err := fs.SyncFolders(ctx, prefix); err != nil {
			return fmt.Errorf("commit: %w", err)
		}
	}
	return nil
}

// UnfinishedDeleter is implemented by stores whose killed writers leave
// something that List does not show: local temporary files, S3 pending
// multipart uploads.
type UnfinishedDeleter interface {
	DeleteUnfinished(ctx context.Context, prefix string) error
}

// clearStale removes from the version folder prefix (which has no
// manifest.json, so is not a version, SPEC §4) the files that the new
// manifest will not list: what a commit of other content left when it was
// killed and its claim was then removed, or what an older hindcast left.
// Only commits of this content hold the claim now, and they publish the
// same files, so nothing removed here belongs to a live commit. The files
// it will list are left for publish to replace, or to keep when they
// already are the same.
func clearStale(ctx context.Context, out Store, prefix string, keep map[string]bool) error {
	var stale []string
	committed := false
	err := out.List(ctx, prefix, func(o ObjectInfo) error {
		switch {
		case o.Key == prefix+ManifestName:
			// Another commit of this version finished since our check:
			// the folder is a version now, and never touched again.
			committed = true
		case !keep[o.Key]:
			stale = append(stale, o.Key)
		}
		return nil
	})
	if err != nil && !errors.Is(err, ErrNotFound) {
		return err
	}
	if committed {
		return ErrVersionExists
	}
	for _, k := range stale {
		if err := out.Delete(ctx, k); err != nil {
			return err
		}
	}
	return nil
}

// FolderSyncer is implemented by stores whose new folders must be synced to
// be durable (local file systems).
type FolderSyncer interface {
	SyncFolders(ctx context.Context, prefix string) error
}

// Linker is implemented by stores that can publish another store's object
// without copying its bytes (hard links between local folders).
type Linker interface {
	Link(ctx context.Context, from Store, fromKey, key string) error
}

// publish puts one shard into the version: by a hard link or a
// server-side copy when the output store can (the bytes are the work
// area's, which pack sealed with their SHA-256), else by a copy checked on
// the way against that SHA-256.
func publish(ctx context.Context, work Store, from string, out Store, to, sha string) error {
	if l, ok := Unwrap(out).(Linker); ok {
		if err := l.Link(ctx, work, from, to); err == nil {
			return nil
		}
	}
	r, err := work.Open(ctx, from, 0)
	if err != nil {
		return err
	}
	defer r.Close()
	up, err := out.Create(ctx, to)
	if err != nil {
		return err
	}
	h := sha256.New()
	if _, err := io.Copy(io.MultiWriter(up, h), r); err != nil {
		up.Abort()
		return err
	}
	if got := hex.EncodeToString(h.Sum(nil)); got != sha {
		up.Abort()
		return fmt.Errorf("%s changed since pack: sha256 %s, recorded %s", JoinURI(work.URI(), from), got, sha)
	}
	return up.Commit(false)
}
