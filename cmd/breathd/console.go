package main

import (
	"fmt"
	"io"
	"math"
	"strings"
	"sync"
	"unicode/utf8"

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
	quiet      bool // no breath rows and no trend lines: events only
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

// consoleHeader names the columns of a breath row: within 80 columns
// before the flags; units in the README (pressures cmH2O, vti mL, cstat
// and fit_c mL/cmH2O, fit_r cmH2O·s/L).
const consoleHeader = "device     breath    rr vti mL  ppeak  pplat   peep     dp  cstat  fit_r  fit_c  flags"

// Breath prints the breath's row.
func (c *console) Breath(dev string, b *mechanics.Breath, w *mechanics.Window) {
	c.mu.Lock()
	defer c.mu.Unlock()
	if c.quiet {
		return
	}
	if len(c.rows) == 0 {
		fmt.Fprintln(c.w, consoleHeader)
	}
	c.rows[dev]++
	fmt.Fprintln(c.w, strings.TrimRight(fmt.Sprintf("%-10s %6d %5s %6s %6s %6s %6s %6s %6s %6s %6s  %s", dev, b.Seq,
		num(b.RR, 5, 1), num(b.VTi, 6, 0), num(b.PPeak, 6, 1), num(b.PPlat, 6, 1), num(b.PEEP, 6, 1),
		num(b.DP, 6, 1), num(b.Cstat, 6, 1), num(b.FitR, 6, 1), num(b.FitC, 6, 1), b.Flags), " "))
	if c.rows[dev]%c.trendEvery == 0 {
		fmt.Fprintln(c.w, trendLine(dev, w.Trend()))
	}
}

// trendLine renders the rolling summary, wrapped to 80 columns.
func trendLine(dev string, tr *mechanics.Trend) string {
	parts := []string{fmt.Sprintf("%-10s trend: %d breaths over %.1f min;", dev, tr.N, tr.Span/60), "median [quartiles]"}
	for _, f := range []string{"dp", "cstat", "fit_r", "ppeak"} {
		if st, _ := tr.Stat(f); st.N > 0 {
			parts = append(parts, fmt.Sprintf("%s %.1f [%.1f–%.1f]", f, st.Median, st.Q1, st.Q3))
		}
	}
	if !math.IsNaN(tr.CSlope) || !math.IsNaN(tr.DPSlope) {
		parts = append(parts, fmt.Sprintf("per hour: compliance %s, dp %s", signed(tr.CSlope), signed(tr.DPSlope)))
	}
	if r := tr.Rise; r.Cause != mechanics.RiseNone {
		parts = append(parts, fmt.Sprintf("peak %+.1f cmH2O: %s (resistive %+.1f, elastic %+.1f, by %s)", r.PeakRise, r.Cause, r.ResistiveRise, r.ElasticRise, r.Method))
	}
	if a := &tr.Asynchrony; !math.IsNaN(a.Index()) {
		parts = append(parts, fmt.Sprintf("asynchrony index %.1f %% (%d events)", a.Index(), a.Events()))
	}
	return wrap(parts, 80, strings.Repeat(" ", 11))
}

// signed writes v with its sign, "-" for none.
func signed(v float64) string {
	if math.IsNaN(v) {
		return "-"
	}
	return fmt.Sprintf("%+.1f", v)
}

// wrap joins parts with two spaces into lines of at most width columns
// (a part longer than that stands alone), the lines after the first
// indented.
func wrap(parts []string, width int, indent string) string {
	var b strings.Builder
	col := 0
	for i, p := range parts {
		n := utf8.RuneCountInString(p)
		switch {
		case i == 0:
		case col+2+n > width:
			b.WriteString("\n" + indent)
			col = len(indent)
		default:
			b.WriteString("  ")
			col += 2
		}
		b.WriteString(p)
		col += n
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
		cond = fmt.Sprintf(": %s %.2f, band %g–%g,", ev.Field, ev.Value, ev.Low, ev.High)
	default:
		cond = fmt.Sprintf(": %s %.2f, threshold %g,", ev.Field, ev.Value, ev.Threshold)
	}
	line := fmt.Sprintf("%s %s %s (%s)%s t %.1f s", ev.Device, ev.Transition, ev.Rule, ev.Level, cond, ev.T)
	if ev.Latching && ev.Transition == alerts.Raised {
		line += "\n" + strings.Repeat(" ", 11) + "acknowledge with event id " + ev.ID
	}
	return line
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
