package pipeline

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io/fs"
	"net/url"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"syscall"
)

// Version is a committed dataset version opened for reading: its folder's
// store and its manifest.
type Version struct {
	URI      string // the version folder, ending in "/"
	Store    Store  // rooted at the version folder
	Manifest *Manifest
	// Raw is manifest.json as stored, for checks that must see it exactly.
	Raw []byte
}

// ErrNotVersion is returned (wrapped) for a folder without a manifest.
var ErrNotVersion = errors.New("not a dataset version (no manifest.json)")

// notVersionError is an ErrNotVersion that says more precisely what the
// location is instead (a missing folder, a file, a dataset folder), so that
// the message helps while callers keep testing errors.Is(err, ErrNotVersion).
type notVersionError struct{ uri, what string }

func (e *notVersionError) Error() string { return "open " + e.uri + ": " + e.what }
func (e *notVersionError) Unwrap() error { return ErrNotVersion }

// maxListedVersions bounds the versions named when a dataset folder is
// given instead of a version: default versions are timestamps, so a folder
// may hold many, and the latest are the likely wanted ones.
const maxListedVersions = 10

// OpenVersion opens the version folder at uri (a local path, file:// or
// s3:// URI). The location may also name the version's manifest.json, which
// is what a user who has just looked at it tends to paste. It fails clearly
// on a folder that is not a version and on a manifest of a format this
// build does not read.
func OpenVersion(ctx context.Context, uri string, storage StorageConfig) (*Version, error) {
	uri = versionFolderURI(ResolveURI(uri))
	if !strings.HasSuffix(uri, "/") {
		uri += "/"
	}
	store, err := (&Opener{Storage: storage}).Open(ctx, uri)
	if err != nil {
		return nil, err
	}
	raw, err := ReadAll(ctx, store, ManifestName)
	if err != nil {
		if local, ok := Unwrap(store).(*LocalStore); ok {
			if nv := diagnoseLocalNonVersion(uri, local.Root()); nv != nil {
				return nil, nv
			}
		}
		if errors.Is(err, ErrNotFound) {
			return nil, fmt.Errorf("open %s: %w", uri, ErrNotVersion)
		}
		return nil, fmt.Errorf("open %s: %w", uri, err)
	}
	var probe struct {
		Format *int `json:"format"`
	}
	if err := json.Unmarshal(raw, &probe); err != nil {
		return nil, fmt.Errorf("open %s: manifest.json is not JSON: %w", uri, err)
	}
	if probe.Format == nil || *probe.Format != ManifestFormat {
		got := "none"
		if probe.Format != nil {
			got = fmt.Sprint(*probe.Format)
		}
		return nil, fmt.Errorf("open %s: manifest format %s, this hindcast reads format %d", uri, got, ManifestFormat)
	}
	var m Manifest
	if err := json.Unmarshal(raw, &m); err != nil {
		return nil, fmt.Errorf("open %s: manifest.json: %w", uri, err)
	}
	return &Version{URI: uri, Store: store, Manifest: &m, Raw: raw}, nil
}

// versionFolderURI drops a trailing "/manifest.json" off a resolved
// location, so that naming a version's manifest opens the version. A local
// folder that happens to be called manifest.json is left alone.
func versionFolderURI(uri string) string {
	folder, ok := strings.CutSuffix(uri, "/"+ManifestName)
	if !ok {
		return uri
	}
	if u, err := url.Parse(uri); err == nil && u.Scheme == "file" {
		if info, err := os.Stat(u.Path); err == nil && info.IsDir() {
			return uri
		}
	}
	return folder
}

// diagnoseLocalNonVersion says what the local folder dir (where no manifest
// could be read) is instead of a version: missing, a file, or a dataset
// folder whose subfolders are versions (then it names them). It returns nil
// when it has nothing more precise to say than ErrNotVersion.
func diagnoseLocalNonVersion(uri, dir string) error {
	info, err := os.Stat(dir)
	switch {
	case errors.Is(err, fs.ErrNotExist), errors.Is(err, syscall.ENOTDIR): // ENOTDIR: under a file
		return &notVersionError{strings.TrimSuffix(uri, "/"), "no such folder"}
	case err != nil:
		return nil
	case !info.IsDir():
		return &notVersionError{strings.TrimSuffix(uri, "/"), "a file, not a version folder"}
	}
	entries, err := os.ReadDir(dir)
	if err != nil {
		return nil
	}
	var versions []string
	for _, e := range entries {
		if !e.IsDir() {
			continue
		}
		if st, err := os.Stat(filepath.Join(dir, e.Name(), ManifestName)); err == nil && st.Mode().IsRegular() {
			versions = append(versions, e.Name())
		}
	}
	if len(versions) == 0 {
		return nil
	}
	sort.Strings(versions)
	what := "a dataset folder, not a version; its versions: " + strings.Join(versions, ", ")
	if n := len(versions); n > maxListedVersions {
		what = fmt.Sprintf("a dataset folder, not a version; its %d versions, the last %d: %s", n, maxListedVersions, strings.Join(versions[n-maxListedVersions:], ", "))
	}
	return &notVersionError{uri, what}
}

// ResolveURI turns a command-line location into a URI: URIs are kept, a
// plain path becomes an absolute file:// URI.
func ResolveURI(loc string) string {
	if strings.Contains(loc, "://") {
		return loc
	}
	abs, err := absPath(loc)
	if err != nil {
		return loc
	}
	return "file://" + abs
}
