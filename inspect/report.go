package inspect

import (
	"crypto/sha256"
	"encoding/base64"
	"encoding/json"
	"errors"
	"fmt"
	"html/template"
	"io"
	"math"
	"sort"
	"strconv"
	"strings"

	"hindcast/pipeline"
)

// Report writes a dataset version's report: one self-contained HTML page
// (inline style, inline SVG plots, one tiny inline script, nothing fetched
// from anywhere) that shows what the manifest says about the version —
// episode lengths, where lines were dropped and why, how goal offsets
// compare with the laws of SPEC §3.3, reward rates by offset and the train
// split's per-dimension ranges. Every string taken from the manifest is
// HTML-escaped, so a hostile object key cannot inject markup.
func Report(v *pipeline.Version, w io.Writer) error {
	if v == nil || v.Manifest == nil {
		return errors.New("report: no manifest")
	}
	m := v.Manifest
	cfg, err := rpParseConfig(m.Config)
	if err != nil {
		return fmt.Errorf("report %s/%s: %w", m.Dataset, m.Version, err)
	}
	p := rpPage{M: m, Tool: rpToolText(m.Tool), Script: template.JS(rpCheckScript), Style: template.CSS(rpStyle)}
	p.CSP = "default-src 'none'; style-src '" + rpHash(rpStyle) + "'; script-src '" + rpHash(rpCheckScript) +
		"'; img-src 'none'; base-uri 'none'; form-action 'none'"
	p.Funnel = []rpKV{
		{"objects", rpInt(m.Funnel.Objects)}, {"duplicate objects", rpInt(m.Funnel.DuplicateObjects)},
		{"lines", rpInt(m.Funnel.Lines)}, {"frames", rpInt(m.Funnel.Frames)},
		{"episodes", rpInt(m.Funnel.Episodes)}, {"pairs", rpInt(m.Funnel.Pairs)},
	}
	for _, r := range rpReasonOrder(m.Funnel.Dropped) {
		if n := m.Funnel.Dropped[r]; n > 0 {
			p.Drops = append(p.Drops, rpKV{r, rpInt(n) + " (" + rpPercent(float64(n), float64(m.Funnel.Lines)) + " of lines)"})
		}
	}
	for _, c := range m.Counts {
		p.Counts = append(p.Counts, [5]string{c.Embodiment, c.Split, rpInt(c.Episodes), rpInt(c.Frames), rpInt(c.Pairs)})
	}

	for _, emb := range rpEmbodiments(m) {
		svg, err := rpEpisodeHistogram(emb, m.EpisodeSteps[emb])
		if err != nil {
			return fmt.Errorf("report: %w", err)
		}
		p.EpisodePlots = append(p.EpisodePlots, svg)
	}
	p.DropPlots = append(p.DropPlots, rpDropsBySource(m), rpDropsByUnit(m))
	p.Recordings, p.StaleTopics = rpRecordings(m)

	offsets := map[string]map[int]int64{}
	reached := map[string]map[int]int64{}
	// Maps are read in key order here and below: Go randomizes map order,
	// and a float summed in another order can change in its last digit, so
	// one version would not always give the same page (nor the same error).
	for _, s := range rpSortedKeys(m.Offsets) {
		if offsets[s], err = rpOffsetCounts(m.Offsets[s]); err != nil {
			return fmt.Errorf("report: goal_offsets[%s]: %w", s, err)
		}
	}
	for _, s := range rpSortedKeys(m.Reached) {
		if reached[s], err = rpOffsetCounts(m.Reached[s]); err != nil {
			return fmt.Errorf("report: goal_reached[%s]: %w", s, err)
		}
	}
	strategies := rpStrategies(cfg, offsets)
	for _, s := range strategies {
		exp, expErr := rpExpectedOffsets(m.EpisodeSteps, s, cfg.Goals.Gamma, cfg.Goals.Horizon)
		p.GoalPlots = append(p.GoalPlots, rpOffsetPlot(s, offsets[s], exp, expErr))
	}
	p.GoalPlots = append(p.GoalPlots, rpRewardPlot(strategies, offsets, reached))
	if neg := offsets["negative"]; len(neg) > 0 || cfg.Goals.Negative > 0 {
		var n, r int64
		for _, c := range neg {
			n += c
		}
		for _, c := range reached["negative"] {
			r += c
		}
		p.Negative = fmt.Sprintf("negative: %s goals drawn from other episodes (offset −1); reward rate %s.",
			rpInt(n), rpPercent(float64(r), float64(n)))
	}

	for _, emb := range rpSortedKeys(m.Stats) {
		st := m.Stats[emb]
		p.StatPlots = append(p.StatPlots, rpRangePlot(emb, "obs", st.Obs))
		// An observation-only embodiment has no actions: no empty plot.
		if st.Act.Count > 0 && len(st.Act.Mean) > 0 {
			p.StatPlots = append(p.StatPlots, rpRangePlot(emb, "act", st.Act))
		}
	}
	if err := rpTemplate.Execute(w, &p); err != nil {
		return fmt.Errorf("report: writing HTML: %w", err)
	}
	return nil
}

// rpPage is what the page template shows; the plots are SVG built by the
// rpSVG writer, which escapes every string it is given.
type rpPage struct {
	M            *pipeline.Manifest
	Tool         string
	CSP          string
	Style        template.CSS
	Script       template.JS
	Funnel       []rpKV
	Drops        []rpKV
	Counts       [][5]string
	EpisodePlots []template.HTML
	DropPlots    []template.HTML
	GoalPlots    []template.HTML
	Negative     string
	StatPlots    []template.HTML
	// Recordings holds one row per recording (key, unit, embodiment,
	// ticks, kept, drops) and StaleTopics the stale ticks per topic, when
	// the version has recordings.
	Recordings  [][6]string
	StaleTopics []rpKV
}

type rpKV struct{ K, V string }

// rpConfig is the part of the resolved config the report needs.
type rpConfig struct {
	Goals struct {
		Future    int     `json:"future"`
		Geometric int     `json:"geometric"`
		Final     int     `json:"final"`
		Negative  int     `json:"negative"`
		Gamma     float64 `json:"gamma"`
		Horizon   int     `json:"horizon"`
	} `json:"goals"`
}

func rpParseConfig(raw json.RawMessage) (rpConfig, error) {
	var c rpConfig
	if len(raw) == 0 {
		return c, errors.New("manifest has no config")
	}
	if err := json.Unmarshal(raw, &c); err != nil {
		return c, fmt.Errorf("manifest config: %w", err)
	}
	return c, nil
}

// rpHash is a CSP source expression for an inline element's exact text
// (CSP Level 2, "hash-source"), so the page allows its own style and script
// and nothing else.
func rpHash(s string) string {
	h := sha256.Sum256([]byte(s))
	return "sha256-" + base64.StdEncoding.EncodeToString(h[:])
}

func rpToolText(t pipeline.ToolInfo) string {
	if t.Commit == "" {
		return t.Version
	}
	return t.Version + " (" + t.Commit + ")"
}

// rpEmbodiments lists the embodiments the manifest knows of (declared ones
// have stats; episode_steps can only name declared ones, but a hand-edited
// manifest might not), sorted.
func rpEmbodiments(m *pipeline.Manifest) []string {
	seen := map[string]bool{}
	for e := range m.Stats {
		seen[e] = true
	}
	for e := range m.EpisodeSteps {
		seen[e] = true
	}
	return rpSortedKeys(seen)
}

// rpStrategies lists the in-episode strategies to plot in SPEC §4's order
// (future, geometric, final), then any other name the manifest holds;
// negative goals have no offset law and are only counted.
func rpStrategies(cfg rpConfig, offsets map[string]map[int]int64) []string {
	var out []string
	configured := map[string]int{"future": cfg.Goals.Future, "geometric": cfg.Goals.Geometric, "final": cfg.Goals.Final}
	for _, s := range []string{"future", "geometric", "final"} {
		if configured[s] > 0 || len(offsets[s]) > 0 {
			out = append(out, s)
		}
	}
	for _, s := range rpSortedKeys(offsets) {
		if _, known := configured[s]; !known && s != "negative" {
			out = append(out, s)
		}
	}
	return out
}

// rpOffsetCounts turns a manifest count map keyed by decimal offset into
// one keyed by the offset.
func rpOffsetCounts(byOff map[string]int64) (map[int]int64, error) {
	out := make(map[int]int64, len(byOff))
	for _, k := range rpSortedKeys(byOff) { // in order: the first bad key is the one named
		n := byOff[k]
		off, err := strconv.Atoi(k)
		if err != nil {
			return nil, fmt.Errorf("offset %q is not an integer", k)
		}
		out[off] += n
	}
	return out, nil
}

// rpExpectedOffsets returns the expected share of each goal offset k
// (index k of the result, index 0 unused) of an in-episode strategy over
// the whole version, given its episode lengths (episode_steps: embodiment →
// T → episodes; offsets are not kept per embodiment, so all are summed).
//
// SPEC §3.3: in an episode of T steps, each step s = 0 … T−2 draws the same
// number of goals, each with an offset on 1…n_s, n_s = min(H or ∞, T−1−s):
//
//	future:    P_n(k) = 1/n                          for 1 ≤ k ≤ n
//	geometric: P_n(k) = (1−γ)γ^(k−1) / (1−γ^n)       for 1 ≤ k ≤ n
//	final:     the offset is T−1−s (no horizon), P(k) = [k = T−1−s]
//
// With c_T episodes of T steps, the expected share of offset k is
//
//	E(k) = Σ_T c_T Σ_{s=0}^{T−2} P_{n_s}(k)  /  Σ_T c_T (T−1).
//
// Steps are grouped by their n: as s runs over 0…T−2, T−1−s takes each
// value j = 1…T−1 once, so m(n) = Σ_T c_T #{j ≤ T−1 : min(j, H) = n}; then
// E(k) = Σ_{n≥k} m(n) P_n(k) / Σ_n m(n), a suffix sum over n (for geometric
// P_n(k) = w(k)/Z(n), w(k) = (1−γ)γ^(k−1), Z(n) = 1−γ^n). For final, the
// same m without the horizon gives E(k) = m(k) / Σ_n m(n): uniform over
// 1…T−1 within each episode.
func rpExpectedOffsets(steps map[string]map[string]int64, strategy string, gamma float64, horizon int) ([]float64, error) {
	if strategy != "future" && strategy != "geometric" && strategy != "final" {
		return nil, fmt.Errorf("no offset law for strategy %q", strategy)
	}
	if strategy == "geometric" && !(gamma > 0 && gamma < 1) {
		return nil, fmt.Errorf("goals.gamma %v is not in (0, 1)", gamma)
	}
	if horizon < 0 {
		return nil, fmt.Errorf("goals.horizon %d is negative", horizon)
	}
	if strategy == "final" || horizon == 0 {
		horizon = math.MaxInt
	}
	lengths := map[int]float64{}
	maxT := 0
	for _, emb := range rpSortedKeys(steps) {
		byT := steps[emb]
		for _, key := range rpSortedKeys(byT) {
			c := byT[key]
			T, err := strconv.Atoi(key)
			if err != nil || T < 1 {
				return nil, fmt.Errorf("episode_steps[%s]: %q is not a step count", emb, key)
			}
			if c < 0 {
				return nil, fmt.Errorf("episode_steps[%s][%s]: negative count %d", emb, key, c)
			}
			lengths[T] += float64(c)
			maxT = max(maxT, T)
		}
	}
	if maxT < 2 {
		return nil, nil
	}
	m := make([]float64, maxT) // m[n], n = 1 … maxT−1
	var total float64
	for _, T := range rpSortedInts(lengths) {
		c := lengths[T]
		for j := 1; j <= T-1; j++ {
			m[min(j, horizon)] += c
		}
		total += c * float64(T-1)
	}
	if total == 0 {
		return nil, nil
	}
	exp := make([]float64, maxT)
	var suffix float64
	lg := math.Log(gamma)
	for k := maxT - 1; k >= 1; k-- {
		switch strategy {
		case "future":
			suffix += m[k] / float64(k)
			exp[k] = suffix / total
		case "geometric":
			suffix += m[k] / -math.Expm1(float64(k)*lg)
			exp[k] = (1 - gamma) * math.Pow(gamma, float64(k-1)) * suffix / total
		case "final":
			exp[k] = m[k] / total
		}
	}
	// Trim the zero tail a horizon leaves.
	last := len(exp) - 1
	for last > 1 && exp[last] == 0 {
		last--
	}
	return exp[:last+1], nil
}

// rpTotalVariation is ½ Σ_k |observed share − expected share|, over the
// offsets ≥ 1 of either: 0 for a perfect match, 1 for disjoint laws.
// The counts are summed as integers and the terms in offset order, so the
// result does not depend on the map's iteration order.
func rpTotalVariation(obs map[int]int64, exp []float64) float64 {
	var n, beyond int64 // goals at offsets ≥ 1; those the law gives no share
	for _, k := range rpSortedInts(obs) {
		if k >= 1 {
			n += obs[k]
			if k >= len(exp) {
				beyond += obs[k]
			}
		}
	}
	if n == 0 {
		return math.NaN()
	}
	var tv float64
	for k := 1; k < len(exp); k++ {
		tv += math.Abs(float64(obs[k])/float64(n) - exp[k])
	}
	tv += float64(beyond) / float64(n)
	return tv / 2
}

// ---- plots ----

// Plot geometry, in SVG user units (CSS pixels at 100 %).
const (
	rpW       = 560.0
	rpLeft    = 56.0
	rpRight   = 16.0
	rpTop     = 50.0
	rpBottom  = 44.0
	rpCharW   = 6.8 // average advance of an 11 px sans-serif character (DejaVu Sans is wide), for layout
	rpMaxBars = 30
)

// rpRecordings gives the report's recording rows: ticks and drops per
// recording (or why it was skipped), and stale ticks per topic.
func rpRecordings(m *pipeline.Manifest) (rows [][6]string, stale []rpKV) {
	r := recordingsOf(m)
	if r == nil {
		return nil, nil
	}
	for _, x := range r.Recordings {
		if x.Skipped != "" {
			rows = append(rows, [6]string{x.Key, "", "", "", "", "skipped: " + x.Skipped})
			continue
		}
		key := x.Key
		if x.Incomplete {
			key += " (incomplete)"
		}
		rows = append(rows, [6]string{key, x.Unit, x.Embodiment, rpInt(x.Ticks), rpInt(x.Kept), countsText(x.Dropped, rpReasonOrder(x.Dropped))})
	}
	for _, topic := range rpSortedKeys(r.StaleBy) {
		stale = append(stale, rpKV{topic, rpInt(r.StaleBy[topic])})
	}
	return rows, stale
}

// rpReasonColor gives each drop reason of SPEC §3.1/§3.2 one colour in
// every plot (a Tableau-style categorical palette); unknown names are grey.
func rpReasonColor(r string) string {
	switch r {
	case pipeline.Oversize:
		return "#4e79a7"
	case pipeline.Truncated:
		return "#f28e2b"
	case pipeline.Stale:
		return "#86bcb6"
	case pipeline.Malformed:
		return "#e15759"
	case pipeline.UnknownEmbodiment:
		return "#76b7b2"
	case pipeline.DimMismatch:
		return "#59a14f"
	case pipeline.NonFinite:
		return "#edc948"
	case pipeline.OutOfRange:
		return "#b07aa1"
	case pipeline.ImageMissing:
		return "#ff9da7"
	case pipeline.ImageCorrupt:
		return "#9c755f"
	case pipeline.TimeRegress:
		return "#bab0ac"
	case pipeline.Duplicate:
		return "#2f4b7c"
	case pipeline.Conflict:
		return "#bcbd22"
	case pipeline.ShortEpisode:
		return "#5b4a9e"
	}
	return "#7f7f7f"
}

// rpStrategyColor gives each goal strategy one colour.
func rpStrategyColor(s string) string {
	switch s {
	case "future":
		return "#4e79a7"
	case "geometric":
		return "#f28e2b"
	case "final":
		return "#59a14f"
	}
	return "#b07aa1"
}

// rpReasonOrder lists the reasons of counts in SPEC order, then unknown
// names sorted.
func rpReasonOrder(counts ...map[string]int64) []string {
	present := map[string]bool{}
	for _, c := range counts {
		for r := range c {
			present[r] = true
		}
	}
	var out []string
	for _, r := range pipeline.Reasons() {
		if present[r] {
			out = append(out, r)
			delete(present, r)
		}
	}
	return append(out, rpSortedKeys(present)...)
}

// rpSVG writes one plot's SVG; every attribute value and text it is given
// is HTML-escaped here, which is what keeps manifest strings inert.
type rpSVG struct{ b strings.Builder }

func rpNewSVG(plot, group string, h float64, label string) *rpSVG {
	s := &rpSVG{}
	fmt.Fprintf(&s.b, `<svg class="plot" data-plot="%s" data-group="%s" width="%s" height="%s" viewBox="0 0 %s %s" role="img" aria-label="%s">`,
		rpEsc(plot), rpEsc(group), rpNum(rpW), rpNum(h), rpNum(rpW), rpNum(h), rpEsc(label))
	return s
}

func (s *rpSVG) html() template.HTML {
	s.b.WriteString("</svg>")
	return template.HTML(s.b.String()) // every piece was escaped as it was written
}

func (s *rpSVG) rect(x, y, w, h float64, fill, tip string) {
	fmt.Fprintf(&s.b, `<rect x="%s" y="%s" width="%s" height="%s" fill="%s">`, rpNum(x), rpNum(y), rpNum(max(w, 0)), rpNum(max(h, 0)), rpEsc(fill))
	s.tip(tip)
	s.b.WriteString("</rect>")
}

func (s *rpSVG) line(x1, y1, x2, y2 float64, class string) {
	fmt.Fprintf(&s.b, `<line x1="%s" y1="%s" x2="%s" y2="%s" class="%s"/>`, rpNum(x1), rpNum(y1), rpNum(x2), rpNum(y2), rpEsc(class))
}

func (s *rpSVG) coloredLine(x1, y1, x2, y2 float64, stroke string, width float64) {
	fmt.Fprintf(&s.b, `<line x1="%s" y1="%s" x2="%s" y2="%s" stroke="%s" stroke-width="%s"/>`,
		rpNum(x1), rpNum(y1), rpNum(x2), rpNum(y2), rpEsc(stroke), rpNum(width))
}

func (s *rpSVG) circle(x, y, r float64, fill, tip string) {
	fmt.Fprintf(&s.b, `<circle cx="%s" cy="%s" r="%s" fill="%s">`, rpNum(x), rpNum(y), rpNum(r), rpEsc(fill))
	s.tip(tip)
	s.b.WriteString("</circle>")
}

func (s *rpSVG) polyline(pts [][2]float64, stroke string, width float64) {
	if len(pts) == 0 {
		return
	}
	var b strings.Builder
	for i, p := range pts {
		if i > 0 {
			b.WriteByte(' ')
		}
		b.WriteString(rpNum(p[0]) + "," + rpNum(p[1]))
	}
	fmt.Fprintf(&s.b, `<polyline points="%s" fill="none" stroke="%s" stroke-width="%s" stroke-linejoin="round"/>`,
		b.String(), rpEsc(stroke), rpNum(width))
}

// text writes a text element; anchor is start, middle or end.
func (s *rpSVG) text(x, y float64, anchor, class, txt, tip string) {
	fmt.Fprintf(&s.b, `<text x="%s" y="%s" text-anchor="%s" class="%s">%s`, rpNum(x), rpNum(y), rpEsc(anchor), rpEsc(class), rpEsc(txt))
	s.tip(tip)
	s.b.WriteString("</text>")
}

func (s *rpSVG) tip(tip string) {
	if tip != "" {
		s.b.WriteString("<title>" + rpEsc(tip) + "</title>")
	}
}

// heading writes the plot's title and subtitle.
func (s *rpSVG) heading(title, sub string) {
	s.text(12, 20, "start", "title", title, "")
	if sub != "" {
		s.text(12, 37, "start", "sub", sub, "")
	}
}

// rpFrame maps data coordinates into a plot area inside margins.
type rpFrame struct {
	W, H, L, R, T, B float64
	X0, X1, Y0, Y1   float64
	XTicks, YTicks   []rpTick
	XLabel, YLabel   string
	XGrid, YGrid     bool
}

type rpTick struct {
	V     float64
	Label string
}

func (f *rpFrame) X(v float64) float64 {
	if f.X1 == f.X0 {
		return f.L
	}
	return f.L + (v-f.X0)/(f.X1-f.X0)*(f.W-f.L-f.R)
}

func (f *rpFrame) Y(v float64) float64 {
	if f.Y1 == f.Y0 {
		return f.H - f.B
	}
	return f.H - f.B - (v-f.Y0)/(f.Y1-f.Y0)*(f.H-f.T-f.B)
}

// axes draws grid lines, the two axes, tick marks, tick labels and axis
// labels.
func (f *rpFrame) axes(s *rpSVG) {
	left, right, top, bottom := f.L, f.W-f.R, f.T, f.H-f.B
	for _, t := range f.YTicks {
		y := f.Y(t.V)
		if f.YGrid {
			s.line(left, y, right, y, "grid")
		}
		s.line(left-4, y, left, y, "axis")
		s.text(left-7, y+3.5, "end", "tick", t.Label, "")
	}
	for _, t := range f.XTicks {
		x := f.X(t.V)
		if f.XGrid {
			s.line(x, top, x, bottom, "grid")
		}
		s.line(x, bottom, x, bottom+4, "axis")
		s.text(x, bottom+16, "middle", "tick", t.Label, "")
	}
	s.line(left, bottom, right, bottom, "axis")
	s.line(left, top, left, bottom, "axis")
	if f.XLabel != "" {
		s.text((left+right)/2, bottom+33, "middle", "label", f.XLabel, "")
	}
	if f.YLabel != "" {
		y := (top + bottom) / 2
		fmt.Fprintf(&s.b, `<text x="0" y="0" text-anchor="middle" class="label" transform="translate(14 %s) rotate(-90)">%s</text>`, rpNum(y), rpEsc(f.YLabel))
	}
}

// rpNiceStep is the smallest of 1, 2, 5 × 10^e that is at least raw
// (common practice for readable axis ticks).
func rpNiceStep(raw float64) float64 {
	if !(raw > 0) || math.IsInf(raw, 0) {
		return 1
	}
	e := math.Pow(10, math.Floor(math.Log10(raw)))
	for _, m := range []float64{1, 2, 5, 10} {
		if m*e >= raw*(1-1e-9) {
			return m * e
		}
	}
	return 10 * e
}

// rpTicks returns about n nice ticks covering [lo, hi], and the domain
// widened to whole steps.
func rpTicks(lo, hi float64, n int, label func(v, step float64) string) (ticks []rpTick, d0, d1 float64) {
	if hi < lo {
		lo, hi = hi, lo
	}
	if hi == lo {
		if lo == 0 {
			hi = 1
		} else {
			lo, hi = lo-math.Abs(lo)*0.5, hi+math.Abs(hi)*0.5
		}
	}
	// The finest 1-2-5 step from half the plain one up that gives at most
	// n+3 ticks, so that a range a hair over n steps is not widened to n/2.5.
	var step float64
	for step = rpNiceStep((hi - lo) / float64(max(n, 1)) / 2); ; step = rpNiceStep(step * 1.5) {
		d0, d1 = math.Floor(lo/step+1e-9)*step, math.Ceil(hi/step-1e-9)*step
		if (d1-d0)/step+1 <= float64(n+3)+1e-9 {
			break
		}
	}
	for i := 0; ; i++ {
		v := d0 + float64(i)*step
		if v > d1+step*1e-9 {
			break
		}
		if math.Abs(v) < step*1e-9 {
			v = 0
		}
		ticks = append(ticks, rpTick{V: v, Label: label(v, step)})
	}
	return ticks, d0, d1
}

// rpNumLabel formats a tick value with as many decimals as its step needs,
// thousands as "k" from 10 000 on.
func rpNumLabel(v, step float64) string {
	if math.Abs(v) >= 10000 && math.Mod(step, 1000) == 0 {
		return strconv.FormatFloat(v/1000, 'f', rpDecimals(step/1000), 64) + "k"
	}
	return strconv.FormatFloat(v, 'f', rpDecimals(step), 64)
}

func rpPercentLabel(v, step float64) string {
	return strconv.FormatFloat(v*100, 'f', rpDecimals(step*100), 64) + "%"
}

func rpDecimals(step float64) int {
	if step >= 1 {
		return 0
	}
	return min(int(math.Ceil(-math.Log10(step)-1e-9)), 8)
}

// rpIntTicks picks nice integer ticks inside [lo, hi] (no widening).
func rpIntTicks(lo, hi int, n int) []rpTick {
	step := max(int(rpNiceStep(float64(hi-lo)/float64(max(n, 1)))), 1)
	var out []rpTick
	first := (lo + step - 1) / step * step
	if lo <= 0 {
		first = 0
	}
	if first > lo && step > 1 {
		out = append(out, rpTick{V: float64(lo), Label: strconv.Itoa(lo)})
		if float64(first-lo) < float64(step)*0.5 {
			first += step
		}
	}
	for v := first; v <= hi; v += step {
		out = append(out, rpTick{V: float64(v), Label: strconv.Itoa(v)})
	}
	return out
}

// rpLegendItem is one legend entry: a swatch (a box, or a short line for
// a line series) and its name.
type rpLegendItem struct {
	Name, Color string
	Line        bool
}

// rpLegendColumn is the width of one legend column: the swatch and the
// longest name.
func rpLegendColumn(items []rpLegendItem) float64 {
	var longest int
	for _, it := range items {
		longest = max(longest, len([]rune(it.Name)))
	}
	return 18 + float64(longest)*rpCharW + 14
}

// rpLegendHeight is the height the legend takes from left to the plot's
// right edge, items laid out in equal columns.
func rpLegendHeight(items []rpLegendItem, left float64) float64 {
	if len(items) == 0 {
		return 0
	}
	cols := max(int((rpW-rpRight-left)/rpLegendColumn(items)), 1)
	return float64((len(items)+cols-1)/cols) * 16
}

// legend draws the items in equal columns from (left, y), y being the
// first row's text baseline.
func (s *rpSVG) legend(items []rpLegendItem, left, y float64) {
	if len(items) == 0 {
		return
	}
	colW := rpLegendColumn(items)
	cols := max(int((rpW-rpRight-left)/colW), 1)
	for i, it := range items {
		x, yy := left+float64(i%cols)*colW, y+float64(i/cols)*16
		if it.Line {
			s.coloredLine(x, yy-4, x+14, yy-4, it.Color, 2)
		} else {
			s.rect(x, yy-10, 12, 10, it.Color, "")
		}
		s.text(x+18, yy, "start", "legend", it.Name, "")
	}
}

// rpEpisodeHistogram draws the episode length histogram of one embodiment.
// Bins: about √N of them (N episodes, the square-root choice — common
// practice), clamped to 10…40 so a few dozen episodes still show a shape, with a width rounded up to 1, 2 or 5 × 10^e
// steps and edges on multiples of it, so every bin reads as a round range.
func rpEpisodeHistogram(emb string, byT map[string]int64) (template.HTML, error) {
	lengths, err := rpOffsetCounts(byT)
	if err != nil {
		return "", fmt.Errorf("episode_steps[%s]: %w", emb, err)
	}
	var n, steps int64
	lo, hi := math.MaxInt, 0
	for _, T := range rpSortedInts(lengths) {
		c := lengths[T]
		if c <= 0 {
			continue
		}
		n += c
		steps += int64(T) * c
		lo, hi = min(lo, T), max(hi, T)
	}
	f := &rpFrame{W: rpW, H: 290, L: rpLeft, R: rpRight, T: rpTop, B: rpBottom, XLabel: "steps per episode", YLabel: "episodes", YGrid: true}
	title := "Episode lengths — " + emb
	s := rpNewSVG("episode-lengths", emb, f.H, title)
	if n == 0 {
		s.heading(title, "no episodes")
		f.XTicks, f.X0, f.X1 = rpTicks(0, 1, 4, rpNumLabel)
		f.YTicks, f.Y0, f.Y1 = rpTicks(0, 1, 4, rpNumLabel)
		f.axes(s)
		return s.html(), nil
	}
	target := min(max(int(math.Ceil(math.Sqrt(float64(n)))), 10), 40)
	width := max(int(rpNiceStep(float64(hi-lo+1)/float64(target))), 1)
	start := lo / width * width
	bins := make([]int64, (hi-start)/width+1)
	for _, T := range rpSortedInts(lengths) {
		if c := lengths[T]; c > 0 {
			bins[(T-start)/width] += c
		}
	}
	var top int64
	for _, c := range bins {
		top = max(top, c)
	}
	f.X0, f.X1 = float64(start), float64(start+len(bins)*width)
	f.YTicks, f.Y0, f.Y1 = rpTicks(0, float64(top), 5, rpNumLabel)
	f.XTicks = rpIntTicks(start, start+len(bins)*width, 8)
	binWord := fmt.Sprintf("bins of %d steps", width)
	if width == 1 {
		binWord = "one bin per length"
	}
	s.heading(title, fmt.Sprintf("%s · %s steps in all · %d–%d steps each · %s", rpCount(n, "episode", "episodes"), rpInt(steps), lo, hi, binWord))
	f.axes(s)
	for i, c := range bins {
		if c == 0 {
			continue
		}
		a, b := start+i*width, start+(i+1)*width
		x0, x1 := f.X(float64(a)), f.X(float64(b))
		gap := min(1.0, (x1-x0)*0.1)
		rangeText := fmt.Sprintf("%d–%d steps", a, b-1)
		if width == 1 {
			rangeText = fmt.Sprintf("%d steps", a)
		}
		s.rect(x0+gap, f.Y(float64(c)), x1-x0-2*gap, f.Y(0)-f.Y(float64(c)), "#4e79a7",
			rangeText+": "+rpCount(c, "episode", "episodes"))
	}
	return s.html(), nil
}

// rpStackRow is one bar of a stacked bar chart: drop counts by reason.
type rpStackRow struct {
	Label  string
	Counts map[string]int64
	Total  int64
}

// rpSourcePrefix is the first depth folder segments of a source key, or the
// whole key when it lies in fewer folders.
func rpSourcePrefix(key string, depth int) string {
	seg := strings.Split(key, "/")
	if len(seg)-1 < depth {
		return key
	}
	return strings.Join(seg[:depth], "/")
}

// rpSourceDepth is the shallowest folder depth whose prefixes tell the
// sources apart: with every object under 2026/, the first segment would put
// them all in one bar. When no folder depth separates them (one folder),
// each object is its own group.
func rpSourceDepth(keys []string) int {
	maxDepth := 0
	for _, k := range keys {
		maxDepth = max(maxDepth, strings.Count(k, "/"))
	}
	for d := 1; d <= maxDepth; d++ {
		seen := map[string]bool{}
		for _, k := range keys {
			seen[rpSourcePrefix(k, d)] = true
		}
		if len(seen) > 1 {
			return d
		}
	}
	return maxDepth + 1
}

// rpDropsBySource draws dropped lines per source prefix, stacked by reason.
func rpDropsBySource(m *pipeline.Manifest) template.HTML {
	byPrefix := map[string]*rpStackRow{}
	objects := map[string]int{}
	keys := make([]string, 0, len(m.Sources))
	for _, src := range m.Sources {
		keys = append(keys, src.Key)
	}
	depth := rpSourceDepth(keys)
	for _, src := range m.Sources {
		p := rpSourcePrefix(src.Key, depth)
		if byPrefix[p] == nil {
			byPrefix[p] = &rpStackRow{Label: p, Counts: map[string]int64{}}
		}
		objects[p]++
		for r, n := range src.Dropped {
			byPrefix[p].Counts[r] += n
			byPrefix[p].Total += n
		}
	}
	var rows []rpStackRow
	var dropped int64
	for _, p := range rpSortedKeys(byPrefix) {
		row := *byPrefix[p]
		row.Label = fmt.Sprintf("%s (%d)", p, objects[p])
		rows = append(rows, row)
		dropped += row.Total
	}
	sub := fmt.Sprintf("%s of %s lines dropped · %s under %s (objects per prefix in brackets)",
		rpInt(dropped), rpInt(m.Funnel.Lines), rpCount(int64(len(m.Sources)), "object", "objects"), rpCount(int64(len(rows)), "prefix", "prefixes"))
	return rpStackedBars("drops-by-source", "Dropped lines by source prefix", sub, "source prefix", rows)
}

// rpDropsByUnit draws the units with the most dropped lines (at most
// rpMaxBars), stacked by reason; unit "" holds lines whose unit could not
// be read.
func rpDropsByUnit(m *pipeline.Manifest) template.HTML {
	var rows []rpStackRow
	for _, u := range m.Units {
		row := rpStackRow{Label: u.Unit, Counts: map[string]int64{}}
		if u.Unit == "" {
			row.Label = "(unreadable)"
		}
		for r, n := range u.Dropped {
			row.Counts[r] += n
			row.Total += n
		}
		if row.Total > 0 {
			rows = append(rows, row)
		}
	}
	withDrops := len(rows)
	sort.SliceStable(rows, func(i, j int) bool {
		if rows[i].Total != rows[j].Total {
			return rows[i].Total > rows[j].Total
		}
		return rows[i].Label < rows[j].Label
	})
	if len(rows) > rpMaxBars {
		rows = rows[:rpMaxBars]
	}
	sub := fmt.Sprintf("%d of %d units dropped lines", withDrops, len(m.Units))
	if withDrops > rpMaxBars {
		sub += fmt.Sprintf(" · the %d with the most shown", rpMaxBars)
	}
	return rpStackedBars("drops-by-unit", "Dropped lines by unit", sub, "unit", rows)
}

// rpStackedBars draws horizontal bars, one per row, split by reason, with
// a legend of the reasons under the axis.
func rpStackedBars(plot, title, sub, what string, rows []rpStackRow) template.HTML {
	const rowH = 18.0
	var all []map[string]int64
	var longest int
	var top int64
	for _, r := range rows {
		all = append(all, r.Counts)
		longest = max(longest, len([]rune(r.Label)))
		top = max(top, r.Total)
	}
	reasons := rpReasonOrder(all...)
	var items []rpLegendItem
	for _, r := range reasons {
		items = append(items, rpLegendItem{Name: r, Color: rpReasonColor(r)})
	}
	left := min(max(float64(longest)*rpCharW+14, 80), 230)
	maxChars := int((left-14)/rpCharW + 1e-6)
	legendH := rpLegendHeight(items, 12)
	bars := max(len(rows), 1)
	f := &rpFrame{W: rpW, L: left, R: rpRight + 24, T: rpTop, XLabel: "dropped lines", XGrid: true}
	f.B = rpBottom + 8 + legendH
	f.H = f.T + float64(bars)*rowH + f.B
	s := rpNewSVG(plot, "", f.H, title)
	s.heading(title, sub)
	f.XTicks, f.X0, f.X1 = rpTicks(0, float64(top), 5, rpNumLabel)
	f.Y0, f.Y1 = 0, float64(bars)
	f.axes(s)
	if len(rows) == 0 {
		s.text((f.L+f.W-f.R)/2, f.T+rowH*0.65, "middle", "note", "no "+what+" dropped a line", "")
	}
	for i, r := range rows {
		y := f.T + float64(i)*rowH
		label := r.Label
		if rs := []rune(label); len(rs) > maxChars {
			label = string(rs[:maxChars-1]) + "…"
		}
		s.text(f.L-7, y+rowH/2+3.5, "end", "row", label, r.Label)
		x := f.L
		for _, reason := range reasons {
			n := r.Counts[reason]
			if n <= 0 {
				continue
			}
			w := f.X(float64(n)) - f.X(0)
			s.rect(x, y+3, w, rowH-6, rpReasonColor(reason), fmt.Sprintf("%s: %s %s", r.Label, rpInt(n), reason))
			x += w
		}
		if r.Total > 0 {
			s.text(x+4, y+rowH/2+3.5, "start", "value", rpInt(r.Total), "")
		}
	}
	s.legend(items, 12, f.H-f.B+rpBottom+10)
	return s.html()
}

// rpOffsetPlot draws one strategy's observed offset shares as bars against
// its expected law as a line.
func rpOffsetPlot(strategy string, obs map[int]int64, exp []float64, expErr error) template.HTML {
	var n int64
	maxK := len(exp) - 1
	for _, k := range rpSortedInts(obs) {
		if k >= 1 {
			n += obs[k]
			maxK = max(maxK, k)
		}
	}
	maxK = max(maxK, 1)
	var top float64
	for _, k := range rpSortedInts(obs) {
		if k >= 1 {
			top = max(top, float64(obs[k])/float64(n))
		}
	}
	for _, e := range exp {
		top = max(top, e)
	}
	title := "Goal offsets — " + strategy
	f := &rpFrame{W: rpW, H: 290, L: rpLeft, R: rpRight, T: rpTop + 6, B: rpBottom, XLabel: "offset (steps ahead)", YLabel: "share of goals", YGrid: true}
	s := rpNewSVG("goal-offsets", strategy, f.H, title)
	sub := rpCount(n, "goal", "goals")
	switch {
	case expErr != nil:
		sub += " · no expected law: " + expErr.Error()
	case len(exp) == 0:
		sub += " · no expected law (no episode of 2 steps or more)"
	case n > 0:
		sub += fmt.Sprintf(" · total variation from the expected law %.4f", rpTotalVariation(obs, exp))
	}
	s.heading(title, sub)
	f.X0, f.X1 = 0.5, float64(maxK)+0.5
	f.XTicks = rpIntTicks(1, maxK, 8)
	f.YTicks, f.Y0, f.Y1 = rpTicks(0, top, 5, rpPercentLabel)
	f.axes(s)
	bw := f.X(1.5) - f.X(0.5)
	gap := 0.0
	if bw >= 4 {
		gap = bw * 0.12
	}
	for _, k := range rpSortedInts(obs) {
		if k < 1 || n == 0 {
			continue
		}
		share := float64(obs[k]) / float64(n)
		tip := fmt.Sprintf("offset %d: %s (%s)", k, rpCount(obs[k], "goal", "goals"), rpPercent(float64(obs[k]), float64(n)))
		if k < len(exp) {
			tip += ", expected " + strconv.FormatFloat(exp[k]*100, 'f', 2, 64) + "%"
		}
		s.rect(f.X(float64(k)-0.5)+gap, f.Y(share), bw-2*gap, f.Y(0)-f.Y(share), "#9db7d5", tip)
	}
	if len(exp) > 1 {
		var pts [][2]float64
		for k := 1; k < len(exp); k++ {
			pts = append(pts, [2]float64{f.X(float64(k)), f.Y(exp[k])})
		}
		s.polyline(pts, "#c0392b", 1.6)
	}
	items := []rpLegendItem{{Name: "observed", Color: "#9db7d5"}, {Name: "expected (SPEC §3.3)", Color: "#c0392b", Line: true}}
	s.legend(items, f.W-f.R-2*rpLegendColumn(items), f.T-6)
	return s.html()
}

// rpRewardPlot draws, per in-episode strategy, the share of goals reached
// (reward 1) at each offset.
func rpRewardPlot(strategies []string, offsets, reached map[string]map[int]int64) template.HTML {
	maxK := 1
	for _, st := range strategies {
		for k := range offsets[st] {
			maxK = max(maxK, k)
		}
	}
	title := "Reward rate by offset"
	f := &rpFrame{W: rpW, L: rpLeft, R: rpRight, T: rpTop, XLabel: "offset (steps ahead)", YLabel: "goals reached", YGrid: true}
	var items []rpLegendItem
	for _, st := range strategies {
		var n, r int64
		for _, k := range rpSortedInts(offsets[st]) {
			if k >= 1 {
				n += offsets[st][k]
				r += reached[st][k]
			}
		}
		items = append(items, rpLegendItem{Name: fmt.Sprintf("%s (%s overall)", st, rpPercent(float64(r), float64(n))), Color: rpStrategyColor(st), Line: true})
	}
	f.B = rpBottom + 8 + rpLegendHeight(items, rpLeft)
	f.H = 290 + f.B - rpBottom
	s := rpNewSVG("reward-by-offset", "", f.H, title)
	s.heading(title, "reached goals / goals at each offset (goal_reached / goal_offsets)")
	f.X0, f.X1 = 0.5, float64(maxK)+0.5
	f.XTicks = rpIntTicks(1, maxK, 8)
	f.YTicks, f.Y0, f.Y1 = rpTicks(0, 1, 5, rpPercentLabel)
	f.axes(s)
	for _, st := range strategies {
		var pts [][2]float64
		var ks []int
		for _, k := range rpSortedInts(offsets[st]) {
			if c := offsets[st][k]; k >= 1 && c > 0 {
				pts = append(pts, [2]float64{f.X(float64(k)), f.Y(float64(reached[st][k]) / float64(c))})
				ks = append(ks, k)
			}
		}
		s.polyline(pts, rpStrategyColor(st), 1.4)
		if len(pts) <= 60 { // few points: mark each, with its counts
			for i, p := range pts {
				k := ks[i]
				s.circle(p[0], p[1], 2.2, rpStrategyColor(st), fmt.Sprintf("%s, offset %d: %s of %s reached", st, k, rpInt(reached[st][k]), rpInt(offsets[st][k])))
			}
		}
	}
	s.legend(items, f.L, f.H-f.B+rpBottom+10)
	return s.html()
}

// rpRangePlot draws one embodiment's per-dimension obs or act range over
// the train split: a bar from min to max, a dot at the mean and a whisker
// of ± one (population) standard deviation.
func rpRangePlot(emb, vec string, st pipeline.VectorStats) template.HTML {
	d := min(len(st.Mean), len(st.Std), len(st.Min), len(st.Max))
	title := vec + " ranges — " + emb
	f := &rpFrame{W: rpW, H: 290, L: rpLeft, R: rpRight, T: rpTop, B: rpBottom, XLabel: vec + " dimension", YLabel: "value", YGrid: true}
	s := rpNewSVG(vec+"-ranges", emb, f.H, title)
	if st.Count == 0 || d == 0 {
		s.heading(title, "no train rows with "+vec)
		f.XTicks, f.X0, f.X1 = rpTicks(0, 1, 4, rpNumLabel)
		f.YTicks, f.Y0, f.Y1 = rpTicks(0, 1, 4, rpNumLabel)
		f.axes(s)
		return s.html()
	}
	// Each dimension is drawn in its own units of standard deviation from
	// its mean, so that one 0–100 dimension does not flatten the others on
	// a shared axis; the tooltips keep the raw values.
	z := func(i int, v float64) float64 {
		sd := st.Std[i]
		if sd <= 0 || math.IsNaN(sd) {
			sd = 1 // a constant dimension: every value is its mean
		}
		return (v - st.Mean[i]) / sd
	}
	lo, hi := -1.0, 1.0
	for i := 0; i < d; i++ {
		lo = min(lo, z(i, st.Min[i]))
		hi = max(hi, z(i, st.Max[i]))
	}
	s.heading(title, fmt.Sprintf("train split, %s rows · per dimension, in standard deviations from its mean · bar: min–max · dot: mean · whisker: ± std", rpInt(st.Count)))
	f.YLabel = "(value − mean) / std"
	f.X0, f.X1 = -0.5, float64(d)-0.5
	f.XTicks = rpIntTicks(0, d-1, 12)
	f.YTicks, f.Y0, f.Y1 = rpTicks(lo, hi, 6, rpNumLabel)
	f.axes(s)
	band := f.X(0.5) - f.X(-0.5)
	bw := min(max(band*0.5, 2), 28)
	for i := 0; i < d; i++ {
		x := f.X(float64(i))
		tip := fmt.Sprintf("%s[%d]: min %s, max %s, mean %s ± %s", vec, i, rpG(st.Min[i]), rpG(st.Max[i]), rpG(st.Mean[i]), rpG(st.Std[i]))
		top, bottom := f.Y(z(i, st.Max[i])), f.Y(z(i, st.Min[i]))
		s.rect(x-bw/2, top, bw, max(bottom-top, 1), "#c6d4e6", tip)
		s.coloredLine(x, f.Y(-1), x, f.Y(1), "#1f3b5c", 2.5)
		s.circle(x, f.Y(0), 3.2, "#e15759", tip)
	}
	return s.html()
}

// ---- small helpers ----

func rpEsc(s string) string { return template.HTMLEscapeString(s) }

// rpNum formats an SVG coordinate: one decimal at most.
func rpNum(v float64) string {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return "0"
	}
	s := strconv.FormatFloat(math.Round(v*10)/10, 'f', 1, 64)
	s = strings.TrimSuffix(s, ".0")
	if s == "-0" {
		return "0"
	}
	return s
}

func rpG(v float64) string { return strconv.FormatFloat(v, 'g', 4, 64) }

// rpInt writes n with thousands separators.
func rpInt(n int64) string {
	s := strconv.FormatInt(n, 10)
	neg := strings.HasPrefix(s, "-")
	s = strings.TrimPrefix(s, "-")
	var b strings.Builder
	for i, c := range s {
		if i > 0 && (len(s)-i)%3 == 0 {
			b.WriteByte(',')
		}
		b.WriteRune(c)
	}
	if neg {
		return "-" + b.String()
	}
	return b.String()
}

// rpCount writes n and the noun in the number it needs.
func rpCount(n int64, one, many string) string {
	if n == 1 {
		return "1 " + one
	}
	return rpInt(n) + " " + many
}

func rpPercent(a, b float64) string {
	if b == 0 {
		return "–"
	}
	p := 100 * a / b
	if p != 0 && p < 0.1 {
		return strconv.FormatFloat(p, 'f', 3, 64) + "%"
	}
	return strconv.FormatFloat(p, 'f', 1, 64) + "%"
}

func rpSortedKeys[V any](m map[string]V) []string {
	keys := make([]string, 0, len(m))
	for k := range m {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	return keys
}

func rpSortedInts[V any](m map[int]V) []int {
	keys := make([]int, 0, len(m))
	for k := range m {
		keys = append(keys, k)
	}
	sort.Ints(keys)
	return keys
}

// ---- page ----

// rpCheckScript runs after load and records, in #plot-check, whether every
// plot rendered: a non-empty bounding box and at least one drawn element.
// A headless browser reads it from the dumped DOM.
const rpCheckScript = `
addEventListener("load", function () {
  var plots = document.querySelectorAll("svg.plot"), ok = 0, failed = [];
  plots.forEach(function (p) {
    var b = p.getBBox();
    var drawn = p.querySelector("rect, path, line, circle, polyline") !== null;
    if (b.width > 0 && b.height > 0 && drawn) { ok++; return; }
    var g = p.getAttribute("data-group");
    failed.push(p.getAttribute("data-plot") + (g ? "/" + g : ""));
  });
  document.getElementById("plot-check").textContent =
    JSON.stringify({plots: plots.length, ok: ok, failed: failed});
});
`

const rpStyle = `
:root { color-scheme: light; }
body { margin: 0; background: #f4f5f7; color: #1d232a;
  font: 15px/1.5 system-ui, -apple-system, "Segoe UI", Roboto, "Liberation Sans", "DejaVu Sans", Arial, sans-serif; }
main { max-width: 1180px; margin: 0 auto; padding: 24px 28px 40px; }
header { background: #fff; border: 1px solid #e0e3e8; border-radius: 8px; padding: 18px 22px; }
h1 { font-size: 26px; margin: 0 0 4px; font-weight: 650; }
h1 .ver { color: #59636e; font-weight: 450; }
h2 { font-size: 19px; margin: 30px 0 10px; font-weight: 620; }
dl.meta { display: grid; grid-template-columns: max-content 1fr; gap: 2px 18px; margin: 10px 0 0; font-size: 14px; }
dl.meta dt { color: #59636e; }
dl.meta dd { margin: 0; overflow-wrap: anywhere; }
code, .mono { font-family: "DejaVu Sans Mono", "Liberation Mono", Menlo, Consolas, monospace; font-size: 13px; }
.tables { display: flex; flex-wrap: wrap; gap: 16px; align-items: flex-start; }
table { border-collapse: collapse; background: #fff; border: 1px solid #e0e3e8; border-radius: 8px; font-size: 14px; }
th, td { padding: 4px 12px; text-align: left; border-bottom: 1px solid #eef0f3; }
td.n { text-align: right; font-variant-numeric: tabular-nums; }
th { color: #59636e; font-weight: 600; }
.grid { display: grid; grid-template-columns: repeat(auto-fill, minmax(min(560px, 100%), 1fr)); gap: 16px; }
figure { margin: 0; background: #fff; border: 1px solid #e0e3e8; border-radius: 8px; padding: 6px; }
svg.plot { display: block; max-width: 100%; height: auto; font-family: inherit; }
svg.plot text { font-size: 11px; fill: #3a434d; }
svg.plot text.title { font-size: 14px; font-weight: 620; fill: #1d232a; }
svg.plot text.sub { fill: #6a737d; }
svg.plot text.label { fill: #59636e; }
svg.plot text.note { fill: #8a939d; font-style: italic; }
svg.plot text.value { fill: #59636e; font-size: 10px; }
svg.plot line.axis { stroke: #5c6670; stroke-width: 1; }
svg.plot line.grid { stroke: #e6e9ed; stroke-width: 1; }
p.note { color: #59636e; font-size: 14px; margin: 8px 0 0; }
footer { margin-top: 28px; color: #8a939d; font-size: 12px; }
#plot-check { display: inline-block; margin: 4px 0 0; font-size: 12px; }
`

var rpTemplate = template.Must(template.New("report").Parse(`<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta http-equiv="Content-Security-Policy" content="{{.CSP}}">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{{.M.Dataset}} {{.M.Version}} — hindcast report</title>
<style>{{.Style}}</style>
</head>
<body>
<main>
<header>
<h1>{{.M.Dataset}} <span class="ver">{{.M.Version}}</span></h1>
<dl class="meta">
<dt>created</dt><dd>{{.M.Created}}</dd>
<dt>digest</dt><dd class="mono">{{.M.Digest}}</dd>
<dt>config sha256</dt><dd class="mono">{{.M.ConfigSHA256}}</dd>
<dt>source root</dt><dd class="mono">{{.M.SourceRoot}}</dd>
<dt>seed</dt><dd>{{.M.Seed}}</dd>
<dt>tool</dt><dd>{{.Tool}}</dd>
</dl>
</header>

<h2>Funnel</h2>
<div class="tables">
<table><tbody>{{range .Funnel}}<tr><th>{{.K}}</th><td class="n">{{.V}}</td></tr>{{end}}</tbody></table>
{{if .Drops}}<table><thead><tr><th>drop reason</th><th>lines</th></tr></thead><tbody>{{range .Drops}}<tr><td>{{.K}}</td><td class="n">{{.V}}</td></tr>{{end}}</tbody></table>{{end}}
{{if .Counts}}<table><thead><tr><th>embodiment</th><th>split</th><th>episodes</th><th>frames</th><th>pairs</th></tr></thead><tbody>
{{range .Counts}}<tr><td>{{index . 0}}</td><td>{{index . 1}}</td><td class="n">{{index . 2}}</td><td class="n">{{index . 3}}</td><td class="n">{{index . 4}}</td></tr>
{{end}}</tbody></table>{{end}}
</div>

<h2>Episodes</h2>
<div class="grid">{{range .EpisodePlots}}<figure>{{.}}</figure>
{{end}}</div>

<h2>Dropped lines</h2>
<div class="grid">{{range .DropPlots}}<figure>{{.}}</figure>
{{end}}</div>

{{if .Recordings}}<h2>Recordings</h2>
<div class="tables">
<table><thead><tr><th>recording</th><th>unit</th><th>embodiment</th><th>ticks</th><th>kept</th><th>dropped</th></tr></thead><tbody>
{{range .Recordings}}<tr><td class="mono">{{index . 0}}</td><td>{{index . 1}}</td><td>{{index . 2}}</td><td class="n">{{index . 3}}</td><td class="n">{{index . 4}}</td><td>{{index . 5}}</td></tr>
{{end}}</tbody></table>
{{if .StaleTopics}}<table><thead><tr><th>stale by topic</th><th>ticks</th></tr></thead><tbody>{{range .StaleTopics}}<tr><td class="mono">{{.K}}</td><td class="n">{{.V}}</td></tr>{{end}}</tbody></table>{{end}}
</div>
{{end}}
<h2>Goals</h2>
<div class="grid">{{range .GoalPlots}}<figure>{{.}}</figure>
{{end}}</div>
{{if .Negative}}<p class="note">{{.Negative}}</p>{{end}}

<h2>Train split ranges</h2>
<div class="grid">{{range .StatPlots}}<figure>{{.}}</figure>
{{end}}</div>

<footer>
hindcast report of {{.M.Dataset}}/{{.M.Version}}<pre id="plot-check" hidden>not run</pre>
</footer>
</main>
<script>{{.Script}}</script>
</body>
</html>
`))
