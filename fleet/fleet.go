// Package fleet writes the logs of an invented fleet, "Larkspur Depot", a
// warehouse that runs aisle-picking arms (embodiment picker6) and floor carts
// (embodiment cart2). Demo writes a small fleet that holds every fault the
// pipeline must survive, so `hindcast demo` can show each drop reason on data
// that looks real; Bench writes a large fault-free fleet sized for timing runs
// against the peer job. No real company, unit or recording is behind any of it.
//
// Every byte is a function of the arguments: numbers are written with a fixed
// number of decimals and all randomness comes from seeded PCG generators, so two
// runs give identical files and a dataset built from them can be compared
// byte for byte.
package fleet

import (
	"math"
	"math/rand/v2"
	"strconv"
)

const (
	picker6 = "picker6"
	cart2   = "cart2"

	// day0 is 2026-11-30T00:00:00Z in nanoseconds since the Unix epoch; all
	// invented sessions happen on or after it.
	day0 = int64(1795996800) * 1e9

	p6Period = int64(100e6) // picker6 logs at 10 Hz
	c2Period = int64(50e6)  // cart2 logs at 20 Hz

	p6Obs, p6Act = 10, 7
	c2Obs, c2Act = 5, 2
)

// frame is one log line before it is written. Fields left empty are omitted
// from the line, the way real loggers leave out what they do not know.
type frame struct {
	unit    string
	emb     string
	t       int64
	obs     []float64
	act     []float64
	ev      string
	task    string
	success int8   // 0: absent, 1: true, -1: false
	img     string // the wrist camera's value as written; "" writes no img field
	extra   string // raw JSON members written before the closing brace (unknown fields)
}

// appendFrame appends f as one JSON line without its line end. Field order is
// fixed so the same frame always gives the same bytes.
func appendFrame(b []byte, f *frame) []byte {
	b = append(b, `{"unit":`...)
	b = appendString(b, f.unit)
	b = append(b, `,"embodiment":`...)
	b = appendString(b, f.emb)
	b = append(b, `,"t":`...)
	b = strconv.AppendInt(b, f.t, 10)
	b = append(b, `,"obs":`...)
	b = appendVector(b, f.obs)
	if f.act != nil {
		b = append(b, `,"act":`...)
		b = appendVector(b, f.act)
	}
	if f.ev != "" {
		b = append(b, `,"ev":`...)
		b = appendString(b, f.ev)
	}
	if f.task != "" {
		b = append(b, `,"task":`...)
		b = appendString(b, f.task)
	}
	switch f.success {
	case 1:
		b = append(b, `,"success":true`...)
	case -1:
		b = append(b, `,"success":false`...)
	}
	if f.img != "" {
		b = append(b, `,"img":{"wrist":`...)
		b = appendString(b, f.img)
		b = append(b, '}')
	}
	if f.extra != "" {
		b = append(b, ',')
		b = append(b, f.extra...)
	}
	return append(b, '}')
}

func appendVector(b []byte, v []float64) []byte {
	b = append(b, '[')
	for i, x := range v {
		if i > 0 {
			b = append(b, ',')
		}
		b = appendFixed6(b, x)
	}
	return append(b, ']')
}

// appendString writes s as a JSON string (RFC 8259 §7). The invented ids, keys
// and URIs are plain ASCII, so only the characters JSON forbids raw are escaped.
func appendString(b []byte, s string) []byte {
	const hex = "0123456789abcdef"
	b = append(b, '"')
	for i := 0; i < len(s); i++ {
		c := s[i]
		switch {
		case c == '"' || c == '\\':
			b = append(b, '\\', c)
		case c < 0x20:
			b = append(b, '\\', 'u', '0', '0', hex[c>>4], hex[c&0xf])
		default:
			b = append(b, c)
		}
	}
	return append(b, '"')
}

// appendFixed6 writes v with exactly six decimals, like
// strconv.AppendFloat(b, v, 'f', 6, 64) of v rounded to a multiple of 1e-6,
// but through integer formatting: the exact decimal conversion behind
// AppendFloat's 'f' format costs several times more, and the benchmark fleet
// writes a few hundred million numbers. Zero is written without a sign.
// Non-finite values are written as the bare tokens NaN, Infinity and
// -Infinity, as common loggers do (SPEC §1), so the demo can hold such lines.
func appendFixed6(b []byte, v float64) []byte {
	switch {
	case math.IsNaN(v):
		return append(b, "NaN"...)
	case math.IsInf(v, 1):
		return append(b, "Infinity"...)
	case math.IsInf(v, -1):
		return append(b, "-Infinity"...)
	case math.Abs(v) >= 1e9:
		// Beyond what v*1e6 holds exactly in an int64-safe float; never the
		// case for the invented sensors, kept for completeness.
		return strconv.AppendFloat(b, v, 'f', 6, 64)
	}
	m := math.Round(v * 1e6)
	if m < 0 {
		b = append(b, '-')
		m = -m
	}
	n := int64(m)
	b = strconv.AppendInt(b, n/1e6, 10)
	frac := n % 1e6
	var d [7]byte
	d[0] = '.'
	for i := 6; i >= 1; i-- {
		d[i] = byte('0' + frac%10)
		frac /= 10
	}
	return append(b, d[:]...)
}

// arm generates a picker6 episode: six joints swinging smoothly, a gripper that
// opens and closes, and the gripper position (obs 7, 8, 9) moving from a start
// to a target point, so the last frames of an episode sit at its goal.
type arm struct {
	amp, off, freq, phase [6]float64
	from, to              [3]float64
	grip                  float64 // gripper frequency, Hz
	steps                 int
}

func newArm(rng *rand.Rand, steps int, from [3]float64) arm {
	a := arm{steps: steps, from: from, grip: 0.05 + 0.1*rng.Float64()}
	for j := range 6 {
		a.amp[j] = 0.2 + rng.Float64()
		a.off[j] = 1.6 * (rng.Float64() - 0.5)
		a.freq[j] = 0.02 + 0.1*rng.Float64()
		a.phase[j] = 2 * math.Pi * rng.Float64()
	}
	a.to = [3]float64{0.2 + 0.7*rng.Float64(), 1.2 * (rng.Float64() - 0.5), 0.1 + 1.3*rng.Float64()}
	return a
}

// fill writes step i's obs and act (len 10 and 7); noise is added from rng.
func (a *arm) fill(rng *rand.Rand, i int, obs, act []float64) {
	tau := float64(i) * 0.1 // seconds into the episode, at 10 Hz
	for j := range 6 {
		w := 2 * math.Pi * a.freq[j]
		s, c := math.Sincos(w*tau + a.phase[j])
		obs[j] = a.off[j] + a.amp[j]*s + noise(rng, 0.0005)
		act[j] = clamp(a.amp[j]*w*c*0.5+noise(rng, 0.002), 0.999)
	}
	gs, gc := math.Sincos(2 * math.Pi * a.grip * tau)
	obs[6] = 0.5 + 0.45*gs + noise(rng, 0.0005)
	act[6] = clamp(0.9*gc+noise(rng, 0.002), 0.999)
	s := 0.0
	if a.steps > 1 {
		s = float64(i) / float64(a.steps-1)
	}
	blend := (1 - math.Cos(math.Pi*s)) / 2
	for k := range 3 {
		obs[7+k] = a.from[k] + (a.to[k]-a.from[k])*blend + noise(rng, 0.0005)
	}
}

// cart generates a cart2 episode: the cart drives along an elliptic loop
// around the aisles (6 m by 4 m half-axes) from one point to the next, easing
// in and out. obs is x, y, heading, speed, yaw rate; act is throttle, steer.
type cart struct {
	from, delta float64 // loop angle at the start and its change over the episode
	steps       int
}

func newCart(rng *rand.Rand, steps int, from float64) cart {
	duration := float64(steps) * 0.05
	speed := 0.4 + 0.5*rng.Float64()     // mean speed, m/s; peaks stay under 2 m/s
	delta := speed * duration / 5        // ~5 m mean radius
	delta = math.Min(delta, 1.5*math.Pi) // never lap the loop
	if rng.IntN(2) == 0 {
		delta = -delta
	}
	return cart{from: from, delta: delta, steps: steps}
}

func (c *cart) angle(i int) float64 {
	s := 0.0
	if c.steps > 1 {
		s = float64(i) / float64(c.steps-1)
	}
	return c.from + c.delta*(1-math.Cos(math.Pi*s))/2
}

// heading is the direction of travel at loop angle th.
func (c *cart) heading(th float64) float64 {
	sn, cs := math.Sincos(th)
	dx, dy := -6*sn, 4*cs
	if c.delta < 0 {
		dx, dy = -dx, -dy
	}
	return math.Atan2(dy, dx)
}

// fill writes step i's obs and act (len 5 and 2).
func (c *cart) fill(rng *rand.Rand, i int, obs, act []float64) {
	const dt = 0.05
	th := c.angle(i)
	sn, cs := math.Sincos(th)
	s := 0.0
	if c.steps > 1 {
		s = float64(i) / float64(c.steps-1)
	}
	duration := float64(c.steps-1) * dt
	if duration <= 0 {
		duration = dt
	}
	dth := c.delta * math.Pi / 2 * math.Sin(math.Pi*s) / duration // loop angle rate
	speed := math.Abs(dth) * math.Hypot(6*sn, 4*cs)
	h0, h1 := c.heading(th), c.heading(c.angle(i+1))
	dh := math.Remainder(h1-h0, 2*math.Pi)
	yaw := dh / dt
	obs[0] = 6*cs + noise(rng, 0.002)
	obs[1] = 4*sn + noise(rng, 0.002)
	obs[2] = h0
	obs[3] = speed + noise(rng, 0.001)
	obs[4] = yaw + noise(rng, 0.001)
	act[0] = clamp(speed/2+noise(rng, 0.002), 0.999)
	act[1] = clamp(yaw+noise(rng, 0.002), 0.999)
}

// noise is uniform on [-a, a): cheaper than a normal draw and just as good at
// keeping consecutive frames from being identical.
func noise(rng *rand.Rand, a float64) float64 {
	return a * (2*rng.Float64() - 1)
}

func clamp(v, lim float64) float64 {
	return math.Max(-lim, math.Min(lim, v))
}

// jitter returns a capture-time jitter of at most ±2 ms, well below half a
// period, so t stays strictly increasing within a session.
func jitter(rng *rand.Rand) int64 {
	return rng.Int64N(4e6) - 2e6
}
