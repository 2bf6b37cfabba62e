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
	// Recordings says how a recording (SPEC §7.1) names its unit and
	// embodiment and which of a message's times is its time. Nil when the
	// config has no recordings section and no embodiment has frames.
	Recordings *RecordingsConfig `yaml:"recordings" json:"recordings,omitempty"`
	// Gates are the checks a finished run must pass before it is committed
	// (nil: only the built-in gate that refuses a version without frames).
	Gates *GatesConfig `yaml:"gates" json:"gates,omitempty"`

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
	// ImageRoots are further prefixes (s3://… or file:///…, resolved, with a
	// trailing slash) that image references may name besides the source root.
	ImageRoots []string `yaml:"image_roots" json:"image_roots,omitempty"`
	// MaxImageBytes bounds one image; a larger one is image_missing.
	MaxImageBytes int64 `yaml:"max_image_bytes" json:"max_image_bytes,omitempty"`
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
	// Frames says how a recording's topics become this embodiment's frames
	// (SPEC §7.3); nil for an embodiment fed by JSON Lines only.
	Frames *FramesConfig `yaml:"frames" json:"frames,omitempty"`
}

// RecordingsConfig is SPEC §7.1's recordings section, defaults filled in.
type RecordingsConfig struct {
	Unit       IdentityRule `yaml:"unit" json:"unit"`
	Embodiment IdentityRule `yaml:"embodiment" json:"embodiment"`
	// Time is "log_time" or "publish_time".
	Time string `yaml:"time" json:"time"`
}

// IdentityRule finds a recording's unit or embodiment: either a key of the
// first Metadata record of a name, or the first capture group of an RE2
// expression matched against the object's key. Exactly one form is set.
type IdentityRule struct {
	Metadata string `yaml:"metadata" json:"metadata,omitempty"`
	Key      string `yaml:"key" json:"key,omitempty"`
	Path     string `yaml:"path" json:"path,omitempty"`
}

// Align modes of a frames source (SPEC §7.3).
const (
	AlignHold    = "hold"
	AlignNext    = "next"
	AlignNearest = "nearest"
	AlignLinear  = "linear"
)

// FramesConfig is an embodiment's frames section (SPEC §7.3), resolved:
// every source has its align and max_age filled in.
type FramesConfig struct {
	// Rate in ticks per second; 0 when Clock is set.
	Rate float64 `yaml:"rate" json:"rate,omitempty"`
	// Clock is the topic whose message times are the ticks; "" with Rate.
	Clock string `yaml:"clock" json:"clock,omitempty"`
	// MaxAge is the default max_age of every source.
	MaxAge Duration `yaml:"max_age" json:"max_age"`
	// Obs and Act are concatenated in order; Act is empty for an
	// observation-only embodiment.
	Obs []FieldSource `yaml:"obs" json:"obs"`
	Act []FieldSource `yaml:"act" json:"act,omitempty"`
	// Cameras maps a declared camera to its source (align is never linear).
	Cameras map[string]FieldSource `yaml:"cameras" json:"cameras,omitempty"`
	Events  *FieldRef              `yaml:"events" json:"events,omitempty"`
	Task    *FieldRef              `yaml:"task" json:"task,omitempty"`
	Success *FieldRef              `yaml:"success" json:"success,omitempty"`
}

// FieldSource is one topic field that feeds obs, act or a camera.
type FieldSource struct {
	Topic string `yaml:"topic" json:"topic"`
	// Field is a path: names separated by ".", "[i]" for one element,
	// "[a:b]" for a slice (SPEC §7.2).
	Field  string   `yaml:"field" json:"field"`
	Align  string   `yaml:"align" json:"align"`
	MaxAge Duration `yaml:"max_age" json:"max_age"`
}

// FieldRef is a topic field that feeds a label (events, task, success).
type FieldRef struct {
	Topic string `yaml:"topic" json:"topic"`
	Field string `yaml:"field" json:"field"`
}

// GatesConfig holds the quality gates checked after the last stage and
// before commit. A nil pointer or map means the gate is not set.
type GatesConfig struct {
	// MaxDropped is the largest share (0..1) of lines dropped overall.
	MaxDropped *float64 `yaml:"max_dropped" json:"max_dropped,omitempty"`
	// MaxDroppedBy bounds the share of lines dropped per reason.
	MaxDroppedBy map[string]float64 `yaml:"max_dropped_by" json:"max_dropped_by,omitempty"`
	// MaxSourceDropped is the largest share any single source may drop.
	MaxSourceDropped *float64 `yaml:"max_source_dropped" json:"max_source_dropped,omitempty"`
	// MaxSkipped and MaxIncomplete bound the skipped and incomplete objects.
	MaxSkipped    *int `yaml:"max_skipped" json:"max_skipped,omitempty"`
	MaxIncomplete *int `yaml:"max_incomplete" json:"max_incomplete,omitempty"`
	// MinEpisodes and MinFrames are per split (train, val, test).
	MinEpisodes map[string]int64 `yaml:"min_episodes" json:"min_episodes,omitempty"`
	MinFrames   map[string]int64 `yaml:"min_frames" json:"min_frames,omitempty"`
	// MaxDrift is the largest shift of a per-dimension mean, in standard
	// deviations of the baseline, against Baseline (a version name; "" means
	// the latest committed version of the dataset).
	MaxDrift *float64 `yaml:"max_drift" json:"max_drift,omitempty"`
	Baseline string   `yaml:"baseline" json:"baseline,omitempty"`
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
