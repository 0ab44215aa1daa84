package payload

import (
	"bufio"
	"io"
	"math"
	"strconv"

	"breathd/mechanics"
	"breathd/stream"
)

// csvDecimals is how many decimals each field of mechanics.Fields is
// written with.
var csvDecimals = map[string]int{
	"t_start": 3, "t_end": 3, "ti": 3, "te": 3, "rr": 2, "ie": 2, "vti": 1, "vte": 1, "leak": 1,
	"ppeak": 2, "pplat": 2, "peep": 2, "pmean": 2, "dp": 2, "cstat": 2, "cdyn": 2, "rinsp": 2,
	"fit_r": 2, "fit_c": 2, "fit_p0": 2, "fit_r2": 4, "tau": 3, "mp": 2, "si": 3, "e2_pct": 1, "pause_decay": 2,
	"peepi": 2, "vt_pbw": 2, "eef": 2,
}

// CSVWriter writes one row per breath: seq, the fields of
// mechanics.Fields, and flags (space-separated words), with a header
// first; a null value is an empty cell. Safe for one goroutine.
type CSVWriter struct {
	w    *bufio.Writer
	buf  []byte
	vals []float64
	dec  []int
}

// A CSVWriter is a sink of the device loop.
var _ stream.Sink = (*CSVWriter)(nil)

// NewCSVWriter writes the header to w.
func NewCSVWriter(w io.Writer) *CSVWriter {
	c := &CSVWriter{w: bufio.NewWriterSize(w, 64<<10), buf: make([]byte, 0, 512), vals: make([]float64, 0, len(mechanics.Fields))}
	c.w.WriteString("seq")
	for _, f := range mechanics.Fields {
		c.w.WriteString("," + f)
		c.dec = append(c.dec, csvDecimals[f])
	}
	c.w.WriteString(",flags\n")
	return c
}

// Breath writes one row.
func (c *CSVWriter) Breath(_ string, b *mechanics.Breath, _ *mechanics.Window) {
	buf := strconv.AppendInt(c.buf[:0], b.Seq, 10)
	c.vals = b.Values(c.vals[:0])
	for i, v := range c.vals {
		buf = append(buf, ',')
		if !math.IsNaN(v) && !math.IsInf(v, 0) {
			buf = strconv.AppendFloat(buf, v, 'f', c.dec[i], 64)
		}
	}
	buf = append(buf, ',')
	buf = b.Flags.AppendWords(buf, ' ')
	buf = append(buf, '\n')
	c.w.Write(buf)
	c.buf = buf
}

// Flush writes what is buffered.
func (c *CSVWriter) Flush() error { return c.w.Flush() }
