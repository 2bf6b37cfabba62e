package recording

import (
	"context"
	"fmt"
	"math"
	"reflect"
	"testing"

	"hindcast/pipeline"
	"hindcast/stages/recording/mcapread"
)

// rec is one message of an in-memory recording, JSON encoded.
type rec struct {
	topic string
	t     int64
	data  string
}

// feedOf hands the messages over in the given (time) order, one JSON
// channel per topic, as mcapread.ReadOrdered would.
func feedOf(msgs []rec) func(func(*mcapread.Message) error) error {
	chans := map[string]*mcapread.Channel{}
	return func(fn func(*mcapread.Message) error) error {
		for i, m := range msgs {
			ch := chans[m.topic]
			if ch == nil {
				ch = &mcapread.Channel{ID: uint16(len(chans) + 1), Topic: m.topic, MessageEncoding: "json"}
				chans[m.topic] = ch
			}
			if err := fn(&mcapread.Message{Channel: ch, Time: m.t, LogTime: uint64(m.t), Seq: int64(i), Data: []byte(m.data)}); err != nil {
				return err
			}
		}
		return nil
	}
}

// tickOut is what a test compares of a tick.
type tickOut struct {
	T      int64
	Reason string
	Stale  string
	Obs    []float64
}

func runTicks(t *testing.T, emb *pipeline.Embodiment, msgs []rec) ([]tickOut, []Tick, Stats) {
	t.Helper()
	var outs []tickOut
	var full []Tick
	st, err := run(context.Background(), emb, feedOf(msgs), func(k *Tick) error {
		o := tickOut{T: k.T, Reason: k.Reason, Stale: k.StaleTopic}
		if k.Reason == "" || k.Reason == pipeline.DimMismatch {
			o.Obs = append([]float64{}, k.Obs...)
		}
		outs = append(outs, o)
		c := *k
		c.Obs = append([]float64(nil), k.Obs...)
		c.Act = append([]float64(nil), k.Act...)
		full = append(full, c)
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	return outs, full, st
}

// oneSource is an embodiment of one obs value from /a field x, rate ticks
// every 100 ns (rate 1e7 per second: P = round(1e9/1e7) = 100).
func oneSource(align string, maxAge int64) *pipeline.Embodiment {
	return &pipeline.Embodiment{Obs: 1, Frames: &pipeline.FramesConfig{
		Rate: 1e7, MaxAge: pipeline.Duration(maxAge),
		Obs: []pipeline.FieldSource{{Topic: "/a", Field: "x", Align: align}},
	}}
}

var fourMsgs = []rec{
	{"/a", 100, `{"x":1}`},
	{"/a", 130, `{"x":2}`},
	{"/a", 250, `{"x":3}`},
	{"/a", 300, `{"x":4}`},
}

func TestAlignModes(t *testing.T) {
	// Values computed by hand from SPEC §7.3 for ticks 100, 200, 300.
	ok := func(tm int64, v float64) tickOut { return tickOut{T: tm, Obs: []float64{v}} }
	stale := func(tm int64) tickOut { return tickOut{T: tm, Reason: pipeline.Stale, Stale: "/a"} }
	cases := []struct {
		name   string
		align  string
		maxAge int64
		msgs   []rec
		want   []tickOut
	}{
		// hold at 200 takes t=130, 70 away: stale past max_age 69, kept at exactly 70.
		{"hold stale", pipeline.AlignHold, 69, fourMsgs, []tickOut{ok(100, 1), stale(200), ok(300, 4)}},
		{"hold edge", pipeline.AlignHold, 70, fourMsgs, []tickOut{ok(100, 1), ok(200, 2), ok(300, 4)}},
		// next at 200 takes t=250, 50 away.
		{"next edge", pipeline.AlignNext, 50, fourMsgs, []tickOut{ok(100, 1), ok(200, 3), ok(300, 4)}},
		{"next stale", pipeline.AlignNext, 49, fourMsgs, []tickOut{ok(100, 1), stale(200), ok(300, 4)}},
		// nearest at 200: 130 is 70 away, 250 is 50 away.
		{"nearest", pipeline.AlignNearest, 50, fourMsgs, []tickOut{ok(100, 1), ok(200, 3), ok(300, 4)}},
		{"nearest stale", pipeline.AlignNearest, 49, fourMsgs, []tickOut{ok(100, 1), stale(200), ok(300, 4)}},
		// nearest at equal distance (150 and 250 around 200) takes hold's.
		{"nearest tie", pipeline.AlignNearest, 50, []rec{{"/a", 100, `{"x":1}`}, {"/a", 150, `{"x":2}`}, {"/a", 250, `{"x":3}`}, {"/a", 300, `{"x":4}`}},
			[]tickOut{ok(100, 1), ok(200, 2), ok(300, 4)}},
		// linear at 200 between (130, 2) and (250, 3): w = 70/120.
		{"linear", pipeline.AlignLinear, 70, fourMsgs, []tickOut{ok(100, 1), ok(200, 2+(3-2)*(float64(70)/float64(120))), ok(300, 4)}},
		{"linear stale", pipeline.AlignLinear, 69, fourMsgs, []tickOut{ok(100, 1), stale(200), ok(300, 4)}},
		// equal times: hold takes the last in file order, next the first.
		{"hold equal times", pipeline.AlignHold, 10, []rec{{"/a", 100, `{"x":1}`}, {"/a", 200, `{"x":5}`}, {"/a", 200, `{"x":6}`}},
			[]tickOut{ok(100, 1), ok(200, 6)}},
		{"next equal times", pipeline.AlignNext, 10, []rec{{"/a", 100, `{"x":1}`}, {"/a", 200, `{"x":5}`}, {"/a", 200, `{"x":6}`}},
			[]tickOut{ok(100, 1), ok(200, 5)}},
		// a tick exactly on a message takes it, whatever the mode.
		{"linear on message", pipeline.AlignLinear, 10, []rec{{"/a", 100, `{"x":1}`}, {"/a", 200, `{"x":7}`}, {"/a", 290, `{"x":9}`}},
			[]tickOut{ok(100, 1), ok(200, 7)}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			got, _, st := runTicks(t, oneSource(c.align, c.maxAge), c.msgs)
			if !reflect.DeepEqual(got, c.want) {
				t.Fatalf("got %+v\nwant %+v", got, c.want)
			}
			if st.Ticks != int64(len(c.want)) || st.Messages["/a"] != int64(len(c.msgs)) {
				t.Fatalf("stats %+v", st)
			}
		})
	}
}

func TestRateTicksAbsoluteMultiples(t *testing.T) {
	// Frame-topic messages from 130 to 470: ticks at every multiple of 100
	// in [130, 470], both ends included → 200, 300, 400.
	msgs := []rec{{"/a", 130, `{"x":1}`}, {"/a", 470, `{"x":2}`}}
	got, _, _ := runTicks(t, oneSource(pipeline.AlignHold, 1000), msgs)
	var ts []int64
	for _, g := range got {
		ts = append(ts, g.T)
	}
	if !reflect.DeepEqual(ts, []int64{200, 300, 400}) {
		t.Fatalf("ticks %v", ts)
	}
	// rate 3 per second: P = round(1e9/3) = 333333333 (SPEC §7.3).
	emb := oneSource(pipeline.AlignHold, 1e9)
	emb.Frames.Rate = 3
	got, _, _ = runTicks(t, emb, []rec{{"/a", 1, `{"x":1}`}, {"/a", 1000000000, `{"x":2}`}})
	ts = nil
	for _, g := range got {
		ts = append(ts, g.T)
	}
	if !reflect.DeepEqual(ts, []int64{333333333, 666666666, 999999999}) {
		t.Fatalf("ticks %v", ts)
	}
}

func TestClockTicks(t *testing.T) {
	emb := oneSource(pipeline.AlignHold, 50)
	emb.Frames.Rate, emb.Frames.Clock = 0, "/c"
	msgs := []rec{
		{"/a", 90, `{"x":1}`},
		{"/c", 105, `{}`},
		{"/c", 105, `{}`},
		{"/c", 150, `not json`}, // undecodable: no tick
		{"/a", 170, `{"x":2}`},
		{"/c", 180, `{}`},
		{"/c", 300, `{}`},
	}
	got, _, st := runTicks(t, emb, msgs)
	want := []tickOut{
		{T: 105, Obs: []float64{1}},
		{T: 180, Obs: []float64{2}},
		{T: 300, Reason: pipeline.Stale, Stale: "/a"},
	}
	if !reflect.DeepEqual(got, want) {
		t.Fatalf("got %+v\nwant %+v", got, want)
	}
	if st.Messages["/c"] != 4 || st.Undecodable["/c"] != 1 || st.Ticks != 3 {
		t.Fatalf("stats %+v", st)
	}
}

func TestLabels(t *testing.T) {
	emb := oneSource(pipeline.AlignHold, 1000)
	emb.Frames.Events = &pipeline.FieldRef{Topic: "/e", Field: "kind"}
	emb.Frames.Task = &pipeline.FieldRef{Topic: "/task", Field: "name"}
	emb.Frames.Success = &pipeline.FieldRef{Topic: "/ok", Field: "ok"}
	msgs := []rec{
		{"/task", 50, `{"name":"pick"}`},
		{"/e", 60, `{"kind":"start"}`},
		{"/a", 100, `{"x":1}`},
		{"/e", 150, `{"kind":"end"}`},
		{"/e", 150, `{"kind":"pause"}`}, // not start/end: ignored
		{"/e", 200, `{"kind":"start"}`}, // exactly on tick 200: in (100, 200]
		{"/ok", 260, `{"ok":true}`},
		{"/a", 300, `{"x":2}`},
	}
	_, full, _ := runTicks(t, emb, msgs)
	type lab struct {
		T          int64
		Ev, Task   string
		HasTask    bool
		Success    bool
		HasSuccess bool
	}
	var got []lab
	for _, k := range full {
		got = append(got, lab{k.T, k.Ev, k.Task, k.HasTask, k.Success, k.HasSuccess})
	}
	want := []lab{
		{100, "start", "pick", true, false, false},
		{200, "start", "pick", true, false, false},
		{300, "", "pick", true, true, true},
	}
	if !reflect.DeepEqual(got, want) {
		t.Fatalf("got %+v\nwant %+v", got, want)
	}
}

func TestTickReasons(t *testing.T) {
	mk := func() *pipeline.Embodiment {
		return &pipeline.Embodiment{Obs: 3, Act: 1, Cameras: []string{"wrist"}, Frames: &pipeline.FramesConfig{
			Rate: 1e7, MaxAge: 1000,
			Obs: []pipeline.FieldSource{
				{Topic: "/a", Field: "p[0:2]"},
				{Topic: "/b", Field: "q", Align: pipeline.AlignLinear},
			},
			Act:     []pipeline.FieldSource{{Topic: "/cmd", Field: "v", MaxAge: 10}},
			Cameras: map[string]pipeline.FieldSource{"wrist": {Topic: "/img", Field: "data"}},
		}}
	}
	// "aGk=" is base64 of "hi" (RFC 4648).
	base := []rec{
		{"/a", 100, `{"p":[1,2,3]}`},
		{"/b", 100, `{"q":10}`},
		{"/cmd", 100, `{"v":[0.5]}`},
		{"/img", 100, `{"data":"aGk="}`},
	}
	t.Run("accepted", func(t *testing.T) {
		_, full, _ := runTicks(t, mk(), base)
		if len(full) != 1 || full[0].Reason != "" || !reflect.DeepEqual(full[0].Obs, []float64{1, 2, 10}) ||
			!reflect.DeepEqual(full[0].Act, []float64{0.5}) || string(full[0].Images[0]) != "hi" || full[0].Index != 1 {
			t.Fatalf("%+v", full)
		}
	})
	t.Run("stale first in frames order", func(t *testing.T) {
		// At 200: /b (obs, linear, no message at or after 200) and /cmd
		// (act, 100 away > max_age 10) are stale; obs comes first.
		msgs := append(append([]rec{}, base...), rec{"/a", 200, `{"p":[1,2,3]}`})
		got, _, _ := runTicks(t, mk(), msgs)
		if len(got) != 2 || got[1].Reason != pipeline.Stale || got[1].Stale != "/b" {
			t.Fatalf("%+v", got)
		}
	})
	t.Run("malformed", func(t *testing.T) {
		for _, bad := range []rec{
			{"/a", 100, `{"p":[1,"x",3]}`},
			{"/a", 100, `{"r":1}`},
			{"/a", 100, `{"p":[1]}`}, // slice [0:2] beyond the array
			{"/img", 100, `{"data":[1,2]}`},
		} {
			// both messages at 100: hold takes the later one in file order.
			msgs := append(append([]rec{}, base...), bad)
			got, _, _ := runTicks(t, mk(), msgs)
			if len(got) != 1 || got[0].Reason != pipeline.Malformed {
				t.Fatalf("%v: %+v", bad, got)
			}
		}
	})
	t.Run("dim_mismatch length", func(t *testing.T) {
		msgs := append(append([]rec{}, base...), rec{"/cmd", 100, `{"v":[0.5,1]}`})
		got, _, _ := runTicks(t, mk(), msgs)
		if len(got) != 1 || got[0].Reason != pipeline.DimMismatch {
			t.Fatalf("%+v", got)
		}
	})
	t.Run("dim_mismatch linear", func(t *testing.T) {
		emb := oneSource(pipeline.AlignLinear, 100)
		emb.Obs = 2
		msgs := []rec{{"/a", 100, `{"x":[1,2]}`}, {"/a", 300, `{"x":[1,2,3]}`}}
		got, _, _ := runTicks(t, emb, msgs)
		want := []string{"", pipeline.DimMismatch, pipeline.DimMismatch}
		for i, g := range got {
			if i >= len(want) || g.Reason != want[i] {
				t.Fatalf("%+v", got)
			}
		}
		if len(got) != 3 {
			t.Fatalf("%+v", got)
		}
	})
	t.Run("non-finite passes through", func(t *testing.T) {
		msgs := []rec{{"/a", 100, `{"x":NaN}`}, {"/a", 200, `{"x":-Infinity}`}}
		_, full, _ := runTicks(t, oneSource(pipeline.AlignHold, 10), msgs)
		if len(full) != 2 || full[0].Reason != "" || !math.IsNaN(full[0].Obs[0]) || !math.IsInf(full[1].Obs[0], -1) {
			t.Fatalf("%+v", full)
		}
	})
}

func TestUndecodableNotUsed(t *testing.T) {
	msgs := []rec{
		{"/a", 100, `{"x":1}`},
		{"/a", 200, `{"x":2`}, // cut JSON: undecodable
		{"/a", 210, `{"x":3}`},
		{"/other", 220, `{"x":3}`}, // not in frames: neither decoded nor counted
		{"/a", 350, `[`},           // undecodable: does not extend the ticks to 300
	}
	got, _, st := runTicks(t, oneSource(pipeline.AlignHold, 150), msgs)
	want := []tickOut{{T: 100, Obs: []float64{1}}, {T: 200, Obs: []float64{1}}}
	if !reflect.DeepEqual(got, want) {
		t.Fatalf("got %+v", got)
	}
	if st.Messages["/a"] != 2 || st.Undecodable["/a"] != 2 || len(st.Messages) != 1 || len(st.Undecodable) != 1 || st.Ticks != 2 {
		t.Fatalf("stats %+v", st)
	}
}

func TestWindowBounded(t *testing.T) {
	// 100000 messages at 1 ns apart, max_age 20: the window of a hold
	// source, and the events and task queues, never hold more than the
	// messages within about max_age+P.
	emb := oneSource(pipeline.AlignHold, 20)
	emb.Frames.Events = &pipeline.FieldRef{Topic: "/e", Field: "kind"}
	emb.Frames.Task = &pipeline.FieldRef{Topic: "/task", Field: "name"}
	var ticks, evs int
	a, err := newAligner(emb, func(k *Tick) error {
		ticks++
		if k.Ev == "start" && k.Task == "t" {
			evs++
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	ch := &mcapread.Channel{Topic: "/a", MessageEncoding: "json"}
	che := &mcapread.Channel{Topic: "/e", MessageEncoding: "json"}
	cht := &mcapread.Channel{Topic: "/task", MessageEncoding: "json"}
	maxBuf := 0
	for i := int64(0); i < 100000; i++ {
		if err := a.add(&mcapread.Message{Channel: ch, Time: i, Data: []byte(fmt.Sprintf(`{"x":%d}`, i))}); err != nil {
			t.Fatal(err)
		}
		for _, m := range []*mcapread.Message{{Channel: che, Time: i, Data: []byte(`{"kind":"start"}`)}, {Channel: cht, Time: i, Data: []byte(`{"name":"t"}`)}} {
			if err := a.add(m); err != nil {
				t.Fatal(err)
			}
		}
		for _, n := range []int{len(a.all[0].buf), len(a.events.queue), len(a.task.queue)} {
			if n > maxBuf {
				maxBuf = n
			}
		}
	}
	if err := a.flush(0, true); err != nil {
		t.Fatal(err)
	}
	// Ticks at 0, 100, …, 99900: 1000, each with an events and a task value.
	if ticks != 1000 || evs != 1000 {
		t.Fatalf("ticks %d, with labels %d", ticks, evs)
	}
	if maxBuf > 20+100+2 {
		t.Fatalf("window grew to %d messages", maxBuf)
	}
}
