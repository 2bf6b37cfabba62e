// Package pipeline is hindcast's runtime core: the strict config loader,
// the stage graph and its content-addressed cache keys, the bounded
// deterministic runner (one process or a share of a cluster's workers),
// the storage interface with its local-folder and S3 backends and their
// decorators, the manifest, the quality gates and the commit that
// publishes a version.
//
// It knows nothing of what a stage computes: stages (package stages) are
// values that turn sealed items of the stage before into sealed items of
// their own, and the runner decides only what must run, where and when.
// That split is why a rerun after a config change recomputes only the
// stages whose inputs changed, and why the same inputs give byte-identical
// files whatever the concurrency or worker count.
package pipeline
