package pipeline

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"regexp"
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

// Commit publishes the packed shards into output/<dataset>/<version>/ and
// writes the manifest last, with an exclusive write, so that the version
// exists only once it is complete and an existing version is never replaced.
func Commit(ctx context.Context, work, out Store, m *Manifest, res *Result) error {
	prefix := VersionPrefix(m.Dataset, m.Version)
	if _, err := out.Stat(ctx, prefix+ManifestName); err == nil {
		return fmt.Errorf("commit %s: %w", JoinURI(out.URI(), prefix), ErrVersionExists)
	} else if !errors.Is(err, ErrNotFound) {
		return fmt.Errorf("commit %s: %w", JoinURI(out.URI(), prefix), err)
	}
	type shard struct{ work, path, sha string }
	var shards []shard
	for _, s := range res.Sealed[StagePack] {
		var p PackSummary
		if err := json.Unmarshal(s.Summary, &p); err != nil {
			return fmt.Errorf("commit: pack %s: %w", s.Item.ID, err)
		}
		for _, f := range p.Files {
			shards = append(shards, shard{f.Work, f.Path, f.SHA256})
		}
	}
	if q := m.Quarantine; q != nil {
		shards = append(shards, shard{q.Work, q.Path, q.SHA256})
	}
	keep := map[string]bool{}
	for _, f := range shards {
		keep[prefix+f.path] = true
	}
	if err := clearUnfinished(ctx, out, prefix, keep); errors.Is(err, ErrVersionExists) {
		return fmt.Errorf("commit %s: %w", JoinURI(out.URI(), prefix), ErrVersionExists)
	} else if err != nil {
		return fmt.Errorf("commit %s: clear what an unfinished commit left: %w", JoinURI(out.URI(), prefix), err)
	}
	for _, f := range shards {
		if err := publish(ctx, work, f.work, out, prefix+f.path, f.sha); err != nil {
			return fmt.Errorf("commit %s: %w", JoinURI(out.URI(), prefix+f.path), err)
		}
	}
	if fs, ok := Unwrap(out).(FolderSyncer); ok {
		if err := fs.SyncFolders(ctx, prefix); err != nil {
			return fmt.Errorf("commit: %w", err)
		}
	}
	b, err := json.MarshalIndent(m, "", "  ")
	if err != nil {
		return fmt.Errorf("commit: manifest: %w", err)
	}
	if err := Put(ctx, out, prefix+ManifestName, append(b, '\n'), true); err != nil {
		if errors.Is(err, ErrExists) {
			return fmt.Errorf("commit %s: %w", JoinURI(out.URI(), prefix), ErrVersionExists)
		}
		return err
	}
	return nil
}

// UnfinishedDeleter is implemented by stores whose killed writers leave
// something that List does not show: local temporary files, S3 pending
// multipart uploads.
type UnfinishedDeleter interface {
	DeleteUnfinished(ctx context.Context, prefix string) error
}

// clearUnfinished removes from the version folder prefix (which has no
// manifest.json, so is not a version, SPEC §4) what a commit killed part way
// left there: files that the new manifest will not list, and unfinished
// writes. The files it will list are left for publish to replace, or to
// keep when they already are the same: a second commit of the same version
// from the same work running at once then fails on its manifest write, but
// neither can leave a version that lacks one of its files.
func clearUnfinished(ctx context.Context, out Store, prefix string, keep map[string]bool) error {
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
	if u, ok := Unwrap(out).(UnfinishedDeleter); ok {
		return u.DeleteUnfinished(ctx, prefix)
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
