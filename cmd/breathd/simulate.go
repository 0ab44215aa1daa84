package main

import (
	"bufio"
	"bytes"
	"compress/gzip"
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"math"
	"os"
	"strconv"
	"strings"
	"sync"
	"time"

	"breathd/cmd/breathd/internal/config"
	"breathd/device"
	"breathd/mechanics/lungsim"
	"breathd/stream/lines"

	"github.com/creack/pty"
	"golang.org/x/sys/unix"
)

// simFlags are the settings a simulation can take from flags instead of a
// scenario file.
type simFlags struct {
	mode                                 string
	r, c, peep, rr, vt, ti, pause, pinsp float64
	pawNoise, flowNoise                  float64
	effortRate, effortP                  float64
	rate                                 float64
	duration                             time.Duration
	seed                                 uint64
	sex                                  string
	height                               float64
}

func (f *simFlags) register(fs *flag.FlagSet) {
	fs.StringVar(&f.mode, "mode", "vc", "vc (volume control), pc (pressure control) or ps (pressure support)")
	fs.Float64Var(&f.r, "r", 10, "airway resistance, cmH2O·s/L")
	fs.Float64Var(&f.c, "c", 50, "compliance, mL/cmH2O")
	fs.Float64Var(&f.peep, "peep", 5, "PEEP, cmH2O")
	fs.Float64Var(&f.rr, "rr", 15, "set rate, 1/min")
	fs.Float64Var(&f.vt, "vt", 450, "vc: tidal volume, mL")
	fs.Float64Var(&f.ti, "ti", 1.2, "vc, pc: inspiratory time including the pause, s")
	fs.Float64Var(&f.pause, "pause", 0.3, "vc: end-inspiratory pause, s")
	fs.Float64Var(&f.pinsp, "pinsp", 15, "pc, ps: pressure above PEEP, cmH2O")
	fs.Float64Var(&f.pawNoise, "paw-noise", 0.2, "σ of pressure noise, cmH2O")
	fs.Float64Var(&f.flowNoise, "flow-noise", 0.5, "σ of flow noise, L/min")
	fs.Float64Var(&f.effortRate, "effort-rate", 0, "patient efforts per minute (0: passive)")
	fs.Float64Var(&f.effortP, "effort-p", 5, "peak muscle pressure of an effort, cmH2O")
	fs.Float64Var(&f.rate, "rate-hz", 100, "samples per second")
	fs.DurationVar(&f.duration, "duration", 10*time.Minute, "length of the stream")
	fs.Uint64Var(&f.seed, "seed", 1, "random seed; the same seed gives the same stream")
	fs.StringVar(&f.sex, "sex", "", "patient sex for the scenario (male or female)")
	fs.Float64Var(&f.height, "height-cm", 0, "patient height, cm")
}

// apply sets the scenario fields whose flags were given (all of them when
// there is no scenario file).
func (f *simFlags) apply(fs *flag.FlagSet, sc *lungsim.Scenario, all bool) {
	set := map[string]bool{}
	fs.Visit(func(fl *flag.Flag) { set[fl.Name] = true })
	use := func(name string) bool { return all || set[name] }
	st := &sc.Settings
	for name, pair := range map[string][2]*float64{
		"r": {&st.R, &f.r}, "c": {&st.C, &f.c}, "peep": {&st.PEEP, &f.peep}, "rr": {&st.RR, &f.rr},
		"vt": {&st.VT, &f.vt}, "ti": {&st.Ti, &f.ti}, "pause": {&st.Pause, &f.pause}, "pinsp": {&st.PInsp, &f.pinsp},
		"paw-noise": {&sc.Sensor.PawNoise, &f.pawNoise}, "flow-noise": {&sc.Sensor.FlowNoise, &f.flowNoise},
		"effort-rate": {&st.EffortRate, &f.effortRate}, "effort-p": {&st.EffortP, &f.effortP},
		"rate-hz": {&sc.RateHz, &f.rate}, "height-cm": {&sc.Patient.HeightCm, &f.height},
	} {
		if use(name) {
			*pair[0] = *pair[1]
		}
	}
	if use("mode") {
		st.Mode = lungsim.Mode(f.mode)
	}
	if use("duration") {
		sc.Duration = f.duration
	}
	if use("seed") {
		sc.Seed = f.seed
	}
	if use("sex") {
		sc.Patient.Sex = f.sex
	}
	if st.EffortRate > 0 && st.EffortTime == 0 {
		st.EffortTime = 0.8
	}
	if all && st.Mode != lungsim.ModeVC {
		st.Pause = 0
	}
}

func cmdSimulate(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("simulate", "simulate [--scenario FILE] [flags]", stderr)
	var sf simFlags
	sf.register(fs)
	scenario := fs.String("scenario", "", "scenario file (see configs/scenarios/); flags given as well override it")
	out := fs.String("out", "-", "write the stream to this file (.gz compresses), or - for stdout")
	usePty := fs.Bool("pty", false, "write the stream to a new pseudo-terminal and print its path, as a ventilator's serial port")
	link := fs.String("link", "", "with --pty: also make this symlink to the pseudo-terminal")
	truth := fs.String("truth", "", "write each breath's true values as CSV to this file")
	speed := fs.String("speed", "", "1 real time, N times faster, max as fast as possible (default: max, or 1 with --pty)")
	delim := fs.String("delimiter", "comma", "field delimiter: comma, semicolon, tab or space")
	units := unitFlag{}
	fs.Var(units, "unit", "unit to print a column in, repeatable: t=s|ms, paw=cmH2O|mbar|hPa|kPa, flow=L/min|L/s|mL/s")
	noTime := fs.Bool("no-time", false, "leave out the t column (readers then need --rate-hz)")
	noHeader := fs.Bool("no-header", false, "leave out the header line")
	flowSign := fs.Float64("flow-sign", 1, "-1 prints flow as positive out of the patient")
	directive := fs.Bool("directive", true, "print a '# breathd format' comment first, so breathd reads the stream with no flags")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if fs.NArg() > 0 {
		return usagef("simulate takes no arguments besides flags; got %q", fs.Args())
	}
	var sc lungsim.Scenario
	if *scenario != "" {
		var err error
		if sc, err = config.LoadScenario(*scenario); err != nil {
			return err
		}
		sf.apply(fs, &sc, false)
	} else {
		sf.apply(fs, &sc, true)
	}
	sc.Defaults()
	if err := sc.Validate(); err != nil {
		return usagef("%w", err)
	}
	simFmt, err := simFormat(*delim, units, *noTime, !*noHeader, *flowSign, sc.RateHz, *directive)
	if err != nil {
		return err
	}
	if *speed == "" {
		*speed = "max"
		if *usePty {
			*speed = "1"
		}
	}
	sp, err := parseSpeed(*speed)
	if err != nil {
		return err
	}
	tw, closeTruth, err := truthWriter(*truth)
	if err != nil {
		return err
	}
	breaths := 0
	src := device.NewSim(sc, simFmt, sp, func(tr lungsim.Truth) {
		breaths++
		if tw != nil {
			writeTruth(tw, tr)
		}
	})
	w, dest, closeOut, err := simOutput(*out, *usePty, *link, stdout, stderr)
	if err != nil {
		return err
	}
	// Ctrl-C ends the copy whether it waits to read (pacing) or to write (a
	// pty nobody reads): close both ends
	var closeOnce sync.Once
	var closeErr error
	closeAll := func() error { closeOnce.Do(func() { closeErr = closeOut() }); return closeErr }
	stop := context.AfterFunc(ctx, func() { src.Close(); closeAll() })
	defer stop()
	start := time.Now()
	lw := &lineCounter{w: w}
	n, copyErr := io.Copy(lw, src)
	if err := closeAll(); copyErr == nil {
		copyErr = err
	}
	if err := closeTruth(); copyErr == nil {
		copyErr = err
	}
	if copyErr != nil && ctx.Err() == nil {
		return fmt.Errorf("write %s: %w", dest, copyErr)
	}
	done := time.Duration(float64(max(0, lw.lines-simFmt.Preamble())) / sc.RateHz * float64(time.Second))
	if ctx.Err() != nil && done < sc.Duration {
		fmt.Fprintf(stderr, "stopped after %v of the %v scenario at %g Hz: %d breaths, %.1f MB to %s in %.1f s\n",
			done.Round(10*time.Millisecond), sc.Duration, sc.RateHz, breaths, float64(n)/1e6, dest, time.Since(start).Seconds())
		return nil
	}
	fmt.Fprintf(stderr, "simulated %v at %g Hz: %d breaths, %.1f MB to %s in %.1f s\n",
		sc.Duration, sc.RateHz, breaths, float64(n)/1e6, dest, time.Since(start).Seconds())
	return nil
}

// lineCounter counts the lines written through it.
type lineCounter struct {
	w     io.Writer
	lines int64
}

func (c *lineCounter) Write(p []byte) (int, error) {
	n, err := c.w.Write(p)
	c.lines += int64(bytes.Count(p[:n], []byte{'\n'}))
	return n, err
}

// simFormat builds the printed format, and the directive that tells
// breathd how to read it.
func simFormat(delim string, units unitFlag, noTime, header bool, flowSign, rate float64, directive bool) (device.SimFormat, error) {
	f := lines.Format{Delimiter: delim, Units: units, FlowSign: flowSign}
	if noTime {
		f.Columns, f.RateHz = []string{"paw", "flow"}, rate
	}
	if err := f.Validate(); err != nil {
		return device.SimFormat{}, usagef("%w", err)
	}
	d := map[string]byte{"comma": ',', "semicolon": ';', "tab": '\t', "space": ' '}[strings.ToLower(delim)]
	if d == 0 {
		return device.SimFormat{}, usagef("--delimiter %q: want comma, semicolon, tab or space", delim)
	}
	sf := device.SimFormat{Delimiter: d, Header: header, NoTime: noTime}
	scale := func(col string) float64 {
		if u, ok := units[col]; ok {
			factor, _ := lines.UnitFactor(col, u)
			return 1 / factor
		}
		return 1
	}
	sf.TScale, sf.PawScale, sf.FlowScale = scale("t"), scale("paw"), scale("flow")*flowSign
	if directive {
		sf.Directive = f.Directive()
	}
	return sf, nil
}

// simOutput opens where the stream goes.
func simOutput(out string, usePty bool, link string, stdout, stderr io.Writer) (io.Writer, string, func() error, error) {
	if usePty {
		master, slave, err := pty.Open()
		if err != nil {
			return nil, "", nil, fmt.Errorf("open a pseudo-terminal: %w", err)
		}
		if master, err = pollable(master); err != nil {
			slave.Close()
			return nil, "", nil, fmt.Errorf("open a pseudo-terminal: %w", err)
		}
		makeRaw(slave)
		name := slave.Name()
		if link != "" {
			os.Remove(link)
			if err := os.Symlink(name, link); err != nil {
				master.Close()
				slave.Close()
				return nil, "", nil, fmt.Errorf("--link: %w", err)
			}
			name = link + " → " + slave.Name()
		}
		go io.Copy(io.Discard, master) // anything written back to the "ventilator"
		fmt.Fprintf(stderr, "simulated ventilator on %s (point a serial device's path at it; Ctrl-C ends)\n", name)
		return master, name, func() error {
			if link != "" {
				os.Remove(link)
			}
			slave.Close()
			return master.Close()
		}, nil
	}
	if out == "-" {
		bw := bufio.NewWriterSize(stdout, 64<<10)
		return bw, "stdout", bw.Flush, nil
	}
	f, err := os.Create(out)
	if err != nil {
		return nil, "", nil, fmt.Errorf("--out: %w", err)
	}
	bw := bufio.NewWriterSize(f, 256<<10)
	if strings.HasSuffix(out, ".gz") {
		zw, _ := gzip.NewWriterLevel(bw, gzip.BestCompression)
		return zw, out, func() error {
			return errors.Join(zw.Close(), bw.Flush(), f.Close())
		}, nil
	}
	return bw, out, func() error { return errors.Join(bw.Flush(), f.Close()) }, nil
}

// pollable gives f's descriptor back as a non-blocking file that Go's
// poller owns, so that closing it ends a Write blocked because nobody
// reads the pty (the pty library's file is in blocking mode, and closing
// that waits for the Write).
func pollable(f *os.File) (*os.File, error) {
	fd, err := unix.Dup(int(f.Fd()))
	f.Close()
	if err != nil {
		return nil, err
	}
	if err := unix.SetNonblock(fd, true); err != nil {
		unix.Close(fd)
		return nil, err
	}
	unix.CloseOnExec(fd)
	return os.NewFile(uintptr(fd), "/dev/ptmx"), nil
}

// makeRaw turns off echo and line editing on a pty so it passes bytes
// like a serial line.
func makeRaw(f *os.File) {
	t, err := unix.IoctlGetTermios(int(f.Fd()), unix.TCGETS)
	if err != nil {
		return
	}
	t.Iflag &^= unix.IGNBRK | unix.BRKINT | unix.PARMRK | unix.ISTRIP | unix.INLCR | unix.IGNCR | unix.ICRNL | unix.IXON
	t.Oflag &^= unix.OPOST
	t.Lflag &^= unix.ECHO | unix.ECHONL | unix.ICANON | unix.ISIG | unix.IEXTEN
	t.Cflag &^= unix.CSIZE | unix.PARENB
	t.Cflag |= unix.CS8
	unix.IoctlSetTermios(int(f.Fd()), unix.TCSETS, t)
}

const truthHeader = "seq,t_start,t_end,mode,r,c,peep,ipeep,vt,peak,plateau,dp,rr,active,triggered\n"

func truthWriter(path string) (*bufio.Writer, func() error, error) {
	if path == "" {
		return nil, func() error { return nil }, nil
	}
	f, err := os.Create(path)
	if err != nil {
		return nil, nil, fmt.Errorf("--truth: %w", err)
	}
	w := bufio.NewWriter(f)
	w.WriteString(truthHeader)
	return w, func() error { return errors.Join(w.Flush(), f.Close()) }, nil
}

func writeTruth(w *bufio.Writer, tr lungsim.Truth) {
	num := func(v float64, d int) string {
		if math.IsNaN(v) {
			return ""
		}
		return strconv.FormatFloat(v, 'f', d, 64)
	}
	fmt.Fprintf(w, "%d,%s,%s,%s,%s,%s,%s,%s,%s,%s,%s,%s,%s,%t,%t\n", tr.Seq, num(tr.TStart, 3), num(tr.TEnd, 3), tr.Mode,
		num(tr.R, 3), num(tr.C, 3), num(tr.PEEP, 3), num(tr.IPEEP, 3), num(tr.VT, 2), num(tr.Peak, 3),
		num(tr.Plateau, 3), num(tr.DP, 3), num(tr.RR, 3), tr.Active, tr.Triggered)
}
