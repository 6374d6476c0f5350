package session

import (
	"context"
	"errors"
	"testing"
	"time"
)

// appendRows appends n rows of dimension 1 at the log's next sequence
// number.
func appendRows(l *DrawLog, n int) {
	_, next := l.Span()
	d := Draws{Seq: next, Rows: n, Dim: 1, Values: make([]float64, n), Chains: make([]int, n), Iterations: make([]int64, n)}
	l.append(&d)
}

// readAll reads events from c until the log closes, as "d<rows>" and
// "p<steps>".
func readAll(t *testing.T, l *DrawLog, c Cursor, max int) []string {
	t.Helper()
	var out []string
	for range 1000 {
		ev, err := l.ReadEvent(context.Background(), &c, max)
		if errors.Is(err, ErrLogClosed) {
			return out
		}
		if err != nil {
			t.Fatal(err)
		}
		if ev.Progress != nil {
			out = append(out, "p"+itoa(ev.Progress.Steps))
		} else {
			out = append(out, "d"+itoa(int64(ev.Draws.Rows)))
		}
	}
	t.Fatal("no end")
	return nil
}

func itoa(n int64) string {
	if n < 10 {
		return string(rune('0' + n))
	}
	return itoa(n/10) + string(rune('0'+n%10))
}

// Reports come where they were made among the draws; a reader starting
// mid-run gets the latest report made at or before its start, then the
// rest; a reader further behind than the kept reports skips the oldest.
func TestDrawLogPlacesProgress(t *testing.T) {
	l := NewDrawLog(1, 100)
	l.progress(&Progress{Steps: 1}) // during burn-in: no draws yet
	appendRows(l, 4)
	appendRows(l, 4)
	l.progress(&Progress{Steps: 2, Parameters: []ParameterDiagnostics{{Name: "x"}}})
	appendRows(l, 4)
	l.progress(&Progress{Steps: 3})
	l.close(Finished{})
	if got, want := join(readAll(t, l, l.Cursor(0), 100)), "p1 d8 p2 d4 p3"; got != want {
		t.Errorf("from 0: %s, want %s", got, want)
	}
	if got, want := join(readAll(t, l, l.Cursor(10), 100)), "p2 d2 p3"; got != want {
		t.Errorf("from 10: %s, want %s", got, want)
	}
	if got, want := join(readAll(t, l, l.Cursor(0), 3)), "p1 d3 d3 d2 p2 d3 d1 p3"; got != want {
		t.Errorf("from 0, 3 rows a frame: %s, want %s", got, want)
	}

	many := NewDrawLog(1, 100)
	for i := range progressKept + 3 {
		many.progress(&Progress{Steps: int64(i)})
		appendRows(many, 1)
	}
	many.close(Finished{})
	got := readAll(t, many, many.Cursor(0), 100)
	// Reports 3 to 10 are kept, report i made after i rows.
	if len(got) != 1+2*progressKept || got[0] != "d3" || got[1] != "p3" || got[len(got)-2] != "p10" {
		t.Errorf("from 0 with %d reports made and %d kept: %s", progressKept+3, progressKept, join(got))
	}
}

// A reader waiting during burn-in, when no draw comes, wakes for a
// report.
func TestDrawLogWakesForProgress(t *testing.T) {
	l := NewDrawLog(2, 10)
	c := l.Cursor(0)
	got := make(chan Event, 1)
	go func() {
		ev, _ := l.ReadEvent(context.Background(), &c, 10)
		got <- ev
	}()
	l.progress(&Progress{Steps: 7, State: BurnIn})
	select {
	case ev := <-got:
		if ev.Progress == nil || ev.Progress.Steps != 7 {
			t.Fatalf("event %+v", ev)
		}
	case <-time.After(2 * time.Minute): // safety net only
		t.Fatal("reader did not wake for a report")
	}
}

func join(s []string) string {
	out := ""
	for i, x := range s {
		if i > 0 {
			out += " "
		}
		out += x
	}
	return out
}
