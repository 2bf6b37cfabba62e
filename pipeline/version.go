package pipeline

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"strings"
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

// OpenVersion opens the version folder at uri (a local path, file:// or
// s3:// URI). It fails clearly on a folder that is not a version and on a
// manifest of a format this build does not read.
func OpenVersion(ctx context.Context, uri string, storage StorageConfig) (*Version, error) {
	uri = ResolveURI(uri)
	if !strings.HasSuffix(uri, "/") {
		uri += "/"
	}
	store, err := (&Opener{Storage: storage}).Open(ctx, uri)
	if err != nil {
		return nil, err
	}
	raw, err := ReadAll(ctx, store, ManifestName)
	if err != nil {
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
