//go:build !race

package stages

// raceDetector: see race_on_test.go.
const raceDetector = false
