package schemas

import (
	"bytes"
	_ "embed"
)

// ConfigSchema is the JSON Schema (draft 2020-12) of the YAML config file
// read as JSON data (SPEC §2). Editors use it for completion and hover text;
// the loader in package pipeline stays the authority, since some rules (a
// bound list as long as obs, goal_dims below obs, splits summing to 1) are
// beyond what a schema can say. Each call returns a fresh copy, so no
// importer can change what another reads.
func ConfigSchema() []byte { return bytes.Clone(configSchema) }

//go:embed config.schema.json
var configSchema []byte
