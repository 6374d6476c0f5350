//go:build race

package session

// raceEnabled is true when the tests run under the race detector, whose
// instrumentation allocates on its own: allocation counts are taken
// without it (scripts/go-tests runs those tests in a separate plain run).
const raceEnabled = true
