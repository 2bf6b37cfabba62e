package recording

import (
	"context"
	"fmt"
	"math"
	"time"

	"hindcast/pipeline"
	"hindcast/stages/recording/mcapread"
)

// entry is one decodable message of a source, reduced to what the tick
// needs: its numbers or bytes, or bad when its field is missing or of the
// wrong kind (the message still counts for alignment and staleness).
type entry struct {
	t    int64
	vals []float64
	img  []byte
	bad  bool
}

// source is one obs, act or camera source with its window of messages.
type source struct {
	topic  string
	path   []pipeline.PathStep
	align  string
	maxAge int64
	camera bool
	// buf holds, in time order, the last message at or before the pending
	// tick and every later one read so far: nothing older is ever needed.
	buf []entry
	// spare holds image buffers of pruned entries for the next messages:
	// camera frames are the bulk of a recording, and a fresh buffer per
	// frame costs an allocation, its zeroing and the collector's time.
	spare [][]byte
}

// maxSpare bounds the image buffers a camera source keeps for reuse.
const maxSpare = 4

// label is the events, task or success feed: its decoded values queued
// until the tick that takes them.
type label struct {
	topic string
	path  []pipeline.PathStep
	queue []labelValue
}

type labelValue struct {
	t int64
	s string
	b bool
	// ok is false for a value a label cannot use (an events value other
	// than start/end, a success value that is not a bool).
	ok bool
}

// topicFeed lists what one topic feeds, so each message is decoded once.
type topicFeed struct {
	sources []*source
	labels  []*label
	// kind: which label each of labels is (events, task, success).
	kinds []int
	clock bool
	frame bool
}

const (
	labelEvents = iota
	labelTask
	labelSuccess
)

// aligner turns messages in time order into ticks (SPEC §7.3). It works in
// one pass: a tick τ is decided as soon as a message later than τ plus the
// largest max_age has been read (no message after that can change any
// source's value at τ: a message beyond max_age would make it stale anyway),
// and at the end of the stream. Rate ticks start at the first multiple of P
// at or after the first decodable frame-topic message and end at the last
// multiple at or before the latest one; a tick is only decided while it is
// at or before the latest frame-topic time read so far, so the one pass
// gives exactly the ticks from the earliest to the latest frame-topic time
// without reading the recording twice (one read of a remote object, and the
// Tap sees each byte once).
type aligner struct {
	emb      *pipeline.Embodiment
	obs, act []*source
	cams     []*source
	all      []*source // obs, act, cameras: frames order for stale
	events   *label
	task     *label
	success  *label
	topics   map[string]*topicFeed
	decoders map[*mcapread.Channel]decoder
	badChan  map[*mcapread.Channel]bool

	period    int64 // rate ticks; 0 with clock
	lookahead int64 // the largest max_age

	started   bool
	next      int64   // the pending rate tick
	clockT    []int64 // pending clock ticks, distinct, in order
	lastFrame int64   // latest decodable frame-topic time read
	anyFrame  bool
	prevTick  int64
	havePrev  bool

	// last task value: task takes the last one whatever its age.
	taskVal  string
	hasTask  bool
	stats    Stats
	tick     Tick
	fn       func(*Tick) error
	lastTime int64
}

func newAligner(emb *pipeline.Embodiment, fn func(*Tick) error) (*aligner, error) {
	fr := emb.Frames
	a := &aligner{
		emb: emb, fn: fn,
		topics:   map[string]*topicFeed{},
		decoders: map[*mcapread.Channel]decoder{},
		badChan:  map[*mcapread.Channel]bool{},
		stats:    Stats{Messages: map[string]int64{}, Undecodable: map[string]int64{}},
	}
	feed := func(topic string) *topicFeed {
		f := a.topics[topic]
		if f == nil {
			f = &topicFeed{}
			a.topics[topic] = f
		}
		return f
	}
	mk := func(fs pipeline.FieldSource, camera bool) (*source, error) {
		p, err := pipeline.ParseFieldPath(fs.Field)
		if err != nil {
			return nil, fmt.Errorf("frames source %s field %q: %w", fs.Topic, fs.Field, err)
		}
		s := &source{topic: fs.Topic, path: p, align: fs.Align, maxAge: int64(time.Duration(fs.MaxAge)), camera: camera}
		if s.align == "" {
			s.align = pipeline.AlignHold
		}
		if s.maxAge <= 0 {
			s.maxAge = int64(time.Duration(fr.MaxAge))
		}
		if s.maxAge > a.lookahead {
			a.lookahead = s.maxAge
		}
		f := feed(fs.Topic)
		f.sources = append(f.sources, s)
		f.frame = true
		a.all = append(a.all, s)
		return s, nil
	}
	for _, fs := range fr.Obs {
		s, err := mk(fs, false)
		if err != nil {
			return nil, err
		}
		a.obs = append(a.obs, s)
	}
	for _, fs := range fr.Act {
		s, err := mk(fs, false)
		if err != nil {
			return nil, err
		}
		a.act = append(a.act, s)
	}
	for _, cam := range emb.Cameras {
		fs, ok := fr.Cameras[cam]
		if !ok {
			return nil, fmt.Errorf("frames: camera %s has no source", cam)
		}
		s, err := mk(fs, true)
		if err != nil {
			return nil, err
		}
		a.cams = append(a.cams, s)
	}
	mkLabel := func(r *pipeline.FieldRef, kind int) (*label, error) {
		if r == nil {
			return nil, nil
		}
		p, err := pipeline.ParseFieldPath(r.Field)
		if err != nil {
			return nil, fmt.Errorf("frames label %s field %q: %w", r.Topic, r.Field, err)
		}
		l := &label{topic: r.Topic, path: p}
		f := feed(r.Topic)
		f.labels = append(f.labels, l)
		f.kinds = append(f.kinds, kind)
		return l, nil
	}
	var err error
	if a.events, err = mkLabel(fr.Events, labelEvents); err != nil {
		return nil, err
	}
	if a.task, err = mkLabel(fr.Task, labelTask); err != nil {
		return nil, err
	}
	if a.success, err = mkLabel(fr.Success, labelSuccess); err != nil {
		return nil, err
	}
	if fr.Clock != "" {
		feed(fr.Clock).clock = true
	} else {
		if !(fr.Rate > 0) {
			return nil, fmt.Errorf("frames: rate must be > 0 without clock")
		}
		a.period = int64(math.Round(1e9 / fr.Rate))
		if a.period < 1 {
			a.period = 1
		}
	}
	return a, nil
}

// wants says whether a topic is named in frames (only those are decoded).
func (a *aligner) wants(topic string) bool { return a.topics[topic] != nil }

// add takes one message (in time order).
func (a *aligner) add(m *mcapread.Message) error {
	f := a.topics[m.Channel.Topic]
	if f == nil {
		return nil
	}
	topic := m.Channel.Topic
	dec, ok := a.decoders[m.Channel]
	if !ok && !a.badChan[m.Channel] {
		d, err := newDecoder(m.Channel)
		if err != nil {
			a.badChan[m.Channel] = true
		} else {
			a.decoders[m.Channel] = d
			dec = d
		}
	}
	if dec == nil {
		a.stats.Undecodable[topic]++
		return nil
	}
	v, err := dec(m.Data)
	if err != nil {
		a.stats.Undecodable[topic]++
		return nil
	}
	a.stats.Messages[topic]++
	t := m.Time
	// Every tick that this message's time proves final is decided first.
	if err := a.flush(t, false); err != nil {
		return err
	}
	for _, s := range f.sources {
		e := entry{t: t}
		w, err := walk(v, s.path)
		if err == nil {
			if s.camera {
				var b []byte
				if b, err = imageBytes(w); err == nil {
					// Data is only valid during the callback.
					var buf []byte
					if n := len(s.spare); n > 0 {
						buf, s.spare = s.spare[n-1][:0], s.spare[:n-1]
					}
					e.img = append(buf, b...)
				}
			} else {
				e.vals, err = numbers(nil, w)
			}
		}
		e.bad = err != nil
		s.buf = append(s.buf, e)
	}
	for i, l := range f.labels {
		lv := labelValue{t: t}
		if w, err := walk(v, l.path); err == nil {
			switch f.kinds[i] {
			case labelEvents:
				s, ok := w.(string)
				lv.s, lv.ok = s, ok && (s == "start" || s == "end")
			case labelTask:
				lv.s, lv.ok = w.(string)
			case labelSuccess:
				lv.b, lv.ok = w.(bool)
			}
		}
		if lv.ok {
			l.queue = append(l.queue, lv)
		}
	}
	if f.clock && (len(a.clockT) == 0 || a.clockT[len(a.clockT)-1] != t) && (!a.havePrev || t > a.prevTick) {
		a.clockT = append(a.clockT, t)
	}
	if f.frame {
		if !a.anyFrame && a.period > 0 {
			a.next = ceilMul(t, a.period)
		}
		a.anyFrame = true
		a.lastFrame = t
	}
	a.prune(t)
	return nil
}

// ceilMul is the first multiple of p at or after t.
func ceilMul(t, p int64) int64 {
	q := t / p
	if t%p != 0 && t > 0 {
		q++
	}
	return q * p
}

// flush decides every pending tick τ with τ + lookahead < now (or all of
// them at the end of the stream).
func (a *aligner) flush(now int64, end bool) error {
	for {
		var tau int64
		if a.period > 0 {
			if !a.anyFrame || a.next > a.lastFrame {
				return nil
			}
			tau = a.next
		} else {
			if len(a.clockT) == 0 {
				return nil
			}
			tau = a.clockT[0]
		}
		if !end && tau >= now-a.lookahead {
			return nil
		}
		if err := a.emit(tau); err != nil {
			return err
		}
		if a.period > 0 {
			a.next += a.period
		} else {
			a.clockT = a.clockT[1:]
		}
	}
}

// pick finds the hold (last with time ≤ τ) and next (first with time ≥ τ)
// messages of a source; -1 when there is none.
func (s *source) pick(tau int64) (hold, next int) {
	hold, next = -1, -1
	for i := range s.buf {
		if s.buf[i].t <= tau {
			hold = i
		}
		if next < 0 && s.buf[i].t >= tau {
			next = i
		}
	}
	return hold, next
}

func abs64(x int64) int64 {
	if x < 0 {
		return -x
	}
	return x
}

// value is a source's value at τ: the messages it uses, or stale.
func (s *source) value(tau int64) (used []int, stale bool) {
	h, n := s.pick(tau)
	ok := func(i int) bool { return i >= 0 && abs64(s.buf[i].t-tau) <= s.maxAge }
	switch s.align {
	case pipeline.AlignNext:
		if !ok(n) {
			return nil, true
		}
		return []int{n}, false
	case pipeline.AlignNearest:
		i := h
		if h < 0 || (n >= 0 && s.buf[n].t-tau < tau-s.buf[h].t) {
			i = n
		}
		if !ok(i) {
			return nil, true
		}
		return []int{i}, false
	case pipeline.AlignLinear:
		if h >= 0 && s.buf[h].t == tau {
			return []int{h}, false
		}
		if !ok(h) || !ok(n) {
			return nil, true
		}
		return []int{h, n}, false
	default:
		if !ok(h) {
			return nil, true
		}
		return []int{h}, false
	}
}

// emit decides the tick τ (SPEC §7.3, §7.4) and hands it to fn.
func (a *aligner) emit(tau int64) error {
	a.stats.Ticks++
	t := &a.tick
	// Obs and Act are fresh per tick: the caller may keep them. Images
	// alias the sources' buffers, which are reused once pruned.
	*t = Tick{Index: a.stats.Ticks, T: tau, HasAct: len(a.act) > 0}
	// Labels over (τ′, τ]; task is the last ≤ τ whatever its age.
	if a.events != nil {
		for len(a.events.queue) > 0 && a.events.queue[0].t <= tau {
			if !a.havePrev || a.events.queue[0].t > a.prevTick {
				t.Ev = a.events.queue[0].s
			}
			a.events.queue = a.events.queue[1:]
		}
	}
	if a.success != nil {
		for len(a.success.queue) > 0 && a.success.queue[0].t <= tau {
			if !a.havePrev || a.success.queue[0].t > a.prevTick {
				t.Success, t.HasSuccess = a.success.queue[0].b, true
			}
			a.success.queue = a.success.queue[1:]
		}
	}
	if a.task != nil {
		for len(a.task.queue) > 0 && a.task.queue[0].t <= tau {
			a.taskVal, a.hasTask = a.task.queue[0].s, true
			a.task.queue = a.task.queue[1:]
		}
		t.Task, t.HasTask = a.taskVal, a.hasTask
	}
	a.prevTick, a.havePrev = tau, true

	uses := make([][]int, len(a.all))
	for i, s := range a.all {
		u, stale := s.value(tau)
		if stale && t.Reason == "" {
			t.Reason, t.StaleTopic = pipeline.Stale, s.topic
		}
		uses[i] = u
	}
	if t.Reason == "" {
	check:
		for i, s := range a.all {
			for _, j := range uses[i] {
				if s.buf[j].bad {
					t.Reason = pipeline.Malformed
					break check
				}
			}
		}
	}
	if t.Reason == "" {
		dim := false
		collect := func(dst []float64, srcs []*source, off int) []float64 {
			for k, s := range srcs {
				u := uses[off+k]
				if len(u) == 1 {
					dst = append(dst, s.buf[u[0]].vals...)
					continue
				}
				ea, eb := s.buf[u[0]], s.buf[u[1]]
				if len(ea.vals) != len(eb.vals) {
					dim = true
					continue
				}
				w := float64(tau-ea.t) / float64(eb.t-ea.t)
				for x := range ea.vals {
					dst = append(dst, ea.vals[x]+(eb.vals[x]-ea.vals[x])*w)
				}
			}
			return dst
		}
		t.Obs = collect(t.Obs, a.obs, 0)
		t.Act = collect(t.Act, a.act, len(a.obs))
		if !t.HasAct {
			t.Act = nil
		}
		if dim || len(t.Obs) != a.emb.Obs || (t.HasAct && len(t.Act) != a.emb.Act) {
			t.Reason = pipeline.DimMismatch
		}
		if !dim {
			for k, s := range a.cams {
				t.Images = append(t.Images, s.buf[uses[len(a.obs)+len(a.act)+k][0]].img)
			}
		}
	}
	return a.fn(t)
}

// prune drops the messages no later tick can use: all before the last one
// earlier than the earliest tick still to come (messages at that tick's time
// stay: next takes the first of them, hold the last) (ticks only move forward, and no
// tick to come is earlier than the message just read). This keeps, per
// source, only the messages within its window around the pending tick.
func (a *aligner) prune(now int64) {
	tau := now
	if a.period > 0 && a.anyFrame && a.next < tau {
		tau = a.next
	} else if a.period == 0 && len(a.clockT) > 0 && a.clockT[0] < tau {
		tau = a.clockT[0]
	}
	// Labels: task keeps only its last value before tau; events and success
	// values before tau all fall in the next tick's (τ′, τ], where only the
	// last one counts.
	if a.task != nil {
		for len(a.task.queue) > 0 && a.task.queue[0].t < tau {
			a.taskVal, a.hasTask = a.task.queue[0].s, true
			a.task.queue = a.task.queue[1:]
		}
	}
	for _, l := range []*label{a.events, a.success} {
		if l == nil {
			continue
		}
		k := 0
		for k+1 < len(l.queue) && l.queue[k+1].t < tau {
			k++
		}
		if k > 0 {
			l.queue = append(l.queue[:0], l.queue[k:]...)
		}
	}
	for _, s := range a.all {
		k := 0
		for k+1 < len(s.buf) && s.buf[k+1].t < tau {
			k++
		}
		if k > 0 {
			// No tick to come uses these entries, and the ticks that did
			// have been handed over (Tick.Images is valid during fn only).
			for i := 0; i < k && len(s.spare) < maxSpare; i++ {
				if s.buf[i].img != nil {
					s.spare = append(s.spare, s.buf[i].img)
				}
			}
			n := copy(s.buf, s.buf[k:])
			for i := n; i < len(s.buf); i++ {
				s.buf[i] = entry{}
			}
			s.buf = s.buf[:n]
		}
	}
}

// run is Assemble's core over any message feed in time order; it exists so
// the aligner is testable without an MCAP file.
func run(ctx context.Context, emb *pipeline.Embodiment, feed func(fn func(*mcapread.Message) error) error, fn func(*Tick) error) (Stats, error) {
	a, err := newAligner(emb, fn)
	if err != nil {
		return Stats{}, err
	}
	err = feed(func(m *mcapread.Message) error {
		if err := ctx.Err(); err != nil {
			return err
		}
		return a.add(m)
	})
	if err != nil {
		return a.stats, err
	}
	if err := a.flush(0, true); err != nil {
		return a.stats, err
	}
	return a.stats, nil
}
