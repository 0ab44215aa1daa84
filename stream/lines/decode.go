package lines

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"math"
	"sort"
	"strings"
	"time"
)

// MaxLineBytes is the longest line (without its terminator) that is decoded.
const MaxLineBytes = 512

// maxColumns is the most fields a line of MaxLineBytes can have: a
// header may name that many, and the columns breathd does not read are
// ignored whatever their number.
const maxColumns = MaxLineBytes/2 + 1

// resyncLines is how many consecutive, mutually increasing lines with a
// time before the last good sample make the decoder accept the new time
// line (a device whose clock was reset) instead of rejecting it forever.
const resyncLines = 5

// Plausible ranges, in internal units (DESIGN §3).
const (
	PawMin, PawMax = -30.0, 150.0 // cmH2O
	FlowMax        = 600.0        // L/min, either sign
	VolMax         = 10000.0      // mL, either sign
	readBufBytes   = 64 << 10     // decoder read buffer
	kindIgnore     = colKind(0)   // a column we do not use
	kindT, kindPaw = colKind(1), colKind(2)
	kindFlow       = colKind(3)
	kindVol        = colKind(4)
)

type colKind uint8

// Sample is one decoded data line, in internal units.
type Sample struct {
	T    float64 // time, s
	Paw  float64 // airway pressure, cmH2O
	Flow float64 // flow, L/min, positive into the patient
	Vol  float64 // volume, mL; NaN when the stream has no vol column
	Gap  bool    // the time step before this sample was larger than the gap limit
}

// Cause is why a line was bad.
type Cause uint8

// Causes of a bad line.
const (
	CauseTooLong       Cause = iota // longer than MaxLineBytes
	CauseFieldCount                 // wrong number of fields
	CauseNotNumber                  // a field is not a number
	CauseNotFinite                  // NaN or infinite
	CauseOutOfRange                 // outside the plausible range
	CauseTimeBackwards              // time not later than the previous sample
	CauseBadDirective               // a "# breathd" directive that cannot be read
	CauseBadHeader                  // a header without paw and flow, or naming a column twice
	NumCauses
)

var causeNames = [NumCauses]string{"too_long", "field_count", "not_number", "not_finite", "out_of_range", "time_backwards", "bad_directive", "bad_header"}

// String returns the cause's name as used in counters and payloads.
func (c Cause) String() string {
	if c < NumCauses {
		return causeNames[c]
	}
	return "unknown"
}

// ErrBadLine is wrapped by every *LineError.
var ErrBadLine = errors.New("bad line")

// LineError describes a skipped line. The decoder reuses one LineError: it
// is valid until the next call of Next.
type LineError struct {
	Line  int64 // 1-based line number
	Cause Cause
	Field int // 0-based field index, or -1 when the cause is not one field's
}

func (e *LineError) Error() string {
	if e.Field >= 0 {
		return fmt.Sprintf("line %d field %d: %s", e.Line, e.Field+1, e.Cause)
	}
	return fmt.Sprintf("line %d: %s", e.Line, e.Cause)
}

// Unwrap returns ErrBadLine.
func (e *LineError) Unwrap() error { return ErrBadLine }

// FormatError is a stream whose columns cannot be decoded at all (no paw
// column, say). It is fatal for the stream.
type FormatError struct {
	Line int64
	Err  error
}

func (e *FormatError) Error() string { return fmt.Sprintf("line %d: %v", e.Line, e.Err) }

// Unwrap returns the underlying error.
func (e *FormatError) Unwrap() error { return e.Err }

// Counts are a decoder's counters since it started.
type Counts struct {
	Lines    int64            // every line read, including comments and blanks
	Comments int64            // comment lines
	Samples  int64            // good data lines
	Bad      [NumCauses]int64 // bad lines by cause
	Gaps     int64            // time steps larger than the gap limit
	Resyncs  int64            // times the decoder accepted a time line reset
	FirstT   float64          // time of the first good sample, s
	LastT    float64          // time of the latest good sample, s
	// The current continuous segment (a gap or a clock reset starts a new
	// one): the time of its first sample, the samples before it, and the
	// summed spans of the segments before it.
	SegFirstT   float64
	SegFrom     int64
	EarlierSpan float64
	// of the out_of_range lines, those whose pressure or flow was out
	PawOutOfRange, FlowOutOfRange int64
}

// Span is the stream time covered by good samples: the sum of the
// continuous segments' spans, without the gaps and resets between them.
func (c *Counts) Span() float64 {
	if c.Samples == 0 {
		return 0
	}
	return c.EarlierSpan + c.LastT - c.SegFirstT
}

// BadTotal is the number of bad lines of every cause.
func (c *Counts) BadTotal() int64 {
	var n int64
	for _, v := range c.Bad {
		n += v
	}
	return n
}

// BadCauses lists the bad lines by cause, "field_count 1, not_finite 2",
// in the order of the causes' names; "" when there are none.
func (c *Counts) BadCauses() string {
	var parts []string
	for i, n := range c.Bad {
		if n > 0 {
			parts = append(parts, fmt.Sprintf("%s %d", Cause(i), n))
		}
	}
	sort.Strings(parts)
	return strings.Join(parts, ", ")
}

// RateHz is the sample rate of the current continuous segment, or 0
// before it has two samples.
func (c *Counts) RateHz() float64 {
	n := c.Samples - c.SegFrom
	if n < 2 || c.LastT <= c.SegFirstT {
		return 0
	}
	return float64(n-1) / (c.LastT - c.SegFirstT)
}

// Decoder reads samples from a stream of sample lines. It is not safe for
// concurrent use.
type Decoder struct {
	r          io.Reader
	configured Format // as given to NewDecoder
	format     Format // configured plus directives
	buf        []byte
	start, end int
	readErr    error
	discarding bool // inside a too-long line

	resolved bool
	delim    byte
	// headerUnits are the units the header's names carry, by kind
	headerUnits [5]string
	commaBuf    [64]byte // scratch for a number with a decimal comma
	// how the columns were resolved: autoDelim when the delimiter was
	// detected, fromHeader when a header named the columns; misses counts
	// field-count misses since the last good sample (at missAt samples),
	// which make a detected delimiter be looked for again
	autoDelim, fromHeader bool
	misses                int
	missAt                int64
	kinds                 [maxColumns]colKind
	ncols                 int
	hasT                  bool
	hasVol                bool
	// plain: every column is one we use, and the delimiter is not runs
	// of blanks; the batch path takes only such lines (plainKinds are
	// their kinds)
	plain      bool
	plainKinds [8]colKind
	scale      [5]float64 // by colKind
	rateHz     float64
	gapLimit   float64 // s
	fatal      error

	index    int64 // data lines seen, for streams without t
	haveLast bool
	lastT    float64
	backRun  int     // consecutive increasing lines before lastT
	backT    float64 // time of the latest such line

	wall        time.Time // wall-clock time of a clock directive
	wallT       float64   // stream time it belongs to
	wallPending bool      // a clock directive waits for its sample
	hasWall     bool

	vals    [5]float64 // the current line's values by colKind, as printed
	counts  Counts
	lineErr LineError
	noFast  bool // tests: decode on the general path only
	// headerErr is why the latest header was refused, for the caller's log
	headerErr error
}

// NewDecoder returns a decoder reading r with format f.
func NewDecoder(r io.Reader, f Format) (*Decoder, error) {
	if err := f.Validate(); err != nil {
		return nil, err
	}
	f.Units = copyUnits(f.Units)
	f.Columns = append([]string(nil), f.Columns...)
	d := &Decoder{configured: f, buf: make([]byte, readBufBytes)}
	d.Reset(r)
	return d, nil
}

func copyUnits(m map[string]string) map[string]string {
	out := make(map[string]string, len(m))
	for k, v := range m {
		out[strings.ToLower(k)] = v
	}
	return out
}

// Reset makes d read a new stream from r with its original format, keeping
// its buffer.
func (d *Decoder) Reset(r io.Reader) {
	buf, cfg := d.buf, d.configured
	*d = Decoder{r: r, configured: cfg, buf: buf}
	d.format = cfg
	d.format.Units = copyUnits(cfg.Units)
}

// HeaderError is why the latest refused header was refused, or nil.
func (d *Decoder) HeaderError() error { return d.headerErr }

// Counts returns the counters so far.
func (d *Decoder) Counts() Counts { return d.counts }

// Format returns the format in use: the configured one completed by
// directives and, once the first data line was seen, by what was detected.
func (d *Decoder) Format() Format {
	f := d.format
	f.Units = copyUnits(d.format.Units)
	if d.resolved {
		f.Delimiter = delimiterName(d.delim)
		f.Columns = nil
		for i := 0; i < d.ncols; i++ {
			f.Columns = append(f.Columns, kindName(d.kinds[i], i))
		}
		for k, u := range d.headerUnits { // the header's units, unless given
			if name := kindName(colKind(k), 0); u != "" && f.Units[name] == "" {
				if f.Units == nil {
					f.Units = map[string]string{}
				}
				f.Units[name] = u
			}
		}
	}
	return f
}

func kindName(k colKind, i int) string {
	switch k {
	case kindT:
		return ColT
	case kindPaw:
		return ColPaw
	case kindFlow:
		return ColFlow
	case kindVol:
		return ColVol
	}
	return fmt.Sprintf("x%d", i+1)
}

// Clock maps stream time to wall-clock time, as the clock directives of a
// recording set it. The zero Clock knows no wall-clock time.
type Clock struct {
	ok   bool
	wall time.Time
	t    float64
}

// Clock returns the mapping in force now. A caller that decodes ahead of
// its analysis keeps the Clock of each batch, since the next directive
// changes the decoder's.
func (d *Decoder) Clock() Clock { return Clock{d.hasWall, d.wall, d.wallT} }

// At is the wall-clock time of stream time t, known once a clock directive
// was followed by a sample.
func (c Clock) At(t float64) (time.Time, bool) {
	if !c.ok {
		return time.Time{}, false
	}
	return c.wall.Add(time.Duration((t - c.t) * float64(time.Second))), true
}

// Wall returns the wall-clock time of stream time t, known once a clock
// directive was followed by a sample.
func (d *Decoder) Wall(t float64) (time.Time, bool) { return d.Clock().At(t) }

// Decode stores the next good sample in s. A bad line returns a
// *LineError (skip it and call Decode again); a stream that cannot be
// decoded returns a *FormatError; the end of the input returns io.EOF; a
// read error is returned as it came, after every complete line before it.
// s is written only when the error is nil.
func (d *Decoder) Decode(s *Sample) error {
	if d.fatal != nil {
		return d.fatal
	}
	if d.resolved && !d.discarding && !d.noFast && d.fastLine(&d.vals) {
		d.counts.Lines++
		d.index++
		return d.finish(&d.vals, s)
	}
	for {
		line, tooLong, err := d.readLine()
		if err != nil {
			return err
		}
		d.counts.Lines++
		if tooLong {
			d.index++
			return d.bad(CauseTooLong, -1)
		}
		if d.counts.Lines == 1 {
			if line, err = sniff(line); err != nil {
				d.fatal = &FormatError{Line: 1, Err: err}
				return d.fatal
			}
		}
		line = trimSpace(line)
		if len(line) == 0 {
			continue
		}
		if line[0] == '#' {
			d.counts.Comments++
			if err := d.directive(line[1:]); err != nil {
				return err
			}
			continue
		}
		if !d.resolved {
			header, err := d.resolve(line)
			switch {
			case errors.Is(err, errNotHeader):
				d.index++
				return d.bad(CauseNotNumber, -1) // wait for a header or data
			case errors.Is(err, errCannotTell):
				d.index++
				return d.bad(CauseFieldCount, -1) // wait for a line that can tell
			case errors.Is(err, errBadHeader):
				d.headerErr = err
				return d.bad(CauseBadHeader, -1)
			}
			if err != nil {
				d.fatal = &FormatError{Line: d.counts.Lines, Err: err}
				return d.fatal
			}
			if header {
				continue
			}
		}
		d.index++
		return d.parse(line, s)
	}
}

func (d *Decoder) bad(c Cause, field int) error {
	d.counts.Bad[c]++
	if c == CauseFieldCount && d.resolved && d.autoDelim && !d.fromHeader {
		if d.missAt != d.counts.Samples {
			d.misses, d.missAt = 0, d.counts.Samples
		}
		if d.misses++; d.misses >= resyncLines {
			// the delimiter was taken from a line that misled (noise on a
			// port opened mid-line): look again on the next line
			d.resolved, d.misses = false, 0
		}
	}
	d.lineErr = LineError{Line: d.counts.Lines, Cause: c, Field: field}
	return &d.lineErr
}

// readLine returns the next line without its LF. tooLong reports a line
// longer than MaxLineBytes, whose bytes are discarded.
func (d *Decoder) readLine() (line []byte, tooLong bool, err error) {
	for {
		if i := bytes.IndexByte(d.buf[d.start:d.end], '\n'); i >= 0 {
			line = d.buf[d.start : d.start+i]
			d.start += i + 1
			if d.discarding {
				d.discarding = false
				return nil, true, nil
			}
			if len(line) > MaxLineBytes+1 || (len(line) == MaxLineBytes+1 && line[MaxLineBytes] != '\r') {
				return nil, true, nil
			}
			return line, false, nil
		}
		if d.end-d.start > MaxLineBytes+1 {
			d.discarding = true
			d.start, d.end = 0, 0
		}
		if d.readErr != nil {
			return d.finalLine()
		}
		d.fill()
	}
}

// finalLine returns what is left after the reader failed or ended.
func (d *Decoder) finalLine() ([]byte, bool, error) {
	if d.discarding {
		d.discarding = false
		return nil, true, nil
	}
	if d.end > d.start {
		line := d.buf[d.start:d.end]
		d.start = d.end
		return line, false, nil
	}
	return nil, false, d.readErr
}

func trimSpace(b []byte) []byte {
	for len(b) > 0 && (b[len(b)-1] == '\r' || b[len(b)-1] == ' ' || b[len(b)-1] == '\t') {
		b = b[:len(b)-1]
	}
	for len(b) > 0 && (b[0] == ' ' || b[0] == '\t') {
		b = b[1:]
	}
	return b
}

// directive handles a comment's text (after '#').
func (d *Decoder) directive(text []byte) error {
	text = trimSpace(text)
	const prefix = "breathd "
	if !bytes.HasPrefix(text, []byte(prefix)) {
		return nil
	}
	word, rest, _ := strings.Cut(string(text[len(prefix):]), " ")
	switch word {
	case "format":
		if d.resolved {
			return nil // a later file's header inside a concatenation
		}
		if err := d.format.mergeDirective(rest); err != nil {
			return d.bad(CauseBadDirective, -1)
		}
	case "clock":
		t, err := time.Parse(time.RFC3339Nano, strings.TrimSpace(rest))
		if err != nil {
			return d.bad(CauseBadDirective, -1)
		}
		d.wall, d.wallPending = t, true
	}
	return nil
}

// errNotHeader marks a first line that is neither data nor a header: it
// names no column breathd knows (noise on a live port, a partial line).
var errNotHeader = errors.New("not a header")

// errBadHeader marks a header that cannot be used: it is skipped as a bad
// line, and the configured (or default) columns apply to the data.
var errBadHeader = errors.New("unusable header")

// resolve decides delimiter and columns from the first non-comment line and
// reports whether that line is a header.
func (d *Decoder) resolve(line []byte) (header bool, err error) {
	f := d.format
	d.delim, _ = parseDelimiter(f.Delimiter)
	d.autoDelim = d.delim == 0
	if d.autoDelim {
		if !mayTellDelimiter(line) {
			return false, errCannotTell
		}
		d.delim = detectDelimiter(line)
	}
	names, numeric := d.splitNames(line)
	if !numeric && !namesKnownColumn(names) {
		return false, errNotHeader
	}
	if len(names) > maxColumns {
		return false, fmt.Errorf("%w: %d columns; at most %d are read", errBadHeader, len(names), maxColumns)
	}
	if numeric {
		names = f.Columns
		if len(names) == 0 {
			names = defaultColumns[:]
		}
	}
	if err := d.setColumns(names); err != nil {
		if !numeric {
			return false, fmt.Errorf("%w: %v", errBadHeader, err)
		}
		return false, err
	}
	d.rateHz = f.RateHz
	d.gapLimit = DefaultGapLimit.Seconds()
	if f.GapLimit > 0 {
		d.gapLimit = f.GapLimit.Seconds()
	}
	if !d.hasT && d.rateHz <= 0 {
		return false, errors.New("the stream has no t column: set rate_hz (--rate-hz)")
	}
	sign := 1.0
	if f.FlowSign != 0 {
		sign = f.FlowSign
	}
	d.scale = [5]float64{1, 1, 1, 1, 1}
	for k := kindT; k <= kindVol; k++ {
		u, ok := f.Units[kindName(k, 0)]
		if !ok && d.headerUnits[k] != "" { // the header's unit, unless one was given
			u, ok = d.headerUnits[k], true
		}
		if ok {
			d.scale[k], _ = UnitFactor(kindName(k, 0), u)
		}
	}
	d.scale[kindFlow] *= sign
	d.plain = d.delim != ' ' && d.ncols <= 5
	for i := 0; i < d.ncols && d.plain; i++ {
		d.plainKinds[i] = d.kinds[i]
		d.plain = d.kinds[i] != kindIgnore
	}
	d.resolved, d.fromHeader, d.misses = true, !numeric, 0
	return !numeric, nil
}

// errCannotTell marks a first line with a single field (a lone number, as
// when a port is opened in the middle of a line): it cannot tell the
// delimiter.
var errCannotTell = errors.New("cannot tell the delimiter")

// mayTellDelimiter reports whether a line has more than one field by some
// delimiter.
func mayTellDelimiter(line []byte) bool {
	return bytes.ContainsAny(line, ";,\t ")
}

func namesKnownColumn(names []string) bool {
	for _, n := range names {
		if c, _ := columnOf(n); c != "" {
			return true
		}
	}
	return false
}

func detectDelimiter(line []byte) byte {
	for _, c := range []byte{';', ',', '\t'} {
		if bytes.IndexByte(line, c) >= 0 {
			return c
		}
	}
	return ' '
}

// splitNames splits a first line into its fields and says whether every
// field is a number.
func (d *Decoder) splitNames(line []byte) ([]string, bool) {
	var names []string
	numeric := true
	for rest, more := line, true; more; {
		var field []byte
		field, rest, more = d.cut(rest)
		if _, k := parseNumber(field); k == numSyntax {
			numeric = false
		}
		names = append(names, strings.ToLower(string(field)))
	}
	return names, numeric
}

func (d *Decoder) setColumns(names []string) error {
	d.ncols = len(names)
	d.hasT, d.hasVol = false, false
	d.headerUnits = [5]string{}
	var seen [5]bool
	for i, n := range names {
		k := kindIgnore
		col, unit := columnOf(n)
		switch col {
		case ColT:
			k, d.hasT = kindT, true
		case ColPaw:
			k = kindPaw
		case ColFlow:
			k = kindFlow
		case ColVol:
			k, d.hasVol = kindVol, true
		}
		if k != kindIgnore && seen[k] {
			return fmt.Errorf("column %q named twice", n)
		}
		if k != kindIgnore {
			d.headerUnits[k] = unit
		}
		seen[k] = true
		d.kinds[i] = k
	}
	if !seen[kindPaw] || !seen[kindFlow] {
		return fmt.Errorf("columns %s: paw and flow are required", strings.Join(names, ","))
	}
	return nil
}

// cut returns the first field of b and the rest; more is false for the last
// field.
func (d *Decoder) cut(b []byte) (field, rest []byte, more bool) {
	if d.delim == ' ' {
		i := 0
		for i < len(b) && b[i] != ' ' && b[i] != '\t' {
			i++
		}
		field = b[:i]
		for i < len(b) && (b[i] == ' ' || b[i] == '\t') {
			i++
		}
		return field, b[i:], i < len(b)
	}
	i := bytes.IndexByte(b, d.delim)
	if i < 0 {
		return trimSpace(b), nil, false
	}
	return trimSpace(b[:i]), b[i+1:], true
}

// decimalComma reads a number written with a decimal comma ("5,25"), as
// spreadsheets in many countries write them, when the delimiter is not a
// comma; buf is scratch space for the copy.
func decimalComma(field []byte, buf *[64]byte) (float64, numKind) {
	i := bytes.IndexByte(field, ',')
	if i < 0 || len(field) > len(buf) || bytes.IndexByte(field[i+1:], ',') >= 0 || bytes.IndexByte(field, '.') >= 0 {
		return 0, numSyntax
	}
	b := append(buf[:0], field...)
	b[i] = '.'
	return parseNumber(b)
}

// sniff looks at the first line of a stream for what is not sample lines
// at all, and skips a UTF-8 byte-order mark.
func sniff(line []byte) ([]byte, error) {
	switch {
	case bytes.HasPrefix(line, []byte("\xef\xbb\xbf")):
		return line[3:], nil
	case bytes.HasPrefix(line, []byte("\xff\xfe")), bytes.HasPrefix(line, []byte("\xfe\xff")):
		return nil, errors.New("the stream is UTF-16 text: save it as UTF-8 (or plain ASCII) text")
	case bytes.HasPrefix(line, []byte("\x89PNG")):
		return nil, errors.New("this is a PNG image, not sample lines")
	case bytes.HasPrefix(line, []byte("\xff\xd8\xff")):
		return nil, errors.New("this is a JPEG image, not sample lines")
	case bytes.HasPrefix(line, []byte("%PDF")):
		return nil, errors.New("this is a PDF document, not sample lines")
	case bytes.HasPrefix(line, []byte("PK\x03\x04")):
		return nil, errors.New("this is a ZIP archive (a spreadsheet's own format?), not sample lines: export it as CSV text")
	}
	return line, nil
}

// parse decodes one data line on the general path.
func (d *Decoder) parse(line []byte, s *Sample) error {
	vals := &d.vals
	rest, more := line, true
	for col := 0; col < d.ncols; col++ {
		if !more {
			return d.bad(CauseFieldCount, -1)
		}
		var field []byte
		field, rest, more = d.cut(rest)
		k := d.kinds[col]
		if k == kindIgnore {
			continue
		}
		v, nk := parseNumber(field)
		if nk == numSyntax && d.delim != ',' {
			v, nk = decimalComma(field, &d.commaBuf)
		}
		switch nk {
		case numSyntax:
			if d.countFields(line) != d.ncols {
				return d.bad(CauseFieldCount, -1)
			}
			return d.bad(CauseNotNumber, col)
		case numNotFinite:
			return d.bad(CauseNotFinite, col)
		}
		vals[k] = v
	}
	if more {
		return d.bad(CauseFieldCount, -1)
	}
	return d.finish(vals, s)
}

// finish scales a line's values, checks their range and time, and counts
// the sample. vals is indexed by colKind and holds the values as printed.
func (d *Decoder) finish(vals *[5]float64, out *Sample) error {
	s := Sample{Paw: vals[kindPaw] * d.scale[kindPaw], Flow: vals[kindFlow] * d.scale[kindFlow], Vol: math.NaN()}
	if d.hasVol {
		s.Vol = vals[kindVol] * d.scale[kindVol]
	}
	if s.Paw < PawMin || s.Paw > PawMax {
		d.counts.PawOutOfRange++
		return d.bad(CauseOutOfRange, d.column(kindPaw))
	}
	if s.Flow < -FlowMax || s.Flow > FlowMax {
		d.counts.FlowOutOfRange++
		return d.bad(CauseOutOfRange, d.column(kindFlow))
	}
	if d.hasVol && (s.Vol < -VolMax || s.Vol > VolMax) {
		return d.bad(CauseOutOfRange, d.column(kindVol))
	}
	if d.hasT {
		s.T = vals[kindT] * d.scale[kindT]
	} else {
		s.T = float64(d.index-1) / d.rateHz
	}
	if err := d.checkTime(&s); err != nil {
		return err
	}
	d.counts.Samples++
	if d.wallPending {
		d.wallT, d.wallPending, d.hasWall = s.T, false, true
	}
	*out = s
	return nil
}

// checkTime rejects a time that does not move forward, accepts a reset time
// line after resyncLines consistent lines, and marks gaps.
func (d *Decoder) checkTime(s *Sample) error {
	if !d.haveLast {
		d.haveLast, d.lastT, d.counts.FirstT, d.counts.LastT = true, s.T, s.T, s.T
		d.counts.SegFirstT = s.T
		return nil
	}
	if s.T <= d.lastT {
		if d.backRun > 0 && s.T > d.backT {
			d.backRun++
		} else {
			d.backRun = 1
		}
		d.backT = s.T
		if d.backRun < resyncLines {
			return d.bad(CauseTimeBackwards, d.column(kindT))
		}
		d.counts.Resyncs++
		s.Gap = true
	} else if s.T-d.lastT > d.gapLimit {
		s.Gap = true
	}
	if s.Gap {
		d.counts.Gaps++
		// a new continuous segment starts with this sample
		d.counts.EarlierSpan += d.counts.LastT - d.counts.SegFirstT
		d.counts.SegFirstT, d.counts.SegFrom = s.T, d.counts.Samples
	}
	d.backRun = 0
	d.lastT, d.counts.LastT = s.T, s.T
	return nil
}

// countFields is used on the bad-line path only, so that a line of text is
// reported as the wrong shape rather than as a bad number.
func (d *Decoder) countFields(line []byte) int {
	n := 0
	for rest, more := line, true; more; n++ {
		_, rest, more = d.cut(rest)
	}
	return n
}

func (d *Decoder) column(k colKind) int {
	for i := 0; i < d.ncols; i++ {
		if d.kinds[i] == k {
			return i
		}
	}
	return -1
}
