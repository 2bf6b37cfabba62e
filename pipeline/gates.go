package pipeline

import (
	"errors"
	"fmt"
	"math"
	"slices"
	"strings"
)

// Gate is one quality gate checked on a finished run before commit: what
// was measured against which threshold. The manifest records every gate
// checked, so a published version says what it was held to.
type Gate struct {
	Name      string  `json:"name"`
	Threshold float64 `json:"threshold"`
	Value     float64 `json:"value"`
	// Subject names what the value was measured on, where one thing decides
	// it (the source that dropped most, the split with fewest episodes).
	Subject string `json:"subject,omitempty"`
	// Result is "pass", "fail" or "waived" (failed, published by an
	// operator's --waive).
	Result string `json:"result"`
}

// Gate results.
const (
	GatePass   = "pass"
	GateFail   = "fail"
	GateWaived = "waived"
)

// GateNoFrames is the gate that always holds: a version with no frames is
// never published.
const GateNoFrames = "min_frames_total"

// ErrGateFailed is wrapped by a GateError: the data is bad, the job did not
// break (exit code 3).
var ErrGateFailed = errors.New("quality gate failed")

// GateError lists the gates a run failed; nothing was committed.
type GateError struct{ Failed []Gate }

func (e *GateError) Error() string {
	var b strings.Builder
	fmt.Fprintf(&b, "%d quality gate(s) failed, nothing committed:", len(e.Failed))
	for _, g := range e.Failed {
		fmt.Fprintf(&b, "\n  %s", g.Describe())
	}
	return b.String()
}

func (e *GateError) Unwrap() error { return ErrGateFailed }

// Describe is one gate on one line: name, measured value, threshold.
func (g Gate) Describe() string {
	cmp := "at most"
	if strings.HasPrefix(g.Name, "min_") {
		cmp = "at least"
	}
	s := fmt.Sprintf("%s: %s, %s %s", g.Name, fmtGateValue(g.Value), cmp, fmtGateValue(g.Threshold))
	if g.Subject != "" {
		s += " (" + g.Subject + ")"
	}
	return s + " — " + g.Result
}

func fmtGateValue(v float64) string {
	if math.IsInf(v, 0) {
		return fmt.Sprint(v)
	}
	return fmt.Sprintf("%.6g", v)
}

// GateOptions are an operator's overrides for one run: gates to waive by
// name (a failed waived gate is recorded as waived and does not stop the
// commit), and the baseline version for the drift gate.
type GateOptions struct {
	Waive    []string
	Baseline string
}

// CheckGates checks every configured gate, and the built-in no-frames gate,
// on a manifest built but not committed. baseline is the version the drift
// gate compares with (nil: none to compare with, the gate passes with value
// 0 and names no baseline). It returns every gate checked, in a fixed order,
// and a *GateError when any failed and was not waived.
func CheckGates(cfg *Config, m *Manifest, baseline *Manifest, drift DriftFunc, opt GateOptions) ([]Gate, error) {
	var gates []Gate
	add := func(name string, threshold, value float64, subject string, fail bool) {
		g := Gate{Name: name, Threshold: threshold, Value: value, Subject: subject, Result: GatePass}
		if fail {
			g.Result = GateFail
			// An empty version has nothing to publish: that gate holds.
			if name != GateNoFrames && slices.Contains(opt.Waive, name) {
				g.Result = GateWaived
			}
		}
		gates = append(gates, g)
	}
	f := m.Funnel
	add(GateNoFrames, 1, float64(f.Frames), "", f.Frames < 1)
	if gc := cfg.Gates; gc != nil {
		share := func(n, of int64) float64 {
			if of == 0 {
				return 0
			}
			return float64(n) / float64(of)
		}
		if gc.MaxDropped != nil {
			var d int64
			for _, n := range f.Dropped {
				d += n
			}
			v := share(d, f.Lines)
			add("max_dropped", *gc.MaxDropped, v, "", v > *gc.MaxDropped)
		}
		for _, r := range sortedKeys(gc.MaxDroppedBy) {
			v := share(f.Dropped[r], f.Lines)
			add("max_dropped_by."+r, gc.MaxDroppedBy[r], v, "", v > gc.MaxDroppedBy[r])
		}
		if gc.MaxSourceDropped != nil {
			// The source that dropped the largest share of its own lines;
			// the earlier key on a tie (sources are sorted by key).
			var worst string
			var wv float64
			for _, s := range m.Sources {
				var d int64
				for _, n := range s.Dropped {
					d += n
				}
				if v := share(d, s.Lines); worst == "" || v > wv {
					worst, wv = s.Key, v
				}
			}
			add("max_source_dropped", *gc.MaxSourceDropped, wv, worst, wv > *gc.MaxSourceDropped)
		}
		if gc.MaxSkipped != nil {
			// No object is skipped whole by ingest today (SPEC §7.1's skips
			// belong to recordings); the count is the sources marked so.
			var n int64
			for _, s := range m.Sources {
				for _, r := range []string{SkipUnreadable, SkipNoUnit} {
					if s.Dropped["skip:"+r] > 0 {
						n++
					}
				}
			}
			add("max_skipped", float64(*gc.MaxSkipped), float64(n), "", n > int64(*gc.MaxSkipped))
		}
		if gc.MaxIncomplete != nil {
			var n int64
			var first string
			for _, s := range m.Sources {
				if s.Incomplete {
					if n == 0 {
						first = s.Key
					}
					n++
				}
			}
			add("max_incomplete", float64(*gc.MaxIncomplete), float64(n), first, n > int64(*gc.MaxIncomplete))
		}
		perSplit := func(name string, min map[string]int64, get func(Count) int64) {
			for _, sp := range Splits() {
				want, ok := min[sp]
				if !ok {
					continue
				}
				var n int64
				for _, c := range m.Counts {
					if c.Split == sp {
						n += get(c)
					}
				}
				add(name+"."+sp, float64(want), float64(n), "", n < want)
			}
		}
		perSplit("min_episodes", gc.MinEpisodes, func(c Count) int64 { return c.Episodes })
		perSplit("min_frames", gc.MinFrames, func(c Count) int64 { return c.Frames })
		if gc.MaxDrift != nil {
			v, subject := 0.0, "no baseline"
			if baseline != nil && drift != nil {
				v, subject = drift(baseline.Stats, m.Stats)
				subject += " against " + baseline.Version
			}
			if math.IsInf(v, 0) {
				// A constant dimension whose value changed: an infinite
				// shift, recorded as the largest float (JSON has no Inf).
				v, subject = math.MaxFloat64, "infinite shift: "+subject
			}
			add("max_drift", *gc.MaxDrift, v, subject, v > *gc.MaxDrift)
		}
	}
	var failed []Gate
	for _, g := range gates {
		if g.Result == GateFail {
			failed = append(failed, g)
		}
	}
	if len(failed) > 0 {
		return gates, &GateError{Failed: failed}
	}
	return gates, nil
}

// DriftFunc measures the largest drift of base to cur (the mean shift in
// the baseline's standard deviations) and names where it is.
type DriftFunc func(base, cur map[string]EmbodimentStats) (float64, string)
