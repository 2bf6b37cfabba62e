//go:build race

package stages

// raceDetector says the tests run under the race detector, which slows
// instrumented code (decompression, JSON parsing) by about an order of
// magnitude (measured here: the bomb tests took 361 s under -race against
// about 160 s without); the bomb tests then run smaller bombs of the same
// shape, so that CI, which runs everything under -race, stays well inside
// its time budget.
const raceDetector = true
