package main

import (
	"bufio"
	"encoding/binary"
	"fmt"
	"math"
	"os"
	"strings"
)

// writeNPY writes draws[chain][draw][coord] as a NumPy .npy file, format
// version 1.0: the magic "\x93NUMPY", version 1.0, a little-endian uint16
// header length, an ASCII dict header padded with spaces to a multiple of
// 64 bytes and ending in a newline, then the C-order little-endian
// float64 data of shape (chains, draws, dim) (the open NumPy format
// specification, "NEP 1").
func writeNPY(path string, chains, draws, dim int, at func(c, t, i int) float64) error {
	f, err := os.Create(path)
	if err != nil {
		return err
	}
	w := bufio.NewWriter(f)
	header := fmt.Sprintf("{'descr': '<f8', 'fortran_order': False, 'shape': (%d, %d, %d), }", chains, draws, dim)
	total := 6 + 2 + 2 + len(header) + 1
	pad := (64 - total%64) % 64
	header += strings.Repeat(" ", pad) + "\n"
	w.WriteString("\x93NUMPY\x01\x00")
	var hl [2]byte
	binary.LittleEndian.PutUint16(hl[:], uint16(len(header)))
	w.Write(hl[:])
	w.WriteString(header)
	var b [8]byte
	for c := range chains {
		for t := range draws {
			for i := range dim {
				binary.LittleEndian.PutUint64(b[:], math.Float64bits(at(c, t, i)))
				w.Write(b[:])
			}
		}
	}
	if err := w.Flush(); err != nil {
		f.Close()
		return err
	}
	return f.Close()
}
