package inspect

import (
	"fmt"
	"strings"

	"hindcast/pipeline"
)

// ShowRecordings summarises a version's recordings (SPEC §7.6): what
// became of their ticks, which were skipped and why, and which topic made
// ticks stale. A version without recordings has none.
type ShowRecordings struct {
	// Read counts the recordings whose ticks were assembled (duplicates
	// and skipped ones left out); Ticks and Kept are theirs.
	Read  int64 `json:"read"`
	Ticks int64 `json:"ticks"`
	Kept  int64 `json:"kept"`
	// Skipped counts the recordings skipped whole, every reason present.
	Skipped map[string]int64 `json:"skipped"`
	// StaleBy and Undecodable sum the recordings' counts per topic.
	StaleBy     map[string]int64 `json:"stale_by"`
	Undecodable map[string]int64 `json:"undecodable"`
	// Recordings lists each recording that was read or skipped, by key.
	Recordings []ShowRecording `json:"recordings"`
}

// ShowRecording is one recording: ticks and drops, or why it was skipped.
type ShowRecording struct {
	Key        string           `json:"key"`
	Unit       string           `json:"unit,omitempty"`
	Embodiment string           `json:"embodiment,omitempty"`
	Skipped    string           `json:"skipped,omitempty"`
	Ticks      int64            `json:"ticks"`
	Kept       int64            `json:"kept"`
	Dropped    map[string]int64 `json:"dropped"`
	StaleBy    map[string]int64 `json:"stale_by"`
	Incomplete bool             `json:"incomplete"`
}

// recordingsOf gathers the recordings of a manifest, or nil when it has
// none.
func recordingsOf(m *pipeline.Manifest) *ShowRecordings {
	r := &ShowRecordings{Skipped: map[string]int64{}, StaleBy: map[string]int64{}, Undecodable: map[string]int64{},
		Recordings: []ShowRecording{}}
	for _, reason := range pipeline.SkipReasons() {
		r.Skipped[reason] = 0
	}
	for _, s := range m.Sources {
		if s.Recording == nil && s.Skipped == "" {
			continue
		}
		one := ShowRecording{Key: s.Key, Skipped: s.Skipped, Ticks: s.Lines, Kept: s.Kept,
			Dropped: map[string]int64{}, StaleBy: map[string]int64{}, Incomplete: s.Incomplete}
		for reason, n := range s.Dropped {
			if n != 0 {
				one.Dropped[reason] = n
			}
		}
		if s.Skipped != "" {
			r.Skipped[s.Skipped]++
		}
		if rec := s.Recording; rec != nil {
			one.Unit, one.Embodiment = rec.Unit, rec.Embodiment
			r.Read++
			r.Ticks += s.Lines
			r.Kept += s.Kept
			for topic, n := range rec.StaleBy {
				one.StaleBy[topic] = n
				r.StaleBy[topic] += n
			}
			for topic, n := range rec.Undecodable {
				r.Undecodable[topic] += n
			}
		}
		r.Recordings = append(r.Recordings, one)
	}
	if len(r.Recordings) == 0 {
		return nil
	}
	return r
}

// writeText prints the recordings section of show.
func (r *ShowRecordings) writeText(p *shWriter) {
	var skipped []string
	for _, reason := range pipeline.SkipReasons() {
		if n := r.Skipped[reason]; n > 0 {
			skipped = append(skipped, fmt.Sprintf("%d %s", n, reason))
		}
	}
	p.printf("\nrecordings %d read, %d ticks, %d kept; skipped: %s\n", r.Read, r.Ticks, r.Kept, cmpOrNone(strings.Join(skipped, ", ")))
	rows := [][]string{}
	for _, x := range r.Recordings {
		if x.Skipped != "" {
			rows = append(rows, []string{x.Key, "-", "-", "skipped: " + x.Skipped, "", ""})
			continue
		}
		mark := ""
		if x.Incomplete {
			mark = " (incomplete)"
		}
		rows = append(rows, []string{x.Key + mark, x.Unit, x.Embodiment, fmt.Sprint(x.Ticks), fmt.Sprint(x.Kept), countsText(x.Dropped, shReasons(x.Dropped))})
	}
	p.table(1, []string{"recording", "unit", "embodiment", "ticks", "kept", "dropped"}, rows)
	if len(r.StaleBy) > 0 {
		p.printf("stale ticks by topic\n")
		rows = nil
		for _, topic := range shSortedKeys(r.StaleBy) {
			rows = append(rows, []string{topic, fmt.Sprint(r.StaleBy[topic])})
		}
		p.table(1, []string{"topic", "ticks"}, rows)
	}
	if len(r.Undecodable) > 0 {
		p.printf("undecodable messages by topic\n")
		rows = nil
		for _, topic := range shSortedKeys(r.Undecodable) {
			rows = append(rows, []string{topic, fmt.Sprint(r.Undecodable[topic])})
		}
		p.table(1, []string{"topic", "messages"}, rows)
	}
}

func cmpOrNone(s string) string {
	if s == "" {
		return "none"
	}
	return s
}

// countsText writes counts as "a 1, b 2" in the given order, leaving out
// zeros.
func countsText(counts map[string]int64, order []string) string {
	var parts []string
	for _, k := range order {
		if n := counts[k]; n != 0 {
			parts = append(parts, fmt.Sprintf("%s %d", k, n))
		}
	}
	return strings.Join(parts, ", ")
}

// vfRecordings checks the recording entries of a manifest against SPEC
// §7.6 and against the rest of the manifest.
func vfRecordings(m *pipeline.Manifest, add func(subject, check, format string, a ...any)) {
	skipped := map[string]int64{}
	for _, s := range m.Sources {
		subject := "source " + s.Key
		if s.Recording != nil && s.Skipped != "" {
			add(subject, "recording", "has both a recording entry and skipped %q", s.Skipped)
		}
		if s.DuplicateOf != nil && (s.Recording != nil || s.Skipped != "") {
			add(subject, "recording", "a duplicate object has a recording entry or a skip")
		}
		if s.Skipped != "" {
			skipped[s.Skipped]++
			if s.Lines != 0 || s.Kept != 0 {
				add(subject, "recording", "skipped as %s but has %d lines, %d kept", s.Skipped, s.Lines, s.Kept)
			}
		}
		if r := s.Recording; r != nil {
			if r.Ticks != s.Lines {
				add(subject, "recording", "ticks %d ≠ lines %d", r.Ticks, s.Lines)
			}
			var stale int64
			for _, n := range r.StaleBy {
				stale += n
			}
			if stale != s.Dropped[pipeline.Stale] {
				add(subject, "recording", "Σ stale_by %d ≠ dropped stale %d", stale, s.Dropped[pipeline.Stale])
			}
		}
	}
	for _, reason := range shSortedKeys(skipped) {
		if m.Funnel.SkippedObjects[reason] != skipped[reason] {
			add("funnel", "conservation", "skipped_objects %s %d ≠ %d sources skipped as %s", reason, m.Funnel.SkippedObjects[reason], skipped[reason], reason)
		}
	}
	for reason, n := range m.Funnel.SkippedObjects {
		if _, ok := skipped[reason]; !ok && n != 0 {
			add("funnel", "conservation", "skipped_objects %s %d, no source is skipped as %s", reason, n, reason)
		}
	}
}
