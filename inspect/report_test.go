package inspect

import (
	"bytes"
	"context"
	"encoding/json"
	"encoding/xml"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"regexp"
	"slices"
	"sort"
	"strconv"
	"strings"
	"testing"
	"time"

	"hindcast/fleet"
	"hindcast/pipeline"
	"hindcast/stages"
)

// ---- helpers (prefixed rpT so they do not clash with the package's other tests) ----

// rpTRun runs every stage over the config at cfgPath with version "v1" and
// opens the committed version.
func rpTRun(t *testing.T, cfgPath string) *pipeline.Version {
	t.Helper()
	cfg, err := pipeline.LoadConfig(cfgPath)
	if err != nil {
		t.Fatalf("loading %s: %v", cfgPath, err)
	}
	ctx := context.Background()
	_, err = pipeline.Execute(ctx, cfg, stages.All(), pipeline.Options{
		Version: "v1", Parallel: 2,
		Tool: pipeline.ToolInfo{Version: pipeline.ToolVersion, Commit: "test"},
		Now:  func() time.Time { return time.Date(2026, 12, 1, 3, 4, 5, 0, time.UTC) },
	})
	if err != nil {
		t.Fatalf("running the pipeline: %v", err)
	}
	v, err := pipeline.OpenVersion(ctx, pipeline.JoinURI(cfg.Output, pipeline.VersionPrefix(cfg.Dataset, "v1")), pipeline.StorageConfig{})
	if err != nil {
		t.Fatalf("opening the version: %v", err)
	}
	return v
}

// rpTDemo runs the pipeline on the demo fleet (every fault of SPEC §3.1 and
// §3.2, two embodiments, all four goal strategies) and opens the version.
func rpTDemo(t *testing.T) *pipeline.Version {
	t.Helper()
	dir := t.TempDir()
	if err := fleet.Demo(dir); err != nil {
		t.Fatalf("writing the demo fleet: %v", err)
	}
	return rpTRun(t, filepath.Join(dir, "hindcast.yaml"))
}

func rpTReport(t *testing.T, v *pipeline.Version) string {
	t.Helper()
	var b bytes.Buffer
	if err := Report(v, &b); err != nil {
		t.Fatalf("Report: %v", err)
	}
	return b.String()
}

// rpTPlot is one parsed <svg class="plot">: its attributes, and its text
// elements with their tooltips, and the tooltips of its shapes.
type rpTPlot struct {
	Plot, Group string
	Texts       []rpTText
	ShapeTips   []string // <title> of rect and circle elements
	Shapes      int      // rect, line, circle, polyline, path elements
}

type rpTText struct{ Class, Text, Tip string }

var rpTSVGRe = regexp.MustCompile(`(?s)<svg\b.*?</svg>`)

// rpTPlots parses every inline SVG of the page as strict XML: a string that
// was not escaped breaks the parse (or shows up as an extra element).
func rpTPlots(t *testing.T, page string) []rpTPlot {
	t.Helper()
	var plots []rpTPlot
	for _, src := range rpTSVGRe.FindAllString(page, -1) {
		dec := xml.NewDecoder(strings.NewReader(src))
		dec.Strict = true
		var p rpTPlot
		var stack []string
		var cur *rpTText
		var chars strings.Builder
		for {
			tok, err := dec.Token()
			if errors.Is(err, io.EOF) {
				break
			}
			if err != nil {
				t.Fatalf("an SVG of the report is not well-formed XML: %v\n%.400s", err, src)
			}
			switch tk := tok.(type) {
			case xml.StartElement:
				attr := map[string]string{}
				for _, a := range tk.Attr {
					attr[a.Name.Local] = a.Value
				}
				switch tk.Name.Local {
				case "svg":
					if len(stack) > 0 {
						t.Fatalf("nested svg in a plot")
					}
					if attr["class"] != "plot" {
						t.Fatalf("svg without class plot: %v", attr)
					}
					p.Plot, p.Group = attr["data-plot"], attr["data-group"]
				case "text":
					p.Texts = append(p.Texts, rpTText{Class: attr["class"]})
					cur = &p.Texts[len(p.Texts)-1]
				case "title":
					chars.Reset()
				case "rect", "line", "circle", "polyline", "path":
					p.Shapes++
				case "g":
				default:
					t.Fatalf("unexpected element <%s> in plot %s: a string was not escaped?", tk.Name.Local, p.Plot)
				}
				stack = append(stack, tk.Name.Local)
			case xml.CharData:
				if len(stack) > 0 && stack[len(stack)-1] == "text" && cur != nil {
					cur.Text += string(tk)
				} else if len(stack) > 0 && stack[len(stack)-1] == "title" {
					chars.Write(tk)
				}
			case xml.EndElement:
				stack = stack[:len(stack)-1]
				if tk.Name.Local == "title" && len(stack) > 0 {
					switch parent := stack[len(stack)-1]; parent {
					case "text":
						cur.Tip = chars.String()
					case "rect", "circle":
						p.ShapeTips = append(p.ShapeTips, chars.String())
					}
				}
				if tk.Name.Local == "text" {
					cur = nil
				}
			}
		}
		plots = append(plots, p)
	}
	return plots
}

func rpTFind(t *testing.T, plots []rpTPlot, plot, group string) rpTPlot {
	t.Helper()
	for _, p := range plots {
		if p.Plot == plot && p.Group == group {
			return p
		}
	}
	t.Fatalf("no plot %s/%s", plot, group)
	return rpTPlot{}
}

func (p rpTPlot) texts(class string) []string {
	var out []string
	for _, x := range p.Texts {
		if x.Class == class {
			out = append(out, x.Text)
		}
	}
	return out
}

func rpTIDs(plots []rpTPlot) []string {
	var ids []string
	for _, p := range plots {
		ids = append(ids, p.Plot+"/"+p.Group)
	}
	return ids
}

// rpTFetchAttrRe and rpTFetchTagRe match the markup that makes a browser
// fetch something (WHATWG HTML: src, href, srcset, action, poster, data of
// object, xlink:href of SVG; style attributes may hold url()), and
// rpTFetchCSSRe the CSS that does (url() and @import, CSS Values §4.5 and
// CSS Cascade §2). Text cannot hold them: it is escaped, so "<" never
// starts a tag inside it and quoted attribute values are skipped.
var (
	rpTTagRe       = regexp.MustCompile(`<[A-Za-z!/][^>]*>`)
	rpTQuotedRe    = regexp.MustCompile(`"[^"]*"|'[^']*'`)
	rpTFetchAttrRe = regexp.MustCompile(`(?i)\s(src|href|srcset|action|formaction|poster|background|data|xlink:href|style|ping|manifest)\s*=`)
	rpTFetchTagRe  = regexp.MustCompile(`(?i)^</?(link|iframe|frame|object|embed|img|image|use|audio|video|source|track|base|feimage|form|picture)\b`)
	rpTFetchCSSRe  = regexp.MustCompile(`(?i)url\s*\(|@import|image-set|src\s*:`)
	rpTFetchJSRe   = regexp.MustCompile(`(?i)fetch|XMLHttpRequest|import|WebSocket|EventSource|sendBeacon|\.src|location|open\(`)
	rpTBlockRe     = regexp.MustCompile(`(?s)<(script|style)>(.*?)</(script|style)>`)
)

// rpTNoNetwork checks that the page cannot fetch anything: no fetching
// tag or attribute, no fetching CSS or script, a Content-Security-Policy of
// default-src 'none', and exactly one script element: the inline plot check.
func rpTNoNetwork(t *testing.T, page string) {
	t.Helper()
	blocks := rpTBlockRe.FindAllStringSubmatch(page, -1)
	if len(blocks) != 2 || blocks[0][1] != "style" || blocks[1][1] != "script" {
		t.Fatalf("want one style then one script element, got %d blocks", len(blocks))
	}
	if loc := rpTFetchCSSRe.FindString(blocks[0][2]); loc != "" {
		t.Errorf("the style fetches: %q", loc)
	}
	if loc := rpTFetchJSRe.FindString(blocks[1][2]); loc != "" {
		t.Errorf("the script may fetch: %q", loc)
	}
	if strings.Count(page, "<script") != 1 {
		t.Errorf("%d script elements, want 1", strings.Count(page, "<script"))
	}
	markup := rpTBlockRe.ReplaceAllString(page, "")
	for _, tag := range rpTTagRe.FindAllString(markup, -1) {
		if rpTFetchTagRe.MatchString(tag) {
			t.Errorf("a fetching element: %.120s", tag)
		}
		if m := rpTFetchAttrRe.FindString(rpTQuotedRe.ReplaceAllString(tag, `""`)); m != "" {
			t.Errorf("a fetching attribute %q in %.120s", m, tag)
		}
	}
	if !strings.Contains(page, `<meta http-equiv="Content-Security-Policy" content="default-src &#39;none&#39;;`) {
		t.Errorf("no Content-Security-Policy with default-src 'none'")
	}
}

// ---- the expected-law math (SPEC §3.3) ----

func TestReportExpectedOffsets(t *testing.T) {
	// Each case's want is worked out by hand from SPEC §3.3; the comment
	// beside it shows the working.
	third := 1.0 / 3
	cases := []struct {
		name     string
		steps    map[string]map[string]int64
		strategy string
		gamma    float64
		horizon  int
		want     []float64 // index k; index 0 unused
	}{
		{
			// T=4: steps 0, 1, 2 draw with n = 3, 2, 1, each step equally often.
			name: "future T=4", steps: map[string]map[string]int64{"picker6": {"4": 1}}, strategy: "future",
			want: []float64{0, (1.0/3 + 1.0/2 + 1) / 3, (1.0/3 + 1.0/2) / 3, (1.0 / 3) / 3},
		},
		{
			// Horizon 2: n = min(2, 3), min(2, 2), min(2, 1) = 2, 2, 1.
			name: "future T=4 horizon 2", steps: map[string]map[string]int64{"picker6": {"4": 1}}, strategy: "future", horizon: 2,
			want: []float64{0, (0.5 + 0.5 + 1) / 3, (0.5 + 0.5) / 3},
		},
		{
			// γ = 1/2: P_n(k) = (1/2)^k / (1 − (1/2)^n); n = 3: Z = 7/8, P = 4/7, 2/7, 1/7;
			// n = 2: Z = 3/4, P = 2/3, 1/3; n = 1: P = 1.
			name: "geometric T=4", steps: map[string]map[string]int64{"picker6": {"4": 1}}, strategy: "geometric", gamma: 0.5,
			want: []float64{0, (4.0/7 + 2.0/3 + 1) / 3, (2.0/7 + 1.0/3) / 3, (1.0 / 7) / 3},
		},
		{
			// The horizon does not apply to final; offsets 3, 2, 1 once each.
			name: "final T=4", steps: map[string]map[string]int64{"picker6": {"4": 1}}, strategy: "final", horizon: 1,
			want: []float64{0, third, third, third},
		},
		{
			// Two episodes of 3 steps (n = 2, 1 each) and one of 2 steps
			// (n = 1), in two embodiments: 5 steps draw in all.
			// k=1: 2·(1/2 + 1) + 1 = 4 → 4/5; k=2: 2·(1/2) = 1 → 1/5.
			name: "future mixed", steps: map[string]map[string]int64{"a": {"3": 2}, "b": {"2": 1}}, strategy: "future",
			want: []float64{0, 4.0 / 5, 1.0 / 5},
		},
		{
			// final: T=3 gives offsets 2, 1 (twice), T=2 gives 1: k=1: 3/5, k=2: 2/5.
			name: "final mixed", steps: map[string]map[string]int64{"a": {"3": 2}, "b": {"2": 1}}, strategy: "final",
			want: []float64{0, 3.0 / 5, 2.0 / 5},
		},
		{
			// An episode of one step has no step that draws; it changes nothing.
			name: "future with T=1", steps: map[string]map[string]int64{"a": {"2": 3, "1": 5}}, strategy: "future",
			want: []float64{0, 1},
		},
	}
	for _, c := range cases {
		got, err := rpExpectedOffsets(c.steps, c.strategy, c.gamma, c.horizon)
		if err != nil {
			t.Errorf("%s: %v", c.name, err)
			continue
		}
		if len(got) != len(c.want) {
			t.Errorf("%s: %d offsets %v, want %d %v", c.name, len(got), got, len(c.want), c.want)
			continue
		}
		var sum float64
		for k := range c.want {
			if math.Abs(got[k]-c.want[k]) > 1e-12 {
				t.Errorf("%s: E(%d) = %.15g, want %.15g", c.name, k, got[k], c.want[k])
			}
			sum += got[k]
		}
		if math.Abs(sum-1) > 1e-12 {
			t.Errorf("%s: shares sum to %v, want 1", c.name, sum)
		}
	}

	// A geometric law over a long episode, against a brute-force sum over
	// every step with the law written out (no suffix sums): T = 50, γ = 0.9, H = 20.
	steps := map[string]map[string]int64{"e": {"50": 3, "7": 2}}
	got, err := rpExpectedOffsets(steps, "geometric", 0.9, 20)
	if err != nil {
		t.Fatal(err)
	}
	want := make([]float64, 21)
	var draws float64
	for _, ep := range []struct{ T, c int }{{50, 3}, {7, 2}} {
		for s := 0; s <= ep.T-2; s++ {
			n := min(20, ep.T-1-s)
			var z float64
			for k := 1; k <= n; k++ {
				z += (1 - 0.9) * math.Pow(0.9, float64(k-1))
			}
			for k := 1; k <= n; k++ {
				want[k] += float64(ep.c) * (1 - 0.9) * math.Pow(0.9, float64(k-1)) / z
			}
			draws += float64(ep.c)
		}
	}
	if len(got) != len(want) {
		t.Fatalf("geometric H=20: %d offsets, want %d", len(got), len(want))
	}
	for k := 1; k < len(want); k++ {
		if math.Abs(got[k]-want[k]/draws) > 1e-12 {
			t.Errorf("geometric H=20: E(%d) = %.15g, want %.15g", k, got[k], want[k]/draws)
		}
	}

	for _, bad := range []struct {
		steps    map[string]map[string]int64
		strategy string
		gamma    float64
	}{
		{map[string]map[string]int64{"a": {"4": 1}}, "negative", 0.5},
		{map[string]map[string]int64{"a": {"4": 1}}, "geometric", 1},
		{map[string]map[string]int64{"a": {"4": 1}}, "geometric", 0},
		{map[string]map[string]int64{"a": {"four": 1}}, "future", 0.5},
		{map[string]map[string]int64{"a": {"0": 1}}, "future", 0.5},
	} {
		if _, err := rpExpectedOffsets(bad.steps, bad.strategy, bad.gamma, 0); err == nil {
			t.Errorf("rpExpectedOffsets(%v, %s, %v): no error", bad.steps, bad.strategy, bad.gamma)
		}
	}
}

func TestReportTotalVariation(t *testing.T) {
	// ½ Σ|p − q| (the total variation distance, common practice): observed
	// 3/4, 1/4 on k = 1, 2 and one count at k = 3 beyond the law; law 1/2, 1/2.
	// Observed shares 3/8, 4/8, 1/8 → ½(|3/8−1/2| + |4/8−1/2| + 1/8) = 1/8.
	got := rpTotalVariation(map[int]int64{1: 3, 2: 4, 3: 1, -1: 9}, []float64{0, 0.5, 0.5})
	if math.Abs(got-0.125) > 1e-15 {
		t.Errorf("total variation %v, want 0.125", got)
	}
}

// rpTOrderManifest is a manifest whose page depends on the order the
// report reads its maps in, if it reads them in map order: with future
// goals on episodes of 2 steps the law puts every goal at offset 1, so
// offsets 2…8 lie beyond it and each adds its share to the total
// variation. Of 320 goals 42 are at offset 1, so TV = ½(278/320 + 278/320)
// = 139/160 = 0.86875 exactly, on a rounding boundary of the page's %.4f:
// sums of the shares in different orders fall on either side of it
// (0.8687 or 0.8688 — found by summing these shares in shuffled orders).
func rpTOrderManifest() *pipeline.Manifest {
	return &pipeline.Manifest{
		Format: pipeline.ManifestFormat, Dataset: "order", Version: "v1",
		Config:       json.RawMessage(`{"goals":{"future":1,"geometric":0,"final":0,"negative":0,"gamma":0.5,"horizon":0}}`),
		Funnel:       pipeline.Funnel{Objects: 1, Lines: 20, Frames: 20, Episodes: 10, Pairs: 320},
		EpisodeSteps: map[string]map[string]int64{"e": {"2": 10}},
		Offsets: map[string]map[string]int64{"future": {
			"1": 42, "2": 33, "3": 47, "4": 34, "5": 46, "6": 49, "7": 48, "8": 21}},
		Reached: map[string]map[string]int64{"future": {"1": 40, "2": 3}},
	}
}

// The same version gives the same page, byte for byte, however Go orders
// its maps: the report is built many times in one process (map order is
// drawn anew on every range) and every page must equal the first.
func TestReportDeterministic(t *testing.T) {
	v := &pipeline.Version{Manifest: rpTOrderManifest()}
	first := rpTReport(t, v)
	for i := range 200 {
		if page := rpTReport(t, v); page != first {
			t.Fatalf("build %d differs from the first page", i+2)
		}
	}
	// The total variation as rpTotalVariation sums it: the integer counts
	// first, then the shares in offset order.
	sub := rpTFind(t, rpTPlots(t, first), "goal-offsets", "future").texts("sub")
	if want := "320 goals · total variation from the expected law 0.8688"; len(sub) != 1 || sub[0] != want {
		t.Errorf("subtitle %q, want %q", sub, want)
	}
}

// ---- plots from hand-made manifests ----

func TestReportEpisodeBins(t *testing.T) {
	// Four episodes: √4 = 2 bins asked, raised to the minimum of 10; lengths
	// 3…12 span 10 steps, so bins are 1 step wide, one per length.
	svg, err := rpEpisodeHistogram("e", map[string]int64{"3": 2, "7": 1, "12": 1})
	if err != nil {
		t.Fatal(err)
	}
	p := rpTPlots(t, string(svg))[0]
	if want := []string{"3 steps: 2 episodes", "7 steps: 1 episode", "12 steps: 1 episode"}; !slices.Equal(p.ShapeTips, want) {
		t.Errorf("bars %q, want %q", p.ShapeTips, want)
	}

	// 400 episodes, 2 of every length 10…209: √400 = 20 bins over 200
	// steps → 10 steps wide, edges on multiples of 10: 20 bins of 20 episodes.
	byT := map[string]int64{}
	for T := 10; T <= 209; T++ {
		byT[strconv.Itoa(T)] = 2
	}
	svg, err = rpEpisodeHistogram("e", byT)
	if err != nil {
		t.Fatal(err)
	}
	p = rpTPlots(t, string(svg))[0]
	var want []string
	for a := 10; a < 210; a += 10 {
		want = append(want, fmt.Sprintf("%d–%d steps: 20 episodes", a, a+9))
	}
	if !slices.Equal(p.ShapeTips, want) {
		t.Errorf("bars %q, want %q", p.ShapeTips, want)
	}
	// 2·Σ_{T=10}^{209} T = 2·(10+209)·200/2 = 43,800 steps.
	if sub := p.texts("sub"); len(sub) != 1 || sub[0] != "400 episodes · 43,800 steps in all · 10–209 steps each · bins of 10 steps" {
		t.Errorf("subtitle %q", sub)
	}
}

// rpTHostile is a manifest whose every string field holds markup.
func rpTHostile() *pipeline.Manifest {
	m := &pipeline.Manifest{
		Format: pipeline.ManifestFormat, Dataset: `<script>alert("d")</script>`, Version: `v&1`,
		Created: `2026-12-01T00:00:00Z<b>`, Digest: `"><img src=x onerror=alert(1)>`, ConfigSHA256: `'sha`,
		SourceRoot: `file:///x/<i>/`, Tool: pipeline.ToolInfo{Version: "<tool>", Commit: "c&c"},
		Config: json.RawMessage(`{"goals":{"future":1,"geometric":1,"final":1,"negative":1,"gamma":0.5,"horizon":0}}`),
		Sources: []pipeline.Source{
			{Key: "<k1>/a.jsonl", Lines: 10, Dropped: map[string]int64{"malformed": 2}},
			{Key: `pre"fix/b.jsonl`, Lines: 5, Dropped: map[string]int64{"<reason>": 1}},
			{Key: "top&level.jsonl", Lines: 3, Dropped: map[string]int64{}},
		},
		Funnel:       pipeline.Funnel{Objects: 3, Lines: 18, Frames: 15, Dropped: map[string]int64{"malformed": 2, "<reason>": 1}},
		Counts:       []pipeline.Count{{Embodiment: "<emb>", Split: "train", Episodes: 1, Frames: 4, Pairs: 3}},
		EpisodeSteps: map[string]map[string]int64{"<emb>": {"4": 1}},
		Offsets:      map[string]map[string]int64{"future": {"1": 4, "2": 2}, "negative": {"-1": 3}, "<strat>": {"1": 1}},
		Reached:      map[string]map[string]int64{"future": {"1": 1}, "negative": {"-1": 1}},
		Stats: map[string]pipeline.EmbodimentStats{"<emb>": {
			Obs: pipeline.VectorStats{Count: 2, Mean: []float64{0, 1}, Std: []float64{1, 0.5}, Min: []float64{-1, 0}, Max: []float64{1, 2}},
			Act: pipeline.VectorStats{Mean: []float64{}, Std: []float64{}, Min: []float64{}, Max: []float64{}},
		}},
	}
	// Units u00…u34 drop 0…34 lines; "" (lines whose unit could not be read) drops 40.
	m.Units = append(m.Units, pipeline.UnitCount{Unit: "", Dropped: map[string]int64{"malformed": 40}})
	for i := 0; i < 35; i++ {
		m.Units = append(m.Units, pipeline.UnitCount{Unit: fmt.Sprintf("u%02d", i), Frames: 10, Dropped: map[string]int64{"non_finite": int64(i)}})
	}
	return m
}

func TestReportEscapesAndPlots(t *testing.T) {
	m := rpTHostile()
	page := rpTReport(t, &pipeline.Version{Manifest: m})
	rpTNoNetwork(t, page)
	for _, raw := range []string{`<script>alert`, `<k1>`, `pre"fix`, `top&level`, `<reason>`, `<emb>`, `<strat>`,
		`<img src=x`, `<tool>`, `c&c`, `<i>`, `<b>`, `v&1`, `'sha`} {
		if strings.Contains(page, raw) {
			t.Errorf("the page holds %q unescaped", raw)
		}
	}
	// HTML escaping as html/template does it (& < > " ' → &amp; &lt; &gt; &#34; &#39;).
	for _, esc := range []string{`&lt;script&gt;alert(&#34;d&#34;)&lt;/script&gt;`, `&lt;k1&gt; (1)`, `pre&#34;fix (1)`,
		`top&amp;level.jsonl (1)`, `&lt;reason&gt;`, `&lt;emb&gt;`, `&lt;strat&gt;`, `&#34;&gt;&lt;img src=x onerror=alert(1)&gt;`,
		`&lt;tool&gt; (c&amp;c)`, `file:///x/&lt;i&gt;/`, `v&amp;1`, `&#39;sha`, `2026-12-01T00:00:00Z&lt;b&gt;`} {
		if !strings.Contains(page, esc) {
			t.Errorf("the page lacks the escaped %q", esc)
		}
	}

	plots := rpTPlots(t, page)
	want := []string{"episode-lengths/<emb>", "drops-by-source/", "drops-by-unit/", "goal-offsets/future", "goal-offsets/geometric",
		"goal-offsets/final", "goal-offsets/<strat>", "reward-by-offset/", "obs-ranges/<emb>"} // no act rows: no act plot
	if got := rpTIDs(plots); !slices.Equal(got, want) {
		t.Errorf("plots %q, want %q", got, want)
	}
	for _, p := range plots {
		if len(p.texts("title")) != 1 || p.Shapes == 0 || len(p.texts("tick")) < 2 {
			t.Errorf("plot %s/%s: %d titles, %d shapes, %d tick labels", p.Plot, p.Group, len(p.texts("title")), p.Shapes, len(p.texts("tick")))
		}
	}

	// Source prefixes: the first path segment, or the whole key without one.
	src := rpTFind(t, plots, "drops-by-source", "")
	if got, want := src.texts("row"), []string{"<k1> (1)", `pre"fix (1)`, "top&level.jsonl (1)"}; !slices.Equal(got, want) {
		t.Errorf("source prefixes %q, want %q", got, want)
	}
	if got, want := src.ShapeTips, []string{"<k1> (1): 2 malformed", `pre"fix (1): 1 <reason>`}; !slices.Equal(got, want) {
		t.Errorf("source bars %q, want %q", got, want)
	}

	// Units: 35 have drops ("" with 40, u01…u34 with 1…34), the top 30 shown,
	// most first: (unreadable), u34 … u06.
	units := rpTFind(t, plots, "drops-by-unit", "")
	wantUnits := []string{"(unreadable)"}
	for i := 34; i >= 6; i-- {
		wantUnits = append(wantUnits, fmt.Sprintf("u%02d", i))
	}
	if got := units.texts("row"); !slices.Equal(got, wantUnits) {
		t.Errorf("units %q, want %q", got, wantUnits)
	}
	if got := units.texts("value"); len(got) != 30 || got[0] != "40" || got[1] != "34" || got[29] != "6" {
		t.Errorf("unit totals %q, want 40, 34 … 6", got)
	}
	if sub := units.texts("sub"); len(sub) != 1 || sub[0] != "35 of 36 units dropped lines · the 30 with the most shown" {
		t.Errorf("units subtitle %q", sub)
	}

	// Future: 6 goals, shares 4/6, 2/6; the law for T=4 is 11/18, 5/18, 2/18
	// (TestReportExpectedOffsets), so TV = ½(|4/6−11/18| + |2/6−5/18| + 2/18) = ½(1/18+1/18+2/18) = 1/9.
	fut := rpTFind(t, plots, "goal-offsets", "future")
	if sub := fut.texts("sub"); len(sub) != 1 || sub[0] != "6 goals · total variation from the expected law 0.1111" {
		t.Errorf("future subtitle %q", sub)
	}
	if got, want := fut.ShapeTips, []string{"offset 1: 4 goals (66.7%), expected 61.11%", "offset 2: 2 goals (33.3%), expected 27.78%"}; !slices.Equal(got, want) {
		t.Errorf("future bars %q, want %q", got, want)
	}
	if sub := rpTFind(t, plots, "goal-offsets", "<strat>").texts("sub"); len(sub) != 1 || !strings.Contains(sub[0], "no expected law") {
		t.Errorf("unknown strategy subtitle %q", sub)
	}
	// Reward: future 1 of 6 reached; geometric and final drew nothing here.
	rew := rpTFind(t, plots, "reward-by-offset", "")
	if got, want := rew.texts("legend"), []string{"future (16.7% overall)", "geometric (– overall)", "final (– overall)", "<strat> (0.0% overall)"}; !slices.Equal(got, want) {
		t.Errorf("reward legend %q, want %q", got, want)
	}
	if got, want := rew.ShapeTips, []string{"future, offset 1: 1 of 4 reached", "future, offset 2: 0 of 2 reached",
		"<strat>, offset 1: 0 of 1 reached"}; !slices.Equal(got, want) {
		t.Errorf("reward points %q, want %q", got, want)
	}
	if !strings.Contains(page, "negative: 3 goals drawn from other episodes (offset −1); reward rate 33.3%.") {
		t.Errorf("no negative count line")
	}
	// Ranges: one bar, whisker and dot per dimension; act has no rows.
	obs := rpTFind(t, plots, "obs-ranges", "<emb>")
	if got, want := obs.ShapeTips, []string{"obs[0]: min -1, max 1, mean 0 ± 1", "obs[0]: min -1, max 1, mean 0 ± 1",
		"obs[1]: min 0, max 2, mean 1 ± 0.5", "obs[1]: min 0, max 2, mean 1 ± 0.5"}; !slices.Equal(got, want) {
		t.Errorf("obs range tips %q, want %q", got, want)
	}
	// Each dimension in its own standard deviations: obs[1] (min 0, max 2,
	// mean 1, std 0.5) spans -2 to 2, so the axis runs at least that far.
	if !strings.Contains(page, "per dimension, in standard deviations from its mean") {
		t.Errorf("obs ranges are not said to be normalised per dimension")
	}
	// The plot check's result is kept for tests, hidden from readers.
	if !strings.Contains(page, `<pre id="plot-check" hidden>not run</pre>`) || strings.Contains(page, "plot check:") {
		t.Errorf("plot-check placeholder not hidden, or debug text shown")
	}
}

func TestReportBadManifest(t *testing.T) {
	for name, edit := range map[string]func(m *pipeline.Manifest){
		"no config":      func(m *pipeline.Manifest) { m.Config = nil },
		"bad offset key": func(m *pipeline.Manifest) { m.Offsets["future"]["x"] = 1 },
		"bad steps key":  func(m *pipeline.Manifest) { m.EpisodeSteps["<emb>"]["four"] = 1 },
	} {
		m := rpTHostile()
		edit(m)
		if err := Report(&pipeline.Version{Manifest: m}, io.Discard); err == nil {
			t.Errorf("%s: no error", name)
		}
	}
	if err := Report(&pipeline.Version{}, io.Discard); err == nil {
		t.Errorf("no manifest: no error")
	}
}

// ---- the demo version ----

func TestReportDemo(t *testing.T) {
	v := rpTDemo(t)
	m := v.Manifest
	page := rpTReport(t, v)
	for i := range 20 { // one version, one page (see TestReportDeterministic)
		if again := rpTReport(t, v); again != page {
			t.Fatalf("report build %d of the demo version differs from the first", i+2)
		}
	}
	rpTNoNetwork(t, page)
	if strings.Contains(page, "http://") || strings.Contains(page, "https://") {
		t.Errorf("the demo report names an http(s) URL")
	}
	plots := rpTPlots(t, page)
	// The demo config declares picker6 and cart2 and draws future, geometric,
	// final and negative goals (fleet/demo.go).
	want := []string{"episode-lengths/cart2", "episode-lengths/picker6", "drops-by-source/", "drops-by-unit/",
		"goal-offsets/future", "goal-offsets/geometric", "goal-offsets/final", "reward-by-offset/",
		"obs-ranges/cart2", "act-ranges/cart2", "obs-ranges/picker6", "act-ranges/picker6"}
	if got := rpTIDs(plots); !slices.Equal(got, want) {
		t.Errorf("plots %q, want %q", got, want)
	}
	for _, p := range plots {
		if len(p.texts("title")) != 1 || p.Shapes < 5 || len(p.texts("tick")) < 4 {
			t.Errorf("plot %s/%s: %d titles, %d shapes, %d tick labels", p.Plot, p.Group, len(p.texts("title")), p.Shapes, len(p.texts("tick")))
		}
	}
	for _, s := range []string{m.Dataset, m.Version, m.Created, m.Digest, m.ConfigSHA256} {
		if !strings.Contains(page, s) {
			t.Errorf("the header lacks %q", s)
		}
	}

	// Drops by source prefix, recomputed from the manifest's sources.
	type agg struct {
		objects int
		dropped map[string]int64
	}
	prefixes := map[string]*agg{}
	var keys []string
	for _, s := range m.Sources {
		keys = append(keys, s.Key)
	}
	depth := rpSourceDepth(keys)
	for _, s := range m.Sources {
		p := rpSourcePrefix(s.Key, depth)
		if prefixes[p] == nil {
			prefixes[p] = &agg{dropped: map[string]int64{}}
		}
		prefixes[p].objects++
		for r, n := range s.Dropped {
			prefixes[p].dropped[r] += n
		}
	}
	var wantRows, wantTips []string
	names := make([]string, 0, len(prefixes))
	for p := range prefixes {
		names = append(names, p)
	}
	sort.Strings(names)
	for _, p := range names {
		label := fmt.Sprintf("%s (%d)", p, prefixes[p].objects)
		wantRows = append(wantRows, label)
		for _, r := range pipeline.Reasons() {
			if n := prefixes[p].dropped[r]; n > 0 {
				wantTips = append(wantTips, fmt.Sprintf("%s: %d %s", label, n, r))
			}
		}
	}
	src := rpTFind(t, plots, "drops-by-source", "")
	if got := src.texts("row"); !slices.Equal(got, wantRows) {
		t.Errorf("prefix rows %q, want %q", got, wantRows)
	}
	if !slices.Equal(src.ShapeTips, wantTips) {
		t.Errorf("prefix bars %q, want %q", src.ShapeTips, wantTips)
	}
	if !slices.Contains(rpTFind(t, plots, "drops-by-unit", "").texts("row"), "(unreadable)") {
		t.Errorf("the demo's unreadable lines (malformed, oversize, truncated) have no bar")
	}

	// final (SPEC §3.3): every step s < T−1 of every episode gets goals.final
	// goals at offset T−1−s, so offset k is drawn final × #{episodes with T−1 ≥ k}
	// times — exactly, whatever the seed.
	var cfg rpConfig
	if err := json.Unmarshal(m.Config, &cfg); err != nil {
		t.Fatal(err)
	}
	wantFinal := map[int]int64{}
	var finalN int64
	for _, byT := range m.EpisodeSteps {
		for key, c := range byT {
			T, _ := strconv.Atoi(key)
			for k := 1; k <= T-1; k++ {
				wantFinal[k] += int64(cfg.Goals.Final) * c
				finalN += int64(cfg.Goals.Final) * c
			}
		}
	}
	gotFinal, err := rpOffsetCounts(m.Offsets["final"])
	if err != nil {
		t.Fatal(err)
	}
	if fmt.Sprint(gotFinal) != fmt.Sprint(wantFinal) {
		t.Errorf("final offsets %v, want %v", gotFinal, wantFinal)
	}
	exp, err := rpExpectedOffsets(m.EpisodeSteps, "final", cfg.Goals.Gamma, cfg.Goals.Horizon)
	if err != nil {
		t.Fatal(err)
	}
	for k, n := range wantFinal {
		if math.Abs(exp[k]-float64(n)/float64(finalN)) > 1e-12 {
			t.Errorf("final E(%d) = %v, want %v", k, exp[k], float64(n)/float64(finalN))
		}
	}

	// future and geometric are random: the observed shares must sit within
	// sampling noise of the law. For N draws over offsets with shares p_k,
	// E|p̂_k − p_k| ≈ √(2 p_k(1−p_k)/(πN)) (normal approximation to the
	// binomial, common practice), so E[TV] ≈ ½ Σ_k of that; allow 1.5 ×.
	// A wrong law (the other strategy's; with γ = 0.99 and episodes of at
	// most 200 steps the two are alike) must still be well outside it.
	noise := func(obs map[int]int64, exp []float64) float64 {
		var n float64
		for k, c := range obs {
			if k >= 1 {
				n += float64(c)
			}
		}
		var s float64
		for _, p := range exp {
			s += math.Sqrt(2 * p * (1 - p) / (math.Pi * n))
		}
		return s / 2
	}
	laws := map[string][]float64{}
	for _, st := range []string{"future", "geometric"} {
		if laws[st], err = rpExpectedOffsets(m.EpisodeSteps, st, cfg.Goals.Gamma, cfg.Goals.Horizon); err != nil {
			t.Fatal(err)
		}
	}
	for st, other := range map[string]string{"future": "geometric", "geometric": "future"} {
		obs, err := rpOffsetCounts(m.Offsets[st])
		if err != nil {
			t.Fatal(err)
		}
		tv, bound := rpTotalVariation(obs, laws[st]), 1.5*noise(obs, laws[st])
		if tv > bound {
			t.Errorf("%s: total variation %.4f from its law, beyond sampling noise %.4f", st, tv, bound)
		}
		if wrong := rpTotalVariation(obs, laws[other]); wrong < 1.5*bound {
			t.Errorf("%s: total variation %.4f from the %s law, too close to tell the laws apart (noise %.4f)", st, wrong, other, bound)
		}
	}
}

// TestReportSourceKeyEscaped runs the pipeline on a source object whose
// file name holds HTML metacharacters and checks the report escapes it.
func TestReportSourceKeyEscaped(t *testing.T) {
	dir := t.TempDir()
	key := "a&b<c>.jsonl"
	var lines []string
	for i := 0; i < 12; i++ {
		lines = append(lines, fmt.Sprintf(`{"unit":"u1","embodiment":"e1","t":%d,"obs":[%d,0],"act":[0]}`, 1_000_000_000+int64(i)*100_000_000, i))
	}
	lines = append(lines, `{"unit":"u1","embodiment":"e1"`, "not json") // malformed, malformed
	if err := os.MkdirAll(filepath.Join(dir, "logs"), 0o755); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(dir, "logs", key), []byte(strings.Join(lines, "\n")+"\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	cfg := `dataset: esc-test
source:
  uri: logs
work: work
output: out
partitions: 1
seed: 1
embodiments:
  e1:
    obs: 2
    act: 1
    goal_tolerance: 0.1
episodes:
  max_gap: 1s
  min_steps: 2
  max_steps: 100
goals:
  future: 1
  geometric: 1
  final: 1
  negative: 0
  gamma: 0.9
  horizon: 0
`
	if err := os.WriteFile(filepath.Join(dir, "hindcast.yaml"), []byte(cfg), 0o644); err != nil {
		t.Fatal(err)
	}
	v := rpTRun(t, filepath.Join(dir, "hindcast.yaml"))
	if len(v.Manifest.Sources) != 1 || v.Manifest.Sources[0].Key != key {
		t.Fatalf("sources %+v, want the one key %q", v.Manifest.Sources, key)
	}
	page := rpTReport(t, v)
	rpTNoNetwork(t, page)
	if strings.Contains(page, "a&b<c>") || strings.Contains(page, "<c>") {
		t.Errorf("the key %q is in the page unescaped", key)
	}
	src := rpTFind(t, rpTPlots(t, page), "drops-by-source", "")
	if got, want := src.texts("row"), []string{key + " (1)"}; !slices.Equal(got, want) {
		t.Errorf("prefix rows %q, want %q", got, want)
	}
	if got, want := src.ShapeTips, []string{key + " (1): 2 malformed"}; !slices.Equal(got, want) {
		t.Errorf("prefix bars %q, want %q", got, want)
	}
	if !strings.Contains(page, "a&amp;b&lt;c&gt;.jsonl (1)") {
		t.Errorf("no escaped key in the page")
	}
}
