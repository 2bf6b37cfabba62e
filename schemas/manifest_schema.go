package schemas

import (
	"bytes"
	_ "embed"
)

// ManifestSchema is the JSON Schema (draft 2020-12) of a dataset version's
// manifest.json (SPEC §5), as pipeline.BuildManifest writes it. Readers of
// datasets (training jobs, audits) validate against it before trusting a
// version; a test validates the demo's manifest with it, so the schema and
// the writer cannot drift apart unnoticed. Each call returns a fresh copy, so no
// importer can change what another reads.
func ManifestSchema() []byte { return bytes.Clone(manifestSchema) }

//go:embed manifest.schema.json
var manifestSchema []byte
