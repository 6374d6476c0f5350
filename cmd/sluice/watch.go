package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"math"
	"os"
	"strings"
	"sync"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"sluice/client"
)

// watch follows a running session from another terminal (the Follow rpc)
// and shows its progress with the same view as the demo.
func watch(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("watch", flag.ContinueOnError)
	fs.SetOutput(stderr)
	target := fs.String("target", "127.0.0.1:7070", "address of the sluice server")
	token := fs.String("token", "", "the session's token (Registered.resume_token), which the server asks every follower for")
	plain := fs.Bool("plain", false, "plain lines even on a terminal")
	insecureFlag := fs.Bool("insecure", false, "plain-text connection to a server that is not on loopback")
	setHelp(fs, help{
		usage: "sluice watch SESSION --token TOKEN [flags]",
		about: "Follows a running session (its session id, as Registered reports it) from another terminal and shows " +
			"its progress as it happens: the budget used and left with an estimate of the time to finish, the worst " +
			"R-hat and the smallest ESS, the Stein discrepancy, the targets and any warning as it appears. On a terminal " +
			"it draws a bar and redraws in place; otherwise (or with --plain) it prints one line per progress report, at " +
			"most one a second. It exits when the session finishes (status 0) or the server ends the stream (status 1).",
		examples: []string{
			"sluice watch 5f0c2a9e41d7b3c88e6a1f2d9b4c7e03 --token \"$SESSION_TOKEN\" --target 127.0.0.1:7070",
			"sluice watch 5f0c2a9e41d7b3c88e6a1f2d9b4c7e03 --token \"$SESSION_TOKEN\" --plain > progress.txt",
		},
	})
	var id string
	if len(args) > 0 && !strings.HasPrefix(args[0], "-") {
		id, args = args[0], args[1:]
	}
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if id == "" {
		return usagef("name the session to watch: sluice watch SESSION")
	}
	var dopts []client.DialOption
	if *insecureFlag {
		dopts = append(dopts, client.WithInsecure())
	}
	cc, err := client.Dial(*target, dopts...)
	if err != nil {
		return err
	}
	defer cc.Close()
	v := newView(stdout, isTerminal(stdout) && !*plain, time.Now)
	v.title = "session " + id
	opts := []client.Option{client.OnFollowHeader(v.header), client.OnProgress(v.progress)}
	sum, err := followWithToken(ctx, cc, id, *token, 0, opts...)
	if status.Code(err) == codes.OutOfRange && sum != nil && sum.Header != nil {
		// The first draws have left the server's buffer (a long run): the
		// view needs none of them, so follow from the latest on.
		sum, err = followWithToken(ctx, cc, id, *token, sum.Header.NextSeq, opts...)
	}
	if err != nil {
		v.stop()
		return fmt.Errorf("following %s: %w", id, err)
	}
	v.finish(sum)
	return nil
}

// followWithToken follows session id, presenting its token, from draw
// from on.
func followWithToken(ctx context.Context, cc grpc.ClientConnInterface, id, token string, from uint64, opts ...client.Option) (*client.Summary, error) {
	if token == "" {
		return nil, usagef("--token: the session's token is required (Registered.resume_token; the demo prints it)")
	}
	if strings.ContainsAny(token, " \t\n") {
		return nil, usagef("--token %q: a token has no spaces", token)
	}
	return client.Follow(ctx, cc, id, token, from, opts...)
}

// isTerminal reports whether w is a character device (a terminal).
func isTerminal(w io.Writer) bool {
	f, ok := w.(*os.File)
	if !ok {
		return false
	}
	st, err := f.Stat()
	return err == nil && st.Mode()&os.ModeCharDevice != 0
}

// view shows a session's progress, shared by `sluice watch` and `sluice
// demo`. On a terminal it redraws a few lines in place (a bar, the
// budget, the accuracy, the targets), at most ten times a second, with
// warnings printed above them once each as they appear; otherwise it
// prints one plain line per report, at most one a second, and the
// warnings as lines of their own. On a terminal a report that comes
// sooner than a tenth of a second after the last frame is drawn when that
// tenth has passed, unless a newer one replaces it.
type view struct {
	w     io.Writer
	tty   bool
	now   func() time.Time
	title string
	head  *client.FollowHeader

	mu      sync.Mutex
	pending *client.Progress // a report not drawn yet (terminal only)
	timer   *time.Timer      // draws pending once the gap has passed
	drawn   int              // lines of the last frame on the terminal
	shown   time.Time
	seen    map[string]bool // warnings already shown
}

func newView(w io.Writer, tty bool, now func() time.Time) *view {
	return &view{w: w, tty: tty, now: now, seen: map[string]bool{}}
}

// header records the session's figures (kernel, chains, budget); the
// plain form prints them once.
func (v *view) header(h *client.FollowHeader) {
	v.mu.Lock()
	defer v.mu.Unlock()
	again := v.head != nil
	v.head = h
	if !v.tty && !again {
		fmt.Fprintln(v.w, headerLine(v.title, h))
	}
}

// progress shows a report (on a terminal, at most ten frames a second;
// as plain lines, at most one a second).
func (v *view) progress(p *client.Progress) {
	q := *p
	v.mu.Lock()
	defer v.mu.Unlock()
	for _, w := range warnings(p) {
		if !v.seen[w] {
			v.seen[w] = true
			v.clear()
			fmt.Fprintln(v.w, "warning: "+w)
			v.shown = time.Time{}
		}
	}
	gap := time.Second
	if v.tty {
		gap = 100 * time.Millisecond
	}
	t := v.now()
	if v.shown.IsZero() || t.Sub(v.shown) >= gap {
		v.shown, v.pending = t, nil
		v.draw(&q)
		return
	}
	if !v.tty {
		return
	}
	v.pending = &q
	if v.timer == nil {
		v.timer = time.AfterFunc(gap-t.Sub(v.shown), v.flush)
	}
}

// flush draws the pending report.
func (v *view) flush() {
	v.mu.Lock()
	defer v.mu.Unlock()
	v.timer = nil
	if v.pending != nil {
		v.shown = v.now()
		v.draw(v.pending)
		v.pending = nil
	}
}

// halt stops a pending draw; the caller holds mu.
func (v *view) halt() {
	if v.timer != nil {
		v.timer.Stop()
		v.timer = nil
	}
	v.pending = nil
}

// draw shows p: the frame on a terminal, a line otherwise.
func (v *view) draw(p *client.Progress) {
	if !v.tty {
		fmt.Fprintln(v.w, plainLine(p, v.head))
		return
	}
	lines := frame(v.title, v.head, p)
	v.clear()
	for _, l := range lines {
		fmt.Fprint(v.w, "\033[K"+l+"\n")
	}
	v.drawn = len(lines)
}

// clear moves the cursor back to the top of the last frame and erases it,
// so what comes next replaces it.
func (v *view) clear() {
	if v.tty && v.drawn > 0 {
		fmt.Fprintf(v.w, "\033[%dF\033[J", v.drawn)
		v.drawn = 0
	}
}

// stop leaves the last frame on the screen (after an error).
func (v *view) stop() {
	v.mu.Lock()
	defer v.mu.Unlock()
	v.halt()
	v.drawn = 0
}

// finish shows the final figures and why the session ended.
func (v *view) finish(s *client.Summary) {
	v.mu.Lock()
	defer v.mu.Unlock()
	v.halt()
	p := s.Progress
	for _, w := range warnings(&p) {
		if !v.seen[w] {
			v.seen[w] = true
			v.clear()
			fmt.Fprintln(v.w, "warning: "+w)
		}
	}
	if v.tty {
		v.draw(&p)
		v.drawn = 0
	}
	fmt.Fprintln(v.w, finishLine(s))
}

// done erases the live frame (the demo prints its own summary after).
func (v *view) done() {
	v.mu.Lock()
	defer v.mu.Unlock()
	v.halt()
	v.clear()
}

// headerLine is the plain first line: what the session samples and its
// budget.
func headerLine(title string, h *client.FollowHeader) string {
	var b []string
	if h.DrawsPerChain > 0 {
		b = append(b, fmt.Sprintf("%d draws per chain after %d burn-in steps, keeping every %d", h.DrawsPerChain, h.BurnIn, max(1, h.KeepEvery)))
	}
	if h.MaxEvaluations > 0 {
		b = append(b, fmt.Sprintf("at most %d evaluations", h.MaxEvaluations))
	}
	if h.MaxTime > 0 {
		b = append(b, fmt.Sprintf("at most %s", h.MaxTime))
	}
	if len(b) == 0 {
		b = append(b, "no budget but the server's")
	}
	return fmt.Sprintf("%s: kernel %s, %d chains × %d parameters, step %.4g; %s", title, h.Kernel, h.Chains, h.Dim, h.Step, strings.Join(b, ", "))
}

// budgetShare is how much of the budget that runs out first is used, in
// [0, 1], with that budget's name; ok is false when no budget is known.
func budgetShare(p *client.Progress, h *client.FollowHeader) (share float64, which string, ok bool) {
	consider := func(f float64, name string) {
		if f >= 0 && (!ok || f > share) {
			share, which, ok = min(f, 1), name, true
		}
	}
	if h != nil && h.DrawsPerChain > 0 {
		total := h.BurnIn + h.DrawsPerChain*max(1, h.KeepEvery)
		consider(float64(p.Steps)/float64(total), "draws")
	}
	if p.EvaluationsLeft >= 0 && p.EvaluationsUsed+p.EvaluationsLeft > 0 {
		consider(float64(p.EvaluationsUsed)/float64(p.EvaluationsUsed+p.EvaluationsLeft), "evaluations")
	}
	if p.TimeLeft >= 0 && p.Elapsed+p.TimeLeft > 0 {
		consider(p.Elapsed.Seconds()/(p.Elapsed+p.TimeLeft).Seconds(), "time")
	}
	return share, which, ok
}

// timeToFinish extrapolates the elapsed time over the share of the budget
// used (at the rate so far); −1 when it cannot.
func timeToFinish(p *client.Progress, share float64) time.Duration {
	if share <= 0 || p.Elapsed <= 0 {
		return -1
	}
	return time.Duration(float64(p.Elapsed) * (1 - share) / share)
}

// accuracy is the worst R-hat and the smallest ESS over the parameters,
// with the parameters they belong to; NaN when not measured yet.
func accuracy(p *client.Progress) (rhat float64, rhatOf string, ess float64, essOf string) {
	rhat, ess = math.NaN(), math.NaN()
	for _, d := range p.Parameters {
		if !math.IsNaN(d.Rhat) && !(d.Rhat <= rhat) {
			rhat, rhatOf = d.Rhat, d.Name
		}
		for _, e := range []float64{d.BulkESS, d.TailESS} {
			if !math.IsNaN(e) && !(e >= ess) {
				ess, essOf = e, d.Name
			}
		}
	}
	return rhat, rhatOf, ess, essOf
}

// figures is the line of accuracy figures shared by both forms.
func figures(p *client.Progress) string {
	rhat, rhatOf, ess, essOf := accuracy(p)
	var b []string
	if math.IsNaN(rhat) {
		b = append(b, "R-hat not measured yet")
	} else {
		b = append(b, fmt.Sprintf("worst R-hat %.3f (%s)", rhat, rhatOf), fmt.Sprintf("smallest ESS %.0f (%s)", ess, essOf))
	}
	if p.KSD >= 0 {
		b = append(b, fmt.Sprintf("Stein %.3g", p.KSD))
	}
	return strings.Join(b, ", ")
}

// budgetText says how far the budget is and what is left.
func budgetText(p *client.Progress, h *client.FollowHeader) string {
	steps := fmt.Sprintf("step %d", p.Steps)
	if h != nil && h.DrawsPerChain > 0 {
		steps += fmt.Sprintf("/%d", h.BurnIn+h.DrawsPerChain*max(1, h.KeepEvery))
	}
	s := fmt.Sprintf("%s, %s, %d evaluations", p.State, steps, p.EvaluationsUsed)
	if p.EvaluationsLeft >= 0 {
		s += fmt.Sprintf(" (%d left)", p.EvaluationsLeft)
	}
	s += fmt.Sprintf(", %.1f s", p.Elapsed.Seconds())
	if share, which, ok := budgetShare(p, h); ok && share < 1 && p.State != client.Finished {
		if eta := timeToFinish(p, share); eta >= 0 {
			s += fmt.Sprintf(", about %s to finish (%s budget)", eta.Round(100*time.Millisecond), which)
		}
	}
	return s
}

// plainLine is one progress report as a line.
func plainLine(p *client.Progress, h *client.FollowHeader) string {
	s := ""
	if share, _, ok := budgetShare(p, h); ok {
		s = fmt.Sprintf("%3.0f%% ", 100*share)
	}
	return s + budgetText(p, h) + "; " + figures(p) + targetsText(p)
}

// targetsText lists the targets as "; targets: max_rhat 1.004/1.01 met".
func targetsText(p *client.Progress) string {
	if len(p.Targets) == 0 {
		return ""
	}
	var b []string
	for _, t := range p.Targets {
		state := "not yet"
		if t.Met {
			state = "met"
		}
		b = append(b, fmt.Sprintf("%s %.4g/%.4g %s", t.Name, t.Current, t.Want, state))
	}
	return "; targets: " + strings.Join(b, ", ")
}

// barWidth is the width of the terminal bar in cells.
const barWidth = 30

// bar draws share in [0, 1] as "[█████░░░░░]  50%".
func bar(share float64) string {
	n := int(math.Round(share * barWidth))
	return "[" + strings.Repeat("█", n) + strings.Repeat("░", barWidth-n) + fmt.Sprintf("] %3.0f%%", 100*share)
}

// frame is the terminal view of one report, a few lines.
func frame(title string, h *client.FollowHeader, p *client.Progress) []string {
	top := title
	if h != nil {
		top = fmt.Sprintf("%s: kernel %s, %d chains × %d parameters", title, h.Kernel, h.Chains, h.Dim)
	}
	share, _, ok := budgetShare(p, h)
	b := "[" + strings.Repeat("·", barWidth) + "]    ?"
	if ok {
		b = bar(share)
	}
	lines := []string{top, b + "  " + budgetText(p, h), "  " + figures(p)}
	if t := targetsText(p); t != "" {
		lines = append(lines, "  "+strings.TrimPrefix(t, "; "))
	}
	return lines
}

// finishLine says why the session ended, with its final figures.
func finishLine(s *client.Summary) string {
	p := &s.Progress
	line := fmt.Sprintf("finished (%s): %d steps, %d evaluations in %.1f s, %d draws sent; %s",
		s.Reason, p.Steps, p.EvaluationsUsed, p.Elapsed.Seconds(), p.DrawsSent, figures(p))
	if s.Message != "" {
		line += "; " + s.Message
	}
	return line
}

// warnings lists what a report says is wrong, in words: gradient noise
// that disagrees with its declaration, a potential seen not to be convex,
// a chain that does not mix (R-hat above 1.1 once sampling).
func warnings(p *client.Progress) []string {
	var out []string
	if n := p.Noise; n != nil && n.Warning != "" {
		out = append(out, n.Warning)
	}
	if p.Curvature.NotConvex {
		out = append(out, "a pair of gradients showed the target is not log-concave: the bounds that assume it do not apply")
	}
	return out
}

// check is one line of a verdict on a run: a named check, its status
// ("pass", "warn" or "fail"), the figure it rests on and a sentence
// saying what it means.
type check struct {
	Name, Status, Figure, Sentence string
}

// renderChecks writes a verdict's checks, the ones that do not pass
// first, one line each ("warn  rhat  1.12  the chains disagree: ..."),
// and returns how many did not pass.
func renderChecks(w io.Writer, checks []check) int {
	bad := 0
	for _, pass := range []bool{false, true} {
		for _, c := range checks {
			if (c.Status == "pass") != pass {
				continue
			}
			if !pass {
				bad++
			}
			fmt.Fprintf(w, "%-4s  %-14s %-10s %s\n", c.Status, c.Name, c.Figure, c.Sentence)
		}
	}
	return bad
}
