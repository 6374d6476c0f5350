package report

import (
	"bufio"
	"encoding/binary"
	"encoding/csv"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"math"
	"os"
	"regexp"
	"strconv"
	"strings"

	"sluice/client/history"
)

// Run is what a report is made from: the draws, their names, and the
// summary and progress history found beside the draws file (nil when
// absent).
type Run struct {
	// Source is the draws file.
	Source string
	// Names holds one name per parameter.
	Names []string
	// Draws is indexed [parameter][chain][draw]; every chain has the same
	// number of draws.
	Draws [][][]float64
	// Dropped counts draws left out so every chain has as many as the
	// shortest.
	Dropped int
	// Summary is the summary JSON object, decoded generically; Verdict
	// the checks found in it, else those of the history's latest record
	// that has any (or nil).
	Summary     map[string]any
	SummaryPath string
	Verdict     []Check
	// History holds the progress records, oldest first.
	History     []history.Record
	HistoryPath string
}

// Check is one line of a verdict: a named check, its status ("pass",
// "warn" or "fail"), the figure it rests on, and a sentence saying what
// it means.
type Check struct {
	Name     string `json:"name"`
	Status   string `json:"status"`
	Figure   any    `json:"figure"`
	Sentence string `json:"sentence"`
}

// Chains returns the number of chains, Len the draws per chain.
func (r *Run) Chains() int { return len(r.Draws[0]) }

// Len returns the number of draws per chain.
func (r *Run) Len() int { return len(r.Draws[0][0]) }

// SidecarPaths returns the places a companion file with the given suffix
// (such as "summary.json") is looked for beside a draws file, in order:
// "draws.csv.summary.json", then "draws.summary.json".
func SidecarPaths(draws, suffix string) []string {
	paths := []string{draws + "." + suffix}
	for _, ext := range []string{".csv", ".npy"} {
		if stem, ok := strings.CutSuffix(draws, ext); ok {
			paths = append(paths, stem+"."+suffix)
		}
	}
	return paths
}

// Load reads a draws file (.csv with header "chain,iteration,<names>", or
// .npy of shape chains × draws × dim with the names taken from the
// summary), and the summary and history beside it when present.
// historyPath, when not empty, names the history file instead.
func Load(drawsPath, historyPath string) (*Run, error) {
	r := &Run{Source: drawsPath}
	for _, p := range SidecarPaths(drawsPath, "summary.json") {
		b, err := os.ReadFile(p)
		if errors.Is(err, fs.ErrNotExist) {
			continue
		}
		if err != nil {
			return nil, err
		}
		if err := json.Unmarshal(b, &r.Summary); err != nil {
			return nil, fmt.Errorf("report: summary %s: %v", p, err)
		}
		r.SummaryPath = p
		r.Verdict = verdictOf(r.Summary)
		break
	}
	switch {
	case strings.HasSuffix(drawsPath, ".csv"):
		f, err := os.Open(drawsPath)
		if err != nil {
			return nil, err
		}
		defer f.Close()
		names, byChain, err := ReadCSV(f)
		if err != nil {
			return nil, fmt.Errorf("report: %s: %w", drawsPath, err)
		}
		r.Names = names
		r.Draws, r.Dropped = square(byChain, len(names))
	case strings.HasSuffix(drawsPath, ".npy"):
		f, err := os.Open(drawsPath)
		if err != nil {
			return nil, err
		}
		defer f.Close()
		a, err := ReadNPY(f)
		if err != nil {
			return nil, fmt.Errorf("report: %s: %w", drawsPath, err)
		}
		r.Names = namesOf(r.Summary, a.Dim)
		r.Draws = a.byParameter()
	default:
		return nil, fmt.Errorf("report: %s: the name must end in .csv or .npy", drawsPath)
	}
	if len(r.Draws) == 0 || len(r.Draws[0]) == 0 || len(r.Draws[0][0]) < 4 {
		return nil, fmt.Errorf("report: %s: too few draws to report on (need at least one parameter, one chain and 4 draws per chain)", drawsPath)
	}
	paths := SidecarPaths(drawsPath, "history.jsonl")
	if historyPath != "" {
		paths = []string{historyPath}
	}
	for _, p := range paths {
		recs, err := history.ReadFile(p)
		if errors.Is(err, fs.ErrNotExist) && historyPath == "" {
			continue
		}
		if err != nil {
			return nil, fmt.Errorf("report: history %s: %w", p, err)
		}
		r.History, r.HistoryPath = recs, p
		break
	}
	if r.Verdict == nil {
		r.Verdict = historyVerdict(r.History)
	}
	return r, nil
}

// ReadCSV reads draws written as CSV: a header "chain,iteration,<names>"
// and one row per draw. It returns the names and the draws of each chain
// in file order, indexed [chain][draw][parameter]; chains are numbered
// from 0.
func ReadCSV(r io.Reader) (names []string, byChain [][][]float64, err error) {
	cr := csv.NewReader(bufio.NewReader(r))
	cr.ReuseRecord = true
	head, err := cr.Read()
	if err != nil {
		return nil, nil, fmt.Errorf("header: %v", err)
	}
	if len(head) < 3 || strings.TrimSpace(head[0]) != "chain" || strings.TrimSpace(head[1]) != "iteration" {
		return nil, nil, fmt.Errorf("header %q: want chain,iteration,<names>", strings.Join(head, ","))
	}
	for _, h := range head[2:] {
		names = append(names, strings.TrimSpace(h))
	}
	for line := 2; ; line++ {
		rec, err := cr.Read()
		if err == io.EOF {
			break
		}
		if err != nil {
			return nil, nil, err
		}
		ch, err := strconv.Atoi(strings.TrimSpace(rec[0]))
		if err != nil || ch < 0 || ch > 1<<20 {
			return nil, nil, fmt.Errorf("line %d: chain %q is not a chain number", line, rec[0])
		}
		row := make([]float64, len(names))
		for i := range names {
			v, err := strconv.ParseFloat(strings.TrimSpace(rec[2+i]), 64)
			if err != nil {
				return nil, nil, fmt.Errorf("line %d, column %s: %v", line, names[i], err)
			}
			row[i] = v
		}
		for len(byChain) <= ch {
			byChain = append(byChain, nil)
		}
		byChain[ch] = append(byChain[ch], row)
	}
	return names, byChain, nil
}

// square turns [chain][draw][parameter] into [parameter][chain][draw],
// leaving out empty chains and cutting every chain to the shortest.
func square(byChain [][][]float64, dim int) ([][][]float64, int) {
	var chains [][][]float64
	n, total := math.MaxInt, 0
	for _, c := range byChain {
		if len(c) > 0 {
			chains = append(chains, c)
			n = min(n, len(c))
			total += len(c)
		}
	}
	if len(chains) == 0 {
		return nil, 0
	}
	out := make([][][]float64, dim)
	for i := range out {
		out[i] = make([][]float64, len(chains))
		for c, ch := range chains {
			out[i][c] = make([]float64, n)
			for t := range n {
				out[i][c][t] = ch[t][i]
			}
		}
	}
	return out, total - n*len(chains)
}

// Array is a chains × draws × dim array of float64, C order.
type Array struct {
	Chains, Draws, Dim int
	Data               []float64
}

func (a *Array) byParameter() [][][]float64 {
	out := make([][][]float64, a.Dim)
	for i := range out {
		out[i] = make([][]float64, a.Chains)
		for c := range a.Chains {
			out[i][c] = make([]float64, a.Draws)
			for t := range a.Draws {
				out[i][c][t] = a.Data[(c*a.Draws+t)*a.Dim+i]
			}
		}
	}
	return out
}

var (
	npyDescr = regexp.MustCompile(`'descr'\s*:\s*'([^']*)'`)
	npyOrder = regexp.MustCompile(`'fortran_order'\s*:\s*(True|False)`)
	npyShape = regexp.MustCompile(`'shape'\s*:\s*\(([^)]*)\)`)
)

// ReadNPY reads a NumPy .npy file (format versions 1.0 to 3.0, as the
// open NumPy format specification "NEP 1" lays it out) holding
// little-endian float64 values of shape (chains, draws, dim) in C order.
func ReadNPY(r io.Reader) (*Array, error) {
	br := bufio.NewReader(r)
	var pre [8]byte
	if _, err := io.ReadFull(br, pre[:]); err != nil {
		return nil, fmt.Errorf("npy: %v", err)
	}
	if string(pre[:6]) != "\x93NUMPY" {
		return nil, errors.New("npy: not a .npy file (bad magic)")
	}
	var hlen int
	switch pre[6] {
	case 1:
		var b [2]byte
		if _, err := io.ReadFull(br, b[:]); err != nil {
			return nil, fmt.Errorf("npy: %v", err)
		}
		hlen = int(binary.LittleEndian.Uint16(b[:]))
	case 2, 3:
		var b [4]byte
		if _, err := io.ReadFull(br, b[:]); err != nil {
			return nil, fmt.Errorf("npy: %v", err)
		}
		hlen = int(binary.LittleEndian.Uint32(b[:]))
		if hlen > 1<<20 {
			return nil, fmt.Errorf("npy: header of %d bytes", hlen)
		}
	default:
		return nil, fmt.Errorf("npy: format version %d.%d not read", pre[6], pre[7])
	}
	hb := make([]byte, hlen)
	if _, err := io.ReadFull(br, hb); err != nil {
		return nil, fmt.Errorf("npy: header: %v", err)
	}
	h := string(hb)
	d, o, s := npyDescr.FindStringSubmatch(h), npyOrder.FindStringSubmatch(h), npyShape.FindStringSubmatch(h)
	if d == nil || o == nil || s == nil {
		return nil, fmt.Errorf("npy: header %q lacks descr, fortran_order or shape", strings.TrimSpace(h))
	}
	if d[1] != "<f8" {
		return nil, fmt.Errorf("npy: dtype %s, want <f8 (little-endian float64)", d[1])
	}
	if o[1] != "False" {
		return nil, errors.New("npy: Fortran order not read, want C order")
	}
	var shape []int
	for _, f := range strings.Split(s[1], ",") {
		if f = strings.TrimSpace(f); f == "" {
			continue
		}
		v, err := strconv.Atoi(f)
		if err != nil || v < 0 {
			return nil, fmt.Errorf("npy: shape (%s)", s[1])
		}
		shape = append(shape, v)
	}
	if len(shape) != 3 {
		return nil, fmt.Errorf("npy: shape (%s), want (chains, draws, dim)", s[1])
	}
	n := shape[0] * shape[1] * shape[2]
	if n > 1<<31 || (shape[0] > 0 && shape[1] > 0 && n/shape[0]/shape[1] != shape[2]) {
		return nil, fmt.Errorf("npy: shape (%s) too large", s[1])
	}
	a := &Array{Chains: shape[0], Draws: shape[1], Dim: shape[2], Data: make([]float64, n)}
	if err := binary.Read(br, binary.LittleEndian, a.Data); err != nil {
		return nil, fmt.Errorf("npy: data (want %d values): %v", n, err)
	}
	return a, nil
}

// namesOf takes the parameter names from a summary: its "names" list, or
// the "name" of each entry of its "parameters" list; x0, x1, ... when
// neither gives dim names.
func namesOf(summary map[string]any, dim int) []string {
	var names []string
	if l, ok := summary["names"].([]any); ok {
		for _, v := range l {
			if s, ok := v.(string); ok {
				names = append(names, s)
			}
		}
	}
	if len(names) != dim {
		names = names[:0]
		if l, ok := summary["parameters"].([]any); ok {
			for _, v := range l {
				if m, ok := v.(map[string]any); ok {
					if s, ok := m["name"].(string); ok {
						names = append(names, s)
					}
				}
			}
		}
	}
	if len(names) != dim {
		names = names[:0]
		for i := range dim {
			names = append(names, "x"+strconv.Itoa(i))
		}
	}
	return names
}

// historyVerdict returns the verdict of the latest history record that
// holds one (the finish record's, when the session finished), or nil.
func historyVerdict(recs []history.Record) []Check {
	for i := len(recs) - 1; i >= 0; i-- {
		if len(recs[i].Checks) == 0 {
			continue
		}
		checks := make([]Check, len(recs[i].Checks))
		for j, c := range recs[i].Checks {
			checks[j] = Check{Name: c.Name, Status: c.Status, Sentence: c.Sentence}
			if c.Figure.Valid() {
				checks[j].Figure = float64(c.Figure)
			}
		}
		return checks
	}
	return nil
}

// verdictOf finds the checks of a summary: its "checks" list (what sluice
// demo writes), or a "verdict" that is a list of checks or an object
// holding them under "checks". A check's sentence is its "sentence" or,
// as the demo writes it, its "message".
func verdictOf(summary map[string]any) []Check {
	v, ok := summary["checks"]
	if !ok {
		if v, ok = summary["verdict"]; !ok {
			return nil
		}
	}
	if m, ok := v.(map[string]any); ok {
		v = m["checks"]
	}
	b, err := json.Marshal(v)
	if err != nil {
		return nil
	}
	var raw []struct {
		Check
		Message string `json:"message"`
	}
	if json.Unmarshal(b, &raw) != nil {
		return nil
	}
	checks := make([]Check, len(raw))
	for i, c := range raw {
		checks[i] = c.Check
		if checks[i].Sentence == "" {
			checks[i].Sentence = c.Message
		}
	}
	return checks
}
