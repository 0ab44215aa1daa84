package main

import (
	"flag"
	"fmt"
	"path/filepath"
	"strconv"
	"strings"
	"time"

	"breathd/cmd/breathd/internal/config"
	"breathd/stream/lines"
)

// formatFlags are the decoder flags of DESIGN §3, shared by the verbs
// that read a stream.
type formatFlags struct {
	columns   string
	delimiter string
	rateHz    float64
	units     unitFlag
	flowSign  float64
	gapLimit  time.Duration
}

type unitFlag map[string]string

func (u unitFlag) String() string { return "" }

func (u unitFlag) Set(s string) error {
	col, unit, ok := strings.Cut(s, "=")
	if !ok {
		return fmt.Errorf("want COLUMN=UNIT, e.g. paw=mbar")
	}
	col = strings.ToLower(strings.TrimSpace(col))
	if _, err := lines.UnitFactor(col, strings.TrimSpace(unit)); err != nil {
		return err
	}
	u[col] = strings.TrimSpace(unit)
	return nil
}

func (f *formatFlags) register(fs *flag.FlagSet) {
	f.units = unitFlag{}
	fs.StringVar(&f.columns, "columns", "", "column order for a stream without a header, e.g. t,paw,flow (default t,paw,flow)")
	fs.StringVar(&f.delimiter, "delimiter", "auto", "field delimiter: auto, comma, semicolon, tab or space")
	fs.Float64Var(&f.rateHz, "rate-hz", 0, "sample rate in Hz; required when the stream has no t column")
	fs.Var(f.units, "unit", "unit of a column, repeatable: t=s|ms, paw=cmH2O|mbar|hPa|kPa, flow=L/min|L/s|mL/s, vol=mL|L")
	fs.Float64Var(&f.flowSign, "flow-sign", 0, "-1 when the stream's flow is positive out of the patient")
	fs.DurationVar(&f.gapLimit, "gap-limit", 0, "largest time step that is not a gap (default 500ms)")
}

func (f *formatFlags) format() (lines.Format, error) {
	out := lines.Format{Delimiter: f.delimiter, RateHz: f.rateHz, Units: f.units, FlowSign: f.flowSign, GapLimit: f.gapLimit}
	if f.columns != "" {
		for _, c := range strings.Split(f.columns, ",") {
			out.Columns = append(out.Columns, strings.ToLower(strings.TrimSpace(c)))
		}
	}
	if err := out.Validate(); err != nil {
		return out, usagef("%w", err)
	}
	return out, nil
}

// parseSpeed reads --speed: max (or 0) for as fast as possible, else a
// positive factor.
func parseSpeed(s string) (float64, error) {
	if strings.EqualFold(s, "max") {
		return 0, nil
	}
	v, err := strconv.ParseFloat(strings.TrimSuffix(strings.ToLower(s), "x"), 64)
	if err != nil || !(v >= 0 && v <= config.MaxSpeed) {
		return 0, usagef("--speed %q: want 1 (real time), a factor such as 10, or max", s)
	}
	return v, nil
}

// idFromPath makes a device id from a recording's file name: its base
// name without extensions, with characters outside [A-Za-z0-9_.-] as '_'.
func idFromPath(path string) string {
	if path == "-" {
		return "stdin"
	}
	base := filepath.Base(path)
	base = strings.TrimSuffix(base, ".gz")
	base = strings.TrimSuffix(base, filepath.Ext(base))
	b := []byte(base)
	for i, c := range b {
		if !(c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z' || c >= '0' && c <= '9' || c == '_' || c == '.' || c == '-') {
			b[i] = '_'
		}
	}
	if len(b) == 0 {
		return "replay"
	}
	if len(b) > 64 {
		b = b[:64]
	}
	return string(b)
}
