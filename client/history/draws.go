package history

import (
	"bufio"
	"fmt"
	"io"
	"os"
	"strconv"
	"strings"
)

// DrawsWriter writes draws as CSV, the layout `sluice report` reads: a
// header "chain,iteration,<names>", then one row per draw, each value in
// the shortest form that reads back to the same float64.
type DrawsWriter struct {
	w   *bufio.Writer
	c   io.Closer
	dim int
	buf []byte
	err error
}

// NewDrawsWriter writes the header for the given parameter names to w.
func NewDrawsWriter(w io.Writer, names []string) *DrawsWriter {
	d := &DrawsWriter{w: bufio.NewWriter(w), dim: len(names)}
	_, d.err = d.w.WriteString("chain,iteration," + strings.Join(names, ",") + "\n")
	return d
}

// CreateDraws creates (or truncates) the file at path and writes the
// header for the given parameter names.
func CreateDraws(path string, names []string) (*DrawsWriter, error) {
	f, err := os.Create(path)
	if err != nil {
		return nil, err
	}
	d := NewDrawsWriter(f, names)
	d.c = f
	return d, nil
}

// Row appends one draw of chain taken after iter steps. A draw whose
// length is not the number of names is an error. After an error every
// later Row does nothing; Close returns the error.
func (d *DrawsWriter) Row(chain int, iter int64, v []float64) {
	if d.err != nil {
		return
	}
	if len(v) != d.dim {
		d.err = fmt.Errorf("history: a draw of %d values for %d names", len(v), d.dim)
		return
	}
	b := strconv.AppendInt(d.buf[:0], int64(chain), 10)
	b = append(b, ',')
	b = strconv.AppendInt(b, iter, 10)
	for _, x := range v {
		b = append(b, ',')
		b = strconv.AppendFloat(b, x, 'g', -1, 64)
	}
	b = append(b, '\n')
	d.buf = b
	_, d.err = d.w.Write(b)
}

// Close flushes and closes the file (if CreateDraws opened it) and returns
// the first error met.
func (d *DrawsWriter) Close() error {
	if err := d.w.Flush(); d.err == nil {
		d.err = err
	}
	if d.c != nil {
		if err := d.c.Close(); d.err == nil {
			d.err = err
		}
		d.c = nil
	}
	return d.err
}
