package payload

import (
	"bufio"
	"io"
	"math"
	"strconv"
	"time"

	"breathd/mechanics"
	"breathd/stream"
)

// CSVWriter writes one row per breath, the columns of CSVColumns: seq, the
// fields of mechanics.Fields() with their Decimals, flags and asynchrony
// (space-separated words), at (the wall-clock time of the breath's start, RFC 3339), device
// and run; a header first; a null value is an empty cell. Safe for one
// goroutine.
type CSVWriter struct {
	w    *bufio.Writer
	run  string
	buf  []byte
	vals []float64
	dec  []int
}

// A CSVWriter is a sink of the device loop.
var _ stream.Sink = (*CSVWriter)(nil)

// NewCSVWriter writes the header to w; run names the run in every row.
func NewCSVWriter(w io.Writer, run string) *CSVWriter {
	c := &CSVWriter{w: bufio.NewWriterSize(w, 64<<10), run: run, buf: make([]byte, 0, 512), vals: make([]float64, 0, mechanics.NumFields)}
	for i, col := range CSVColumns() {
		if i > 0 {
			c.w.WriteByte(',')
		}
		c.w.WriteString(col.Name)
	}
	c.w.WriteByte('\n')
	for _, f := range mechanics.Fields() {
		c.dec = append(c.dec, f.Decimals)
	}
	return c
}

// Breath writes one row.
func (c *CSVWriter) Breath(device string, b *mechanics.Breath, _ *mechanics.Window) {
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
	buf = append(buf, ',')
	buf = b.Asynchrony.AppendWords(buf, ' ')
	buf = append(buf, ',')
	if !b.At.IsZero() {
		buf = b.At.UTC().AppendFormat(buf, time.RFC3339Nano)
	}
	buf = append(append(buf, ','), device...) // a device id has no comma (CheckDevice)
	buf = append(append(buf, ','), c.run...)
	buf = append(buf, '\n')
	c.w.Write(buf)
	c.buf = buf
}

// Flush writes what is buffered.
func (c *CSVWriter) Flush() error { return c.w.Flush() }
