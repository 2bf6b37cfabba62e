package pipeline

import (
	"fmt"
	"time"
)

// Config is a resolved hindcast configuration (SPEC §2): defaults filled in,
// bounds expanded to one value per dimension, storage locations turned into
// absolute URIs. Its JSON form (the json tags) is what the manifest records
// under "config", and what config_sha256 hashes (without the storage
// locations), so every field that changes the output must appear here.
type Config struct {
	Dataset     string                 `yaml:"dataset" json:"dataset"`
	Source      SourceConfig           `yaml:"source" json:"source"`
	Work        string                 `yaml:"work" json:"work"`
	Output      string                 `yaml:"output" json:"output"`
	Partitions  int                    `yaml:"partitions" json:"partitions"`
	Seed        int64                  `yaml:"seed" json:"seed"`
	Embodiments map[string]*Embodiment `yaml:"embodiments" json:"embodiments"`
	Episodes    EpisodeConfig          `yaml:"episodes" json:"episodes"`
	Goals       GoalConfig             `yaml:"goals" json:"goals"`
	Splits      SplitConfig            `yaml:"splits" json:"splits"`
	SplitBy     string                 `yaml:"split_by" json:"split_by"`
	Float       string                 `yaml:"float" json:"float"`
	Parquet     ParquetConfig          `yaml:"parquet" json:"parquet"`
	Storage     StorageConfig          `yaml:"storage" json:"storage"`
	// Quarantine writes every dropped line, with its reason, object and line
	// number, to quarantine/ in the version. Off by default (and then absent
	// from the JSON form, so config_sha256 of older configs is unchanged).
	Quarantine bool `yaml:"quarantine" json:"quarantine,omitempty"`

	// Dir is the folder of the config file; plain paths are relative to it.
	Dir string `yaml:"-" json:"-"`
	// Path is the config file as given on the command line.
	Path string `yaml:"-" json:"-"`
}

// SourceConfig says where the fleet logs are and which keys to take.
type SourceConfig struct {
	URI          string   `yaml:"uri" json:"uri"`
	Include      []string `yaml:"include" json:"include"`
	Exclude      []string `yaml:"exclude" json:"exclude"`
	MaxLineBytes int      `yaml:"max_line_bytes" json:"max_line_bytes"`
}

// Embodiment describes one unit model: vector lengths, optional bounds,
// cameras and the goal definition.
type Embodiment struct {
	Obs           int       `yaml:"obs" json:"obs"`
	Act           int       `yaml:"act" json:"act"`
	ObsLow        []float64 `yaml:"obs_low" json:"obs_low,omitempty"`
	ObsHigh       []float64 `yaml:"obs_high" json:"obs_high,omitempty"`
	ActLow        []float64 `yaml:"act_low" json:"act_low,omitempty"`
	ActHigh       []float64 `yaml:"act_high" json:"act_high,omitempty"`
	Cameras       []string  `yaml:"cameras" json:"cameras"`
	GoalDims      []int     `yaml:"goal_dims" json:"goal_dims"`
	GoalTolerance float64   `yaml:"goal_tolerance" json:"goal_tolerance"`
}

// EpisodeConfig holds the segmentation rules of SPEC §3.2.
type EpisodeConfig struct {
	MaxGap   Duration `yaml:"max_gap" json:"max_gap"`
	MinSteps int      `yaml:"min_steps" json:"min_steps"`
	MaxSteps int      `yaml:"max_steps" json:"max_steps"`
}

// GoalConfig holds the goals per step and per strategy of SPEC §3.3.
type GoalConfig struct {
	Future    int     `yaml:"future" json:"future"`
	Geometric int     `yaml:"geometric" json:"geometric"`
	Final     int     `yaml:"final" json:"final"`
	Negative  int     `yaml:"negative" json:"negative"`
	Gamma     float64 `yaml:"gamma" json:"gamma"`
	Horizon   int     `yaml:"horizon" json:"horizon"`
}

// SplitConfig holds the split fractions; they sum to 1.
type SplitConfig struct {
	Train float64 `yaml:"train" json:"train"`
	Val   float64 `yaml:"val" json:"val"`
	Test  float64 `yaml:"test" json:"test"`
}

// ParquetConfig holds the shard writer settings.
type ParquetConfig struct {
	Compression  string `yaml:"compression" json:"compression"`
	RowGroupRows int    `yaml:"row_group_rows" json:"row_group_rows"`
}

// StorageConfig holds the object-store connection settings. They decide
// where and how bytes move, never what they are, so config_sha256 leaves
// them out. Credentials are never here: they come from the standard AWS
// chain (environment, shared config and profile, web identity).
type StorageConfig struct {
	// Endpoint of an S3-compatible store; empty means the SDK's own
	// resolution (AWS_ENDPOINT_URL_S3, AWS_ENDPOINT_URL, or AWS itself).
	Endpoint string `yaml:"endpoint" json:"endpoint,omitempty"`
	// PathStyle forces path-style addressing; nil means "true with a custom
	// endpoint, else virtual-hosted".
	PathStyle *bool `yaml:"path_style" json:"path_style,omitempty"`
	// Region; empty means the SDK's chain, else us-east-1.
	Region string `yaml:"region" json:"region,omitempty"`
	// MaxConcurrency bounds concurrent requests of one upload (its parts).
	MaxConcurrency int `yaml:"max_concurrency" json:"max_concurrency"`
	// PartSize is the multipart part size in bytes; smaller objects go in one PUT.
	PartSize int64 `yaml:"part_size" json:"part_size"`
	// Attempts is the most tries of one request (1 = no retry).
	Attempts int `yaml:"attempts" json:"attempts"`
	// Timeout bounds one request without progress.
	Timeout Duration `yaml:"timeout" json:"timeout"`
}

// Duration is a time.Duration written as Go duration text ("500ms") in YAML
// and JSON, so that the resolved config reads like the file it came from.
type Duration time.Duration

// MarshalJSON writes the duration as text.
func (d Duration) MarshalJSON() ([]byte, error) {
	return []byte(fmt.Sprintf("%q", time.Duration(d).String())), nil
}

// ConfigError is a config problem tied to a key and the line it is on; the
// CLI turns it into exit code 2 before any work is done.
type ConfigError struct {
	File string // the config file
	Key  string // dotted key, e.g. "goals.gamma"
	Line int    // 1-based line in the file, 0 when unknown
	Msg  string
}

func (e *ConfigError) Error() string {
	where := e.File
	if e.Line > 0 {
		where = fmt.Sprintf("%s:%d", e.File, e.Line)
	}
	if e.Key == "" {
		return fmt.Sprintf("config %s: %s", where, e.Msg)
	}
	return fmt.Sprintf("config %s: %s: %s", where, e.Key, e.Msg)
}
