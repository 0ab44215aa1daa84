package main

import (
	"fmt"
	"io"
	"math"
	"strings"
	"sync"

	"breathd/alerts"
	"breathd/mechanics"
	"breathd/stream/payload"
)

// console prints one row per breath and, every trendEvery breaths, the
// rolling summary. Layout of our own: plain columns, "-" for null.
type console struct {
	mu         sync.Mutex
	w          io.Writer
	trendEvery int64
	rows       map[string]int64
}

func newConsole(w io.Writer) *console {
	return &console{w: w, trendEvery: 10, rows: map[string]int64{}}
}

func num(v float64, width, dec int) string {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return fmt.Sprintf("%*s", width, "-")
	}
	return fmt.Sprintf("%*.*f", width, dec, v)
}

const consoleHeader = "device        breath      t_s    rr   vti_mL  ppeak  pplat   peep     dp  cstat  fit_r  fit_c     mp  flags"

// Breath prints the breath's row.
func (c *console) Breath(dev string, b *mechanics.Breath, w *mechanics.Window) {
	c.mu.Lock()
	defer c.mu.Unlock()
	if len(c.rows) == 0 {
		fmt.Fprintln(c.w, consoleHeader)
	}
	c.rows[dev]++
	fmt.Fprintf(c.w, "%-12s %7d %8.1f %5s %8s %6s %6s %6s %6s %6s %6s %6s %6s  %s\n", dev, b.Seq, b.TStart,
		num(b.RR, 5, 1), num(b.VTi, 8, 0), num(b.PPeak, 6, 1), num(b.PPlat, 6, 1), num(b.PEEP, 6, 1),
		num(b.DP, 6, 1), num(b.Cstat, 6, 1), num(b.FitR, 6, 1), num(b.FitC, 6, 1), num(b.MP, 6, 1), b.Flags)
	if c.rows[dev]%c.trendEvery == 0 {
		fmt.Fprintln(c.w, trendLine(dev, w.Trend()))
	}
}

// trendLine renders the rolling summary on one line.
func trendLine(dev string, tr *mechanics.Trend) string {
	var b strings.Builder
	fmt.Fprintf(&b, "%-12s trend: %d breaths over %.1f min", dev, tr.N, tr.Span/60)
	for _, f := range []string{"dp", "cstat", "fit_r", "ppeak"} {
		if st, _ := tr.Stat(f); st.N > 0 {
			fmt.Fprintf(&b, "  %s %.1f [%.1f–%.1f]", f, st.Median, st.Q1, st.Q3)
		}
	}
	if !math.IsNaN(tr.CSlope) {
		fmt.Fprintf(&b, "  compliance %+.1f/h", tr.CSlope)
	}
	if !math.IsNaN(tr.DPSlope) {
		fmt.Fprintf(&b, "  dp %+.1f/h", tr.DPSlope)
	}
	if r := tr.Rise; r.Cause != mechanics.RiseNone {
		fmt.Fprintf(&b, "  peak pressure up %.1f cmH2O: %s (resistive %+.1f, elastic %+.1f, by %s)", r.PeakRise, r.Cause, r.ResistiveRise, r.ElasticRise, r.Method)
	}
	return b.String()
}

// Event prints one rule transition.
func (c *console) Event(ev *alerts.Event, _ []alerts.Active) {
	c.mu.Lock()
	defer c.mu.Unlock()
	fmt.Fprintln(c.w, eventLine(ev))
}

func eventLine(ev *alerts.Event) string {
	cond := ""
	switch {
	case ev.Transition == alerts.Acknowledged:
	case !math.IsNaN(ev.Low):
		cond = fmt.Sprintf(": %s %.2f (band %g–%g)", ev.Field, ev.Value, ev.Low, ev.High)
	default:
		cond = fmt.Sprintf(": %s %.2f (threshold %g)", ev.Field, ev.Value, ev.Threshold)
	}
	return fmt.Sprintf("%-12s event %-12s %s [%s]%s at t %.1f s  id %s", ev.Device, ev.Transition, ev.Rule, ev.Level, cond, ev.T, ev.ID)
}

// eventLines writes events as JSON lines (analyze --events).
type eventLines struct {
	w   io.Writer
	err error
}

func (e *eventLines) Breath(string, *mechanics.Breath, *mechanics.Window) {}

func (e *eventLines) Event(ev *alerts.Event, _ []alerts.Active) {
	if e.err == nil {
		_, e.err = e.w.Write(append(payload.Event(ev), '\n'))
	}
}
