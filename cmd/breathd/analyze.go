package main

import (
	"bufio"
	"context"
	"errors"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"os"
	"runtime"
	"slices"
	"strings"
	"time"

	"breathd/alerts"
	"breathd/cmd/breathd/internal/config"
	"breathd/cmd/breathd/internal/plot"
	"breathd/device"
	"breathd/mechanics"
	"breathd/stream"
	"breathd/stream/edfrec"
	"breathd/stream/lines"
	"breathd/stream/payload"
	"breathd/stream/publish"

	"github.com/mattn/go-isatty"
	"github.com/schollz/progressbar/v3"
)

func cmdAnalyze(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	o, err := parseAnalyze(args, stderr)
	if err != nil {
		return err
	}
	var src io.ReadCloser
	var file *device.File
	if o.path == "-" {
		if src, err = device.Stdin(); err != nil {
			return err
		}
	} else {
		if file, err = device.OpenFile(o.path, 0); err != nil {
			return err
		}
		src = file
	}
	var outs outputs
	defer outs.closeAll()
	sum := newSummary()
	sinks, csv, pd, err := o.sinks(sum, &outs, stdout)
	if err != nil {
		src.Close()
		return err
	}
	stopBar := showProgress(file, stderr)
	start := time.Now()
	st, runErr := stream.Run(ctx, src, stream.Config{Device: idFromPath(o.path), Run: o.run, Format: o.format, Mechanics: o.mechanics,
		Rules: alerts.Defaults(), Sink: sinks, Ahead: runtime.NumCPU() > 1})
	stopBar()
	if csv != nil {
		if err := csv.Flush(); err != nil && runErr == nil {
			runErr = fmt.Errorf("--csv: %w", err)
		}
	}
	if err := outs.closeAll(); err != nil && runErr == nil {
		runErr = err
	}
	sum.print(stderr, st, time.Since(start))
	if runErr == nil {
		runErr = nothingDecoded(o.path, st)
	}
	if o.plot != "" && runErr == nil {
		if err := plot.Write(o.plot, o.path, o.format, o.plotFrom, o.plotSpan, pd); err != nil {
			return fmt.Errorf("--plot: %w", err)
		}
		fmt.Fprintf(stderr, "  picture: %s\n", o.plot)
	}
	if o.edf != "" && runErr == nil {
		if err := edfrec.Export(o.edf, o.path, o.format, st.Counts.RateHz(), pd.Breaths(), pd.Events()); err != nil {
			return fmt.Errorf("--edf: %w", err)
		}
		fmt.Fprintf(stderr, "  EDF+: %s\n", o.edf)
	}
	return runErr
}

// analyzeOptions are analyze's flags, checked.
type analyzeOptions struct {
	path              string // the recording, or - for stdin
	format            lines.Format
	mechanics         mechanics.Config
	csv, events, plot string // outputs: a path, - for stdout, or "" for none
	run               string // this analysis's id, in the CSV and the event ids
	edf               string // EDF+ output, "" for none
	plotFrom          float64
	plotSpan          float64
}

// parseAnalyze reads and checks every flag before anything is opened.
func parseAnalyze(args []string, stderr io.Writer) (o analyzeOptions, err error) {
	fs := newFlags("analyze", "analyze [flags] FILE|-", stderr)
	var ff formatFlags
	ff.register(fs)
	var pf mechanicsFlags
	pf.register(fs)
	fs.StringVar(&o.csv, "csv", "", "write one row per breath as CSV to this file, or - for stdout")
	fs.StringVar(&o.events, "events", "", "write the rule events as JSON lines to this file, or - for stdout")
	fs.StringVar(&o.plot, "plot", "", "draw the recording to this .png or .svg: a pressure/flow/volume strip and the trends")
	fs.Float64Var(&o.plotFrom, "plot-from", 0, "start of the strip, s of stream time")
	fs.Float64Var(&o.plotSpan, "plot-span", 30, "length of the strip, s")
	fs.StringVar(&o.edf, "edf", "", "write the samples (airway pressure, flow, volume) with breath and event annotations to this EDF+ file")
	if err := parseFlags(fs, args); err != nil {
		return o, err
	}
	if fs.NArg() != 1 {
		return o, usagef("analyze takes one recording (a file, or - for stdin); got %d", fs.NArg())
	}
	o.path = fs.Arg(0)
	o.run = publish.NewRun()
	if o.format, err = ff.format(); err != nil {
		return o, err
	}
	if o.mechanics, err = pf.config(); err != nil {
		return o, err
	}
	if o.plot != "" {
		if o.path == "-" {
			return o, usagef("--plot needs a file, not stdin: it reads the strip again")
		}
		if err := plot.Check(o.plot, o.plotSpan); err != nil {
			return o, usagef("--plot: %w", err)
		}
	}
	if o.edf != "" && o.path == "-" {
		return o, usagef("--edf needs a file, not stdin: it reads the samples again")
	}
	return o, nil
}

// sinks opens the outputs asked for and returns the sinks to run with.
func (o *analyzeOptions) sinks(sum *summary, outs *outputs, stdout io.Writer) (stream.Sinks, *payload.CSVWriter, *plot.Data, error) {
	sinks := stream.Sinks{sum}
	var csv *payload.CSVWriter
	if w, err := outs.open("--csv", o.csv, stdout); err != nil {
		return nil, nil, nil, err
	} else if w != nil {
		csv = payload.NewCSVWriter(w, o.run)
		if o.csv != "-" { // its description beside it, as a Frictionless Table Schema
			if err := os.WriteFile(o.csv+".schema.json", payload.TableSchema(), 0o644); err != nil {
				return nil, nil, nil, fmt.Errorf("--csv: %w", err)
			}
		}
		sinks = append(sinks, csv)
	}
	if w, err := outs.open("--events", o.events, stdout); err != nil {
		return nil, nil, nil, err
	} else if w != nil {
		sinks = append(sinks, &eventLines{w: w})
	}
	var pd *plot.Data
	if o.plot != "" || o.edf != "" {
		pd = &plot.Data{Device: idFromPath(o.path), File: o.path}
		sinks = append(sinks, pd)
	}
	return sinks, csv, pd, nil
}

// outputs are the files analyze writes: a path, "-" for stdout, or ""
// for none.
type outputs struct {
	closers []func() error
}

// open returns a buffered writer for path (nil for ""), to be flushed and
// closed by closeAll.
func (o *outputs) open(flag, path string, stdout io.Writer) (io.Writer, error) {
	var w io.Writer
	var f *os.File
	switch path {
	case "":
		return nil, nil
	case "-":
		w = stdout
	default:
		var err error
		if f, err = os.Create(path); err != nil {
			return nil, fmt.Errorf("%s: %w", flag, err)
		}
		w = f
	}
	bw := bufio.NewWriter(w)
	o.closers = append(o.closers, func() error {
		err := bw.Flush()
		if f != nil {
			err = errors.Join(err, f.Close())
		}
		if err != nil {
			return fmt.Errorf("%s: %w", flag, err)
		}
		return nil
	})
	return bw, nil
}

// closeAll flushes and closes every output once and returns the first
// error.
func (o *outputs) closeAll() error {
	var first error
	for _, c := range o.closers {
		if err := c(); err != nil && first == nil {
			first = err
		}
	}
	o.closers = nil
	return first
}

// mechanicsFlags are the per-device settings of the computation: the
// patient for predicted body weight, the circuit, the channel delay.
type mechanicsFlags struct {
	sex     string
	height  float64
	circuit float64
	delay   string
}

func (p *mechanicsFlags) register(fs interface {
	StringVar(*string, string, string, string)
	Float64Var(*float64, string, float64, string)
}) {
	fs.StringVar(&p.sex, "sex", "", "patient sex, male or female, for vt_pbw (with --height-cm)")
	fs.Float64Var(&p.height, "height-cm", 0, "patient height in cm, for vt_pbw (with --sex)")
	fs.Float64Var(&p.circuit, "circuit-compliance", 0, "breathing circuit compliance, mL/cmH2O, when flow is measured at the ventilator: its gas is taken off the volumes (0: flow measured at the airway)")
	fs.StringVar(&p.delay, "flow-delay", "auto", "how far the flow channel lags the pressure channel: auto (estimated at each inflation) or a duration such as 20ms, -10ms, 0 (no alignment)")
}

func (p *mechanicsFlags) config() (mechanics.Config, error) {
	m := config.Measurement{CircuitCompliance: p.circuit, FlowDelay: p.delay}
	c, err := m.Mechanics(mechanics.Patient{Sex: p.sex, HeightCm: p.height})
	if err != nil {
		return c, usagef("%w", err)
	}
	return c, nil
}

// showProgress draws a progress bar on a terminal once reading a file
// takes more than a second. The returned func stops it.
func showProgress(file *device.File, stderr io.Writer) func() {
	f, ok := stderr.(*os.File)
	if file == nil || !ok || !isatty.IsTerminal(f.Fd()) {
		return func() {}
	}
	done := make(chan struct{})
	finished := make(chan struct{})
	go func() {
		defer close(finished)
		var bar *progressbar.ProgressBar
		tick := time.NewTicker(100 * time.Millisecond)
		defer tick.Stop()
		start := time.Now()
		for {
			select {
			case <-done:
				if bar != nil {
					bar.Finish()
					bar.Clear()
				}
				return
			case <-tick.C:
				read, size := file.Progress()
				if bar == nil && time.Since(start) > time.Second && size > 0 {
					bar = progressbar.NewOptions64(size, progressbar.OptionSetWriter(stderr),
						progressbar.OptionSetDescription("analyze"), progressbar.OptionShowBytes(true),
						progressbar.OptionClearOnFinish(), progressbar.OptionThrottle(100*time.Millisecond))
				}
				if bar != nil {
					bar.Set64(read)
				}
			}
		}
	}()
	return func() { close(done); <-finished }
}

// summaryFields are the medians the summary prints.
var summaryFields = []string{"rr", "ie", "vti", "ppeak", "pplat", "peep", "dp", "cstat", "fit_r", "fit_c", "mp"}

// reservoirSize bounds the values kept per field: medians are exact up to
// this many breaths and from a uniform sample beyond, so memory does not
// grow with the file.
const reservoirSize = 4096

// summary collects what analyze prints at the end.
type summary struct {
	n     int64
	first float64
	last  float64
	flags [16]int64 // by flag bit
	asy   mechanics.Tally
	// the fixed 10-minute periods, and the complete one with the highest
	// asynchrony index
	per   mechanics.Periods
	worst mechanics.Tally
	res   [][]float64
	seen  []int64
	rng   *rand.Rand
}

func newSummary() *summary {
	s := &summary{res: make([][]float64, len(summaryFields)),
		seen: make([]int64, len(summaryFields)), rng: rand.New(rand.NewPCG(1, 2))}
	for i := range s.res {
		s.res[i] = make([]float64, 0, reservoirSize) // allocated once: the same memory for any file
	}
	return s
}

func (s *summary) Breath(_ string, b *mechanics.Breath, _ *mechanics.Window) {
	if s.n == 0 {
		s.first = b.TStart
	}
	s.n++
	s.last = b.TEnd
	for i := range s.flags {
		if b.Flags&(1<<i) != 0 {
			s.flags[i]++ // counted by bit: no allocation per breath
		}
	}
	s.asy.Add(b)
	if s.per.Add(b) {
		idx, worst := s.per.Last.Index(), s.worst.Index()
		if !math.IsNaN(idx) && (math.IsNaN(worst) || idx > worst) {
			s.worst = s.per.Last
		}
	}
	for i, f := range summaryFields {
		v, _ := b.Trusted(f) // what the breath's flags disown is not the lung's
		if math.IsNaN(v) {
			continue
		}
		s.seen[i]++
		if len(s.res[i]) < reservoirSize {
			s.res[i] = append(s.res[i], v)
		} else if k := s.rng.Int64N(s.seen[i]); k < reservoirSize {
			s.res[i][k] = v
		}
	}
}

// asynchronyText is the summary's asynchrony line: the index over the
// whole recording with its counts, and the complete fixed 10-minute
// period with the highest index.
func (s *summary) asynchronyText() string {
	var b strings.Builder
	a := &s.asy
	if idx := a.Index(); math.IsNaN(idx) {
		fmt.Fprintf(&b, "asynchrony index - (under %d cycles)", mechanics.MinCycles)
	} else {
		fmt.Fprintf(&b, "asynchrony index %.1f %% (%d events over %d cycles and %d ineffective efforts", idx, a.Events(), a.Cycles, a.Counts[0])
		for i, n := range a.Counts {
			if n > 0 {
				fmt.Fprintf(&b, "; %s %d", mechanics.AsynchronyWord(i), n)
			}
		}
		b.WriteString(")")
	}
	if idx := s.worst.Index(); !math.IsNaN(idx) {
		fmt.Fprintf(&b, "; highest complete 10-min period %.1f %% (%.0f–%.0f s)", idx, s.worst.Start, s.worst.End)
	}
	return b.String()
}

func (s *summary) print(w io.Writer, st stream.Status, took time.Duration) {
	c := st.Counts
	fmt.Fprintf(w, "%s: %d breaths in %.1f s of stream (%d samples at %.1f Hz, %.2f s to analyze)\n",
		st.Device, s.n, c.Span(), c.Samples, c.RateHz(), took.Seconds())
	fmt.Fprintf(w, "  bad lines %d", c.BadTotal())
	if c.BadTotal() > 0 {
		fmt.Fprintf(w, " (%s)", c.BadCauses())
	}
	d := st.Drops
	fmt.Fprintf(w, "; gaps %d; breaths dropped: gap %d, open circuit %d, too long %d; rule events %d\n",
		c.Gaps, d.Gap, d.Open, d.TooLong, st.Events)
	if st.Hint != "" {
		fmt.Fprintf(w, "  check: %s\n", st.Hint)
	}
	if s.n == 0 {
		return
	}
	fmt.Fprintf(w, "  channels: %s\n", channelsText(st.Channels))
	fmt.Fprint(w, "  medians (of the values no flag disowns):")
	for i, f := range summaryFields {
		if len(s.res[i]) == 0 {
			continue
		}
		x := slices.Clone(s.res[i])
		slices.Sort(x)
		if f == "ie" {
			fmt.Fprintf(w, " I:E %s", ieText(x[len(x)/2]))
			continue
		}
		fmt.Fprintf(w, " %s %.1f", f, x[len(x)/2])
	}
	fmt.Fprintln(w)
	var parts []string
	for i, n := range s.flags {
		if n > 0 {
			parts = append(parts, fmt.Sprintf("%s %d", mechanics.Flags(1<<i), n))
		}
	}
	if len(parts) > 0 {
		slices.Sort(parts)
		fmt.Fprintf(w, "  flags: %s\n", strings.Join(parts, ", "))
	}
	fmt.Fprintf(w, "  %s\n", s.asynchronyText())
}

// channelsText says how far the flow channel lags the pressure channel,
// how the channels are aligned, and their noise.
func channelsText(c mechanics.Channels) string {
	var b strings.Builder
	switch {
	case c.Fixed:
		fmt.Fprintf(&b, "flow delay %.0f ms as configured", c.Delay*1000)
	case math.IsNaN(c.Delay):
		b.WriteString("flow delay not estimated (no passive inflation yet)")
	default:
		fmt.Fprintf(&b, "flow %.0f ms behind pressure (median of the last %d passive onsets)", c.Delay*1000, c.Onsets)
	}
	if c.Aligned != 0 {
		fmt.Fprintf(&b, ", aligned by %.0f ms", c.Aligned*1000)
	} else {
		b.WriteString(", not shifted")
	}
	if !math.IsNaN(c.PawSD) {
		fmt.Fprintf(&b, "; noise σ %.2f cmH2O, %.2f L/min", c.PawSD, c.FlowSD)
	}
	return b.String()
}

// nothingDecoded is the error of a run that decoded no sample: it says
// what the lines were, and what to try.
func nothingDecoded(path string, st stream.Status) error {
	c := st.Counts
	if c.Samples > 0 {
		return nil
	}
	if c.Lines == 0 {
		return fmt.Errorf("%s: no sample decoded: the input is empty", path)
	}
	why := "check the delimiter and the columns (--delimiter, --columns, --unit; the README section Connect a ventilator lists the formats)"
	switch {
	case c.Bad[lines.CauseNotNumber]*2 > c.BadTotal():
		why = "most lines have fields that are not numbers: is the delimiter or the decimal mark another? (--delimiter; a decimal comma needs ';' between fields)"
	case c.Bad[lines.CauseFieldCount]*2 > c.BadTotal():
		why = "most lines have another number of fields than the columns: name them with a header line or --columns"
	case c.Bad[lines.CauseOutOfRange]*2 > c.BadTotal():
		why = "most values are out of range: is a unit other than cmH2O and L/min? (--unit paw=mbar, --unit flow=L/s, …)"
	case c.Bad[lines.CauseBadHeader] > 0:
		why = "the header does not name paw and flow: rename them or give --columns"
	}
	return fmt.Errorf("%s: no sample decoded from %d lines (bad: %s): %s", path, c.Lines, c.BadCauses(), why)
}
