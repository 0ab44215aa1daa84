package lines

import (
	"errors"
	"fmt"
	"sort"
	"strconv"
	"strings"
	"time"
)

// Column names of the input contract.
const (
	ColT    = "t"
	ColPaw  = "paw"
	ColFlow = "flow"
	ColVol  = "vol"
)

// defaultColumns is the column order used when a stream has no header.
var defaultColumns = [...]string{ColT, ColPaw, ColFlow}

// DefaultColumns returns the column order used when a stream has no
// header: t, paw, flow.
func DefaultColumns() []string { return append([]string(nil), defaultColumns[:]...) }

// DefaultGapLimit is the largest time step that is not a gap.
const DefaultGapLimit = 500 * time.Millisecond

// Format says how to read a stream. The zero value means "detect or use the
// defaults" for every field; a recording's format directive fills only the
// fields left at their zero value.
type Format struct {
	Columns   []string          // column order without a header; nil: DefaultColumns()
	Delimiter string            // "auto" or "": detect; "comma", "semicolon", "tab", "space", or the character itself
	RateHz    float64           // sample rate, required without a t column; 0: unset
	Units     map[string]string // column name → unit; missing: the column's default unit
	FlowSign  float64           // +1 or −1; 0: +1
	GapLimit  time.Duration     // 0: DefaultGapLimit
}

// unitFactor converts one column's unit to breathd's internal unit
// (s, cmH2O, L/min, mL). The pressure factors follow NIST SP 811 B.8:
// 1 cmH2O = 98.0665 Pa, 1 mbar = 1 hPa = 100 Pa.
var unitFactor = map[string]map[string]float64{
	ColT:    {"s": 1, "ms": 1e-3},
	ColPaw:  {"cmH2O": 1, "mbar": 100 / 98.0665, "hPa": 100 / 98.0665, "kPa": 1000 / 98.0665},
	ColFlow: {"L/min": 1, "L/s": 60, "mL/s": 0.06},
	ColVol:  {"mL": 1, "L": 1000},
}

// UnitFactor returns the factor that converts a value of column col in unit
// to breathd's internal unit for that column (s, cmH2O, L/min or mL).
func UnitFactor(col, unit string) (float64, error) {
	units, ok := unitFactor[col]
	if !ok {
		return 0, fmt.Errorf("unknown column %q (want t, paw, flow or vol)", col)
	}
	for name, f := range units {
		if strings.EqualFold(name, unit) {
			return f, nil
		}
	}
	return 0, fmt.Errorf("unknown unit %q for %s (want %s)", unit, col, unitList(col))
}

func unitList(col string) string {
	names := make([]string, 0, len(unitFactor[col]))
	for name := range unitFactor[col] {
		names = append(names, name)
	}
	sort.Strings(names)
	return strings.Join(names, ", ")
}

// delimiterNames maps the names accepted in configs and flags to the byte.
var delimiterNames = map[string]byte{
	"comma": ',', ",": ',', "semicolon": ';', ";": ';',
	"tab": '\t', "\t": '\t', `\t`: '\t', "space": ' ', " ": ' ',
}

func delimiterName(c byte) string {
	switch c {
	case ',':
		return "comma"
	case ';':
		return "semicolon"
	case '\t':
		return "tab"
	case ' ':
		return "space"
	}
	return "auto"
}

// parseDelimiter returns 0 for auto.
func parseDelimiter(s string) (byte, error) {
	if s == "" || strings.EqualFold(s, "auto") {
		return 0, nil
	}
	if c, ok := delimiterNames[strings.ToLower(s)]; ok {
		return c, nil
	}
	return 0, fmt.Errorf("unknown delimiter %q (want auto, comma, semicolon, tab or space)", s)
}

// Validate reports the first setting that cannot be used.
func (f Format) Validate() error {
	if _, err := parseDelimiter(f.Delimiter); err != nil {
		return err
	}
	for col, unit := range f.Units {
		if _, err := UnitFactor(col, unit); err != nil {
			return err
		}
	}
	seen := map[string]bool{}
	for _, c := range f.Columns {
		c = strings.ToLower(strings.TrimSpace(c))
		if c == "" {
			return errors.New("empty column name")
		}
		if seen[c] && isKnownColumn(c) {
			return fmt.Errorf("column %q named twice", c)
		}
		seen[c] = true
	}
	if len(f.Columns) > 0 && (!seen[ColPaw] || !seen[ColFlow]) {
		return errors.New("columns must include paw and flow")
	}
	if len(f.Columns) > 0 && !seen[ColT] && f.RateHz <= 0 {
		return errors.New("columns have no t: set rate_hz (--rate-hz)")
	}
	if !(f.RateHz >= 0 && f.RateHz <= 10000) {
		return fmt.Errorf("rate_hz %g out of range (0 < rate ≤ 10000)", f.RateHz)
	}
	if f.FlowSign != 0 && f.FlowSign != 1 && f.FlowSign != -1 {
		return fmt.Errorf("flow_sign %g: want 1 or -1", f.FlowSign)
	}
	if f.GapLimit < 0 {
		return fmt.Errorf("gap_limit %v is negative", f.GapLimit)
	}
	return nil
}

func isKnownColumn(c string) bool {
	return c == ColT || c == ColPaw || c == ColFlow || c == ColVol
}

// Directive renders f as a recording's format directive (without the
// leading "# "), listing only the settings that are set.
func (f Format) Directive() string {
	var b strings.Builder
	b.WriteString("breathd format")
	if len(f.Columns) > 0 {
		b.WriteString(" columns=" + strings.Join(f.Columns, ","))
	}
	if d, _ := parseDelimiter(f.Delimiter); d != 0 {
		b.WriteString(" delimiter=" + delimiterName(d))
	}
	if f.RateHz > 0 {
		b.WriteString(" rate_hz=" + strconv.FormatFloat(f.RateHz, 'g', -1, 64))
	}
	cols := make([]string, 0, len(f.Units))
	for c := range f.Units {
		cols = append(cols, c)
	}
	sort.Strings(cols)
	for _, c := range cols {
		b.WriteString(" unit." + c + "=" + f.Units[c])
	}
	if f.FlowSign != 0 {
		b.WriteString(" flow_sign=" + strconv.FormatFloat(f.FlowSign, 'g', -1, 64))
	}
	if f.GapLimit != 0 {
		b.WriteString(" gap_limit=" + f.GapLimit.String())
	}
	return b.String()
}

// mergeDirective fills the unset fields of f from a format directive's
// words (the text after "breathd format").
func (f *Format) mergeDirective(words string) error {
	var d Format
	for _, w := range strings.Fields(words) {
		k, v, ok := strings.Cut(w, "=")
		if !ok {
			return fmt.Errorf("format directive: %q is not key=value", w)
		}
		var err error
		switch {
		case k == "columns":
			d.Columns = strings.Split(v, ",")
		case k == "delimiter":
			d.Delimiter = v
		case k == "rate_hz":
			d.RateHz, err = strconv.ParseFloat(v, 64)
		case k == "flow_sign":
			d.FlowSign, err = strconv.ParseFloat(v, 64)
		case k == "gap_limit":
			d.GapLimit, err = time.ParseDuration(v)
		case strings.HasPrefix(k, "unit."):
			if d.Units == nil {
				d.Units = map[string]string{}
			}
			d.Units[strings.TrimPrefix(k, "unit.")] = v
		default:
			// A later version may add settings; ignore what we do not know.
		}
		if err != nil {
			return fmt.Errorf("format directive %s: %w", k, err)
		}
	}
	if err := d.Validate(); err != nil {
		return fmt.Errorf("format directive: %w", err)
	}
	if f.Columns == nil {
		f.Columns = d.Columns
	}
	if f.Delimiter == "" || strings.EqualFold(f.Delimiter, "auto") {
		f.Delimiter = d.Delimiter
	}
	if f.RateHz == 0 {
		f.RateHz = d.RateHz
	}
	if f.FlowSign == 0 {
		f.FlowSign = d.FlowSign
	}
	if f.GapLimit == 0 {
		f.GapLimit = d.GapLimit
	}
	for c, u := range d.Units {
		if _, set := f.Units[c]; !set {
			if f.Units == nil {
				f.Units = map[string]string{}
			}
			f.Units[c] = u
		}
	}
	return nil
}
