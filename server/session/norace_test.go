//go:build !race

package session

// raceEnabled is true when the tests run under the race detector (see
// race_test.go).
const raceEnabled = false
