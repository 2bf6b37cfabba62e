package main

// Incremental runs through the CLI binary: a stage item whose inputs and
// config parts did not change is reused, not redone; a change reruns exactly
// the stages that read it, and only the partitions new objects touch; and
// whatever was reused, the version is byte-identical to one made from an
// empty work area. `hindcast plan` tells beforehand, and writes nothing.

import (
	"bufio"
	"encoding/json"
	"fmt"
	"io/fs"
	"maps"
	"os"
	"path/filepath"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"testing"

	"hindcast/fleet"
)

// cacheStageLine is a stage's line in `hindcast run`'s summary.
var cacheStageLine = regexp.MustCompile(`(?m)^\s+stage (\S+)\s+[0-9.]+s\s+(\d+) items, (\d+) reused$`)

// cacheWant is what one stage of a run should record: its item count and
// whether every item was reused (else none was).
type cacheWant struct {
	items  int
	reused bool
}

// cacheCheckRun checks a run's stage records, in the manifest and in the
// printed summary, against want (indexed like clStageNames).
func cacheCheckRun(t *testing.T, r clResult, v clVersion, want []cacheWant) {
	t.Helper()
	st := v.manifest.Stages
	if len(st) != len(clStageNames) {
		t.Fatalf("%s: %d stage records, want %d: %+v", v.where, len(st), len(clStageNames), st)
	}
	lines := cacheStageLine.FindAllStringSubmatch(r.stdout, -1)
	if len(lines) != len(clStageNames) {
		t.Fatalf("run printed %d stage lines, want %d:\n%s", len(lines), len(clStageNames), r)
	}
	for i, name := range clStageNames {
		w := want[i]
		reused := 0
		if w.reused {
			reused = w.items
		}
		if st[i].Name != name || st[i].Items != w.items || st[i].Reused != reused || st[i].Cached != w.reused {
			t.Errorf("%s: stage record %+v, want %s with %d items, %d reused, cached %v", v.where, st[i], name, w.items, reused, w.reused)
		}
		if lines[i][1] != name || lines[i][2] != strconv.Itoa(w.items) || lines[i][3] != strconv.Itoa(reused) {
			t.Errorf("printed %q, want stage %s with %d items, %d reused", strings.TrimSpace(lines[i][0]), name, w.items, reused)
		}
	}
}

// cacheAll is every stage of a demo run with the same reuse.
func cacheAll(objects, partitions int, reused bool) []cacheWant {
	return []cacheWant{{objects, reused}, {partitions, reused}, {partitions, reused}, {partitions, reused}}
}

// TestCacheSecondRunReusesEverything: the same objects and config again
// reuse every item of every stage, and give the same bytes (SPEC §6).
func TestCacheSecondRunReusesEverything(t *testing.T) {
	bin := buildHindcast(t)
	dir := t.TempDir()
	logs, text := clDemo(t)
	cfg := clDemoConfig(t, dir, text, "c.yaml", "work", "datasets")
	objects := len(clSourceObjects(t, logs))
	out := filepath.Join(dir, "datasets")

	r1 := clMustRun(t, bin, nil, "run", "--config", cfg, "--version", "v1", "--parallel", "2")
	v1 := clLocalVersion(t, out, "larkspur-aisles", "v1")
	cacheCheckRun(t, r1, v1, cacheAll(objects, 4, false))

	r2 := clMustRun(t, bin, nil, "run", "--config", cfg, "--version", "v2", "--parallel", "2")
	v2 := clLocalVersion(t, out, "larkspur-aisles", "v2")
	cacheCheckRun(t, r2, v2, cacheAll(objects, 4, true))
	clSameContent(t, v1, v2)
	for i := range v1.manifest.Stages {
		if a, b := v1.manifest.Stages[i], v2.manifest.Stages[i]; a.Key != b.Key {
			t.Errorf("stage %s key %s, then %s over the same objects and config", a.Name, a.Key, b.Key)
		}
	}
}

// cacheChange runs the demo with its config, then with one edit in the
// same work area, then with the edit from an empty work area; it returns the
// three versions and checks the second run's reuse (reused: per stage,
// whether that stage's items were all reused, in clStageNames order) and
// that the second and third versions hold the same bytes.
func cacheChange(t *testing.T, old, new string, reused []bool) (v1, v2, v3 clVersion) {
	t.Helper()
	bin := buildHindcast(t)
	dir := t.TempDir()
	logs, text := clDemo(t)
	objects := len(clSourceObjects(t, logs))
	out := filepath.Join(dir, "datasets")
	changed := clReplace(t, text, old, new)

	cfg1 := clDemoConfig(t, dir, text, "base.yaml", "work", "datasets")
	r1 := clMustRun(t, bin, nil, "run", "--config", cfg1, "--version", "v1", "--parallel", "2")
	v1 = clLocalVersion(t, out, "larkspur-aisles", "v1")
	cacheCheckRun(t, r1, v1, cacheAll(objects, 4, false))

	cfg2 := clDemoConfig(t, dir, changed, "changed.yaml", "work", "datasets") // the same work and output
	r2 := clMustRun(t, bin, nil, "run", "--config", cfg2, "--version", "v2", "--parallel", "2")
	v2 = clLocalVersion(t, out, "larkspur-aisles", "v2")
	want := cacheAll(objects, 4, false)
	for i := range want {
		want[i].reused = reused[i]
	}
	cacheCheckRun(t, r2, v2, want)
	for i, st := range v2.manifest.Stages {
		if same := st.Key == v1.manifest.Stages[i].Key; same != reused[i] {
			t.Errorf("stage %s: key unchanged = %v, want %v (reused only when its key is unchanged)", st.Name, same, reused[i])
		}
	}

	cfg3 := clDemoConfig(t, dir, changed, "fresh.yaml", "fresh-work", "fresh-out")
	clMustRun(t, bin, nil, "run", "--config", cfg3, "--version", "v3", "--parallel", "2")
	v3 = clLocalVersion(t, filepath.Join(dir, "fresh-out"), "larkspur-aisles", "v3")
	clSameContent(t, v3, v2)
	return v1, v2, v3
}

// TestCacheGoalsChangeRerunsGoalsAndPack: goals: is read by goals (and so
// pack, which reads goals' items) only; ingest and episodes are reused.
func TestCacheGoalsChangeRerunsGoalsAndPack(t *testing.T) {
	v1, v2, _ := cacheChange(t, "\n  future: 2\n", "\n  future: 3\n", []bool{true, true, false, false})
	if f := v2.manifest.Config.Goals.Future; f != 3 {
		t.Errorf("manifest config goals.future = %d, want 3", f)
	}
	// One more future goal on every step but an episode's last (SPEC §3.3:
	// steps 0…T−2 get each strategy's count): Σ(T−1) = frames − episodes
	// more pairs, over unchanged frames and episodes.
	f1, f2 := v1.manifest.Funnel, v2.manifest.Funnel
	if f2.Frames != f1.Frames || f2.Episodes != f1.Episodes {
		t.Errorf("frames/episodes changed with goals only: %d/%d then %d/%d", f1.Frames, f1.Episodes, f2.Frames, f2.Episodes)
	}
	if got, want := f2.Pairs-f1.Pairs, f1.Frames-f1.Episodes; got != want || want <= 0 {
		t.Errorf("pairs grew by %d with future 2→3, want frames − episodes = %d", got, want)
	}
}

// TestCacheEpisodesChangeRerunsFromEpisodes: episodes: is read by episodes;
// goals and pack read its items; ingest is reused.
func TestCacheEpisodesChangeRerunsFromEpisodes(t *testing.T) {
	v1, v2, _ := cacheChange(t, "\n  min_steps: 10\n", "\n  min_steps: 20\n", []bool{true, false, false, false})
	if m := v2.manifest.Config.Episodes.MinSteps; m != 20 {
		t.Errorf("manifest config episodes.min_steps = %d, want 20", m)
	}
	// Ingest's output is the same, so every line is still counted.
	if v1.manifest.Funnel.Lines != v2.manifest.Funnel.Lines {
		t.Errorf("lines %d then %d with only episodes changed", v1.manifest.Funnel.Lines, v2.manifest.Funnel.Lines)
	}
}

// cacheDims is each bench embodiment's (obs, act) lengths.
var cacheDims = map[string][2]int{"picker6": {10, 7}, "cart2": {5, 2}}

// cacheSession writes one clean episode of n frames of a unit, 100 ms
// apart from start (ns), every value within the config's bounds (SPEC §1
// line format), and returns the object's size.
func cacheSession(t *testing.T, path, unit, emb string, start int64, n int) int64 {
	t.Helper()
	d := cacheDims[emb]
	var b strings.Builder
	for k := range n {
		obs := make([]string, d[0])
		for j := range obs {
			obs[j] = strconv.FormatFloat(float64(k)*0.01+float64(j)*0.1, 'f', -1, 64)
		}
		act := make([]string, d[1])
		for j := range act {
			act[j] = strconv.FormatFloat(float64(j)*0.05-0.1, 'f', -1, 64)
		}
		ev := ""
		switch k {
		case 0:
			ev = `,"ev":"start"`
		case n - 1:
			ev = `,"ev":"end","success":true`
		}
		fmt.Fprintf(&b, `{"unit":%q,"embodiment":%q,"t":%d,"obs":[%s],"act":[%s]%s}`+"\n",
			unit, emb, start+int64(k)*100_000_000, strings.Join(obs, ","), strings.Join(act, ","), ev)
	}
	clWrite(t, path, []byte(b.String()))
	return int64(b.Len())
}

// cacheFirstLine returns the unit and embodiment of an object's first line.
func cacheFirstLine(t *testing.T, path string) (string, string) {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	sc := bufio.NewScanner(f)
	sc.Buffer(nil, 1<<20)
	if !sc.Scan() {
		t.Fatalf("%s: no first line (%v)", path, sc.Err())
	}
	var l struct{ Unit, Embodiment string }
	if err := json.Unmarshal(sc.Bytes(), &l); err != nil {
		t.Fatalf("%s: %v", path, err)
	}
	return l.Unit, l.Embodiment
}

// cacheSnapshot records every file and folder under root with its size,
// mode and modification time.
func cacheSnapshot(t *testing.T, root string) map[string]string {
	t.Helper()
	snap := map[string]string{}
	err := filepath.WalkDir(root, func(p string, d fs.DirEntry, err error) error {
		if err != nil {
			return err
		}
		info, err := d.Info()
		if err != nil {
			return err
		}
		snap[p] = fmt.Sprintf("%d %v %d", info.Size(), info.Mode(), info.ModTime().UnixNano())
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	return snap
}

// cachePlan is `hindcast plan --json`'s output.
type cachePlan struct {
	Stages []struct {
		Name   string   `json:"name"`
		Known  bool     `json:"known"`
		Items  int      `json:"items"`
		Cached int      `json:"cached"`
		ToRun  []string `json:"to_run"`
		Bytes  int64    `json:"bytes"`
	} `json:"stages"`
}

// cachePlanJSON runs `plan --json` and checks that it changed nothing under
// root.
func cachePlanJSON(t *testing.T, bin, cfg, root string) cachePlan {
	t.Helper()
	before := cacheSnapshot(t, root)
	r := clMustRun(t, bin, nil, "plan", "--config", cfg, "--json")
	var p cachePlan
	if err := json.Unmarshal([]byte(r.stdout), &p); err != nil {
		t.Fatalf("plan --json: %v\n%s", err, r)
	}
	after := cacheSnapshot(t, root)
	for k, v := range after {
		if before[k] != v {
			t.Errorf("plan wrote %s (%q, was %q)", k, v, before[k])
		}
	}
	for k := range before {
		if _, ok := after[k]; !ok {
			t.Errorf("plan removed %s", k)
		}
	}
	if len(p.Stages) != len(clStageNames) {
		t.Fatalf("plan has %d stages, want %d:\n%s", len(p.Stages), len(clStageNames), r.stdout)
	}
	for i, s := range p.Stages {
		if s.Name != clStageNames[i] {
			t.Errorf("plan stage %d is %s, want %s", i, s.Name, clStageNames[i])
		}
	}
	return p
}

// cacheStageEnd returns the frames and bytes that the run's JSON log
// reports for a stage's end (the CLI logs JSON lines when stderr is not a
// terminal).
func cacheStageEnd(t *testing.T, r clResult, stage string) (frames, bytes int64) {
	t.Helper()
	for line := range strings.Lines(r.stderr) {
		var l struct {
			Msg    string `json:"msg"`
			Stage  string `json:"stage"`
			Frames int64  `json:"frames"`
			Bytes  int64  `json:"bytes"`
		}
		if json.Unmarshal([]byte(line), &l) == nil && l.Msg == "stage end" && l.Stage == stage {
			return l.Frames, l.Bytes
		}
	}
	t.Fatalf("no stage end log of %s:\n%s", stage, r)
	return 0, 0
}

// TestCacheNewObjects: new objects are read alone, only the partitions their
// units fall in (SPEC §3.4, computed here) are recomputed, and the version
// equals one from an empty work area over all objects. `plan --json` names
// exactly the new objects and their bytes beforehand, writes nothing, and
// finds everything cached after the run.
func TestCacheNewObjects(t *testing.T) {
	bin := buildHindcast(t)
	dir := t.TempDir()
	logs := filepath.Join(dir, "logs")
	if _, _, err := fleet.Bench(logs, fleet.BenchOptions{Frames: 60000, Seed: 3}); err != nil {
		t.Fatal(err)
	}
	const partitions = 16
	old := clSourceObjects(t, logs)
	cfg := filepath.Join(dir, "c.yaml")
	clWrite(t, cfg, []byte(benchConfigAt(t, "cache-fleet", "work", "out", 16, 11)))
	work, out := filepath.Join(dir, "work"), filepath.Join(dir, "out")

	r1 := clMustRun(t, bin, nil, "run", "--config", cfg, "--version", "v1", "--parallel", "2")
	v1 := clLocalVersion(t, out, "cache-fleet", "v1")
	cacheCheckRun(t, r1, v1, cacheAll(len(old), partitions, false))
	p := cachePlanJSON(t, bin, cfg, dir)
	for i, s := range p.Stages {
		if !s.Known || s.Cached != s.Items || len(s.ToRun) != 0 || s.Bytes != 0 {
			t.Errorf("plan after a run, stage %d: %+v, want everything cached", i, s)
		}
	}

	// Two new units and a later session of a unit the fleet already has, in
	// 2027, long after the fleet's days (2026-11-30 on): one new episode each.
	unit, emb := cacheFirstLine(t, filepath.Join(logs, filepath.FromSlash(old[0])))
	const day = int64(1799136000) * 1e9 // 2027-01-05T08:00:00Z
	news := []struct {
		key, unit, emb string
		start          int64
		n              int
	}{
		{"day=2027-01-05/unit=cl-new-a/session-0001.jsonl", "cl-new-a", "cart2", day, 40},
		{"day=2027-01-05/unit=cl-new-b/session-0001.jsonl", "cl-new-b", "picker6", day + 7e9, 30},
		{"day=2027-01-06/unit=" + unit + "/session-0099.jsonl", unit, emb, day + 86400e9, 25},
	}
	var newKeys []string
	var newBytes, newFrames int64
	touched := map[string]bool{}
	for _, o := range news {
		newBytes += cacheSession(t, filepath.Join(logs, filepath.FromSlash(o.key)), o.unit, o.emb, o.start, o.n)
		newKeys = append(newKeys, o.key)
		newFrames += int64(o.n)
		touched[clPartName(clPartition(o.unit, partitions))] = true
	}
	slices.Sort(newKeys)
	if got := clSourceObjects(t, logs); len(got) != len(old)+len(news) {
		t.Fatalf("%d objects after adding %d to %d", len(got), len(news), len(old))
	}

	t.Logf("%d old objects; new objects %v (%d frames, %d bytes) touch partitions %v of %d",
		len(old), newKeys, newFrames, newBytes, slices.Sorted(maps.Keys(touched)), partitions)

	p = cachePlanJSON(t, bin, cfg, dir)
	if in := p.Stages[0]; !in.Known || in.Items != len(old)+len(news) || in.Cached != len(old) ||
		!slices.Equal(in.ToRun, newKeys) || in.Bytes != newBytes {
		t.Errorf("plan ingest: %+v, want %d items, %d cached, to run %v (%d bytes)", in, len(old)+len(news), len(old), newKeys, newBytes)
	}
	for _, s := range p.Stages[1:] {
		// Which partitions change is known only once the new objects are read.
		if s.Known || len(s.ToRun) != 0 {
			t.Errorf("plan %s: %+v, want not known before ingest has run", s.Name, s)
		}
	}

	before := map[string]map[string]string{}
	for _, st := range clStageNames {
		before[st] = clSeals(t, work, st)
	}
	r2 := clMustRun(t, bin, nil, "run", "--config", cfg, "--version", "v2", "--parallel", "2")
	v2 := clLocalVersion(t, out, "cache-fleet", "v2")
	st := v2.manifest.Stages
	if st[0].Items != len(old)+len(news) || st[0].Reused != len(old) || st[0].Cached {
		t.Errorf("ingest record %+v, want %d items, %d reused", st[0], len(old)+len(news), len(old))
	}
	for _, s := range st[1:] {
		if s.Items != partitions || s.Reused != partitions-len(touched) || s.Cached {
			t.Errorf("%s record %+v, want %d items, %d reused", s.Name, s, partitions, partitions-len(touched))
		}
	}
	// Ingest read the new objects only: their frames (all kept) and bytes.
	if f, b := cacheStageEnd(t, r2, "ingest"); f != newFrames || b != newBytes {
		t.Errorf("ingest processed %d frames, %d bytes; the new objects hold %d frames, %d bytes", f, b, newFrames, newBytes)
	}
	// The items sealed by this run are the new objects and the touched
	// partitions, nothing else.
	wantNew := map[string][]string{"ingest": newKeys}
	for _, s := range clStageNames[1:] {
		wantNew[s] = slices.Sorted(maps.Keys(touched))
	}
	for _, s := range clStageNames {
		var got []string
		for key, id := range clSeals(t, work, s) {
			if _, ok := before[s][key]; !ok {
				got = append(got, id)
			}
		}
		slices.Sort(got)
		if !slices.Equal(got, wantNew[s]) {
			t.Errorf("%s items sealed by the second run: %v, want %v", s, got, wantNew[s])
		}
	}
	f1, f2 := v1.manifest.Funnel, v2.manifest.Funnel
	if f2.Frames-f1.Frames != newFrames || f2.Episodes-f1.Episodes != int64(len(news)) {
		t.Errorf("frames/episodes grew by %d/%d, want %d/%d", f2.Frames-f1.Frames, f2.Episodes-f1.Episodes, newFrames, len(news))
	}

	p = cachePlanJSON(t, bin, cfg, dir)
	for i, s := range p.Stages {
		if !s.Known || s.Cached != s.Items || len(s.ToRun) != 0 || s.Bytes != 0 {
			t.Errorf("plan after the second run, stage %d: %+v, want everything cached", i, s)
		}
	}

	fresh := filepath.Join(dir, "fresh.yaml")
	clWrite(t, fresh, []byte(benchConfigAt(t, "cache-fleet", "fresh-work", "fresh-out", 16, 11)))
	r3 := clMustRun(t, bin, nil, "run", "--config", fresh, "--version", "v3", "--parallel", "2")
	v3 := clLocalVersion(t, filepath.Join(dir, "fresh-out"), "cache-fleet", "v3")
	cacheCheckRun(t, r3, v3, cacheAll(len(old)+len(news), partitions, false))
	clSameContent(t, v3, v2)
}

// benchConfigAt is the bench command's config for the benchmark fleet
// (bench.go: picker6 and cart2, values within ±10) with its own dataset,
// work, output, partitions and seed, and one negative goal per step so the
// scratch-file path of the goals stage runs too.
func benchConfigAt(t *testing.T, dataset, work, output string, partitions int, seed int64) string {
	t.Helper()
	out := benchConfig
	for _, r := range [][2]string{
		{"dataset: bench-fleet\n", "dataset: " + dataset + "\n"},
		{"work: work\n", "work: " + work + "\n"},
		{"output: datasets\n", "output: " + output + "\n"},
		{"partitions: 8\n", fmt.Sprintf("partitions: %d\n", partitions)},
		{"seed: 7\n", fmt.Sprintf("seed: %d\n", seed)},
		{"negative: 0\n", "negative: 1\n"},
	} {
		if strings.Count(out, r[0]) != 1 {
			t.Fatalf("bench config: %q is not there exactly once", r[0])
		}
		out = strings.Replace(out, r[0], r[1], 1)
	}
	return out
}
