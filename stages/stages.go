// Package stages holds hindcast's stages, one file each: ingest, episodes,
// goals and pack. Each implements pipeline.Stage; the order of All is the
// stage graph (each stage reads the sealed items of those before it).
package stages

import "hindcast/pipeline"

// All returns the stages in run order.
func All() []pipeline.Stage {
	return []pipeline.Stage{Ingest{}, Episodes{}, Goals{}, &Pack{}}
}
