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

// CSVWriter writes one row per breath: seq, the fields of
// mechanics.Fields() with their Decimals, flags (space-separated words)
// and at (the wall-clock time of the breath's start, RFC 3339), with a
// header first; a null value is an empty cell. Safe for one goroutine.
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
	c := &CSVWriter{w: bufio.NewWriterSize(w, 64<<10), buf: make([]byte, 0, 512), vals: make([]float64, 0, mechanics.NumFields)}
	c.w.WriteString("seq")
	for _, f := range mechanics.Fields() {
		c.w.WriteString("," + f.Name)
		c.dec = append(c.dec, f.Decimals)
	}
	c.w.WriteString(",flags,at\n")
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
	buf = append(buf, ',')
	if !b.At.IsZero() {
		buf = b.At.UTC().AppendFormat(buf, time.RFC3339Nano)
	}
	buf = append(buf, '\n')
	c.w.Write(buf)
	c.buf = buf
}

// Flush writes what is buffered.
func (c *CSVWriter) Flush() error { return c.w.Flush() }
