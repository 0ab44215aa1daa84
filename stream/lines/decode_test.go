package lines

import (
	"bufio"
	"bytes"
	"errors"
	"io"
	"math"
	"strconv"
	"strings"
	"sync"
	"testing"
	"testing/iotest"
	"time"
)

// decodeAll reads every sample of input, counting bad lines.
func decodeAll(t testing.TB, input string, f Format) ([]Sample, Counts, error) {
	t.Helper()
	d, err := NewDecoder(strings.NewReader(input), f)
	if err != nil {
		t.Fatalf("NewDecoder: %v", err)
	}
	return drain(d)
}

func drain(d *Decoder) ([]Sample, Counts, error) {
	var out []Sample
	for {
		var s Sample
		err := d.Decode(&s)
		var le *LineError
		switch {
		case err == nil:
			out = append(out, s)
		case errors.As(err, &le):
		case errors.Is(err, io.EOF):
			return out, d.Counts(), nil
		default:
			return out, d.Counts(), err
		}
	}
}

func TestDecodeFormats(t *testing.T) {
	want := []Sample{{T: 0, Paw: 5.1, Flow: 0}, {T: 0.01, Paw: 5.9, Flow: 42.5}}
	tests := []struct {
		name  string
		input string
		f     Format
	}{
		{"header comma", "t,paw,flow\n0.00,5.1,0.0\n0.01,5.9,42.5\n", Format{}},
		{"no header default order", "0.00,5.1,0.0\n0.01,5.9,42.5\n", Format{}},
		{"semicolon CRLF", "0.00;5.1;0.0\r\n0.01;5.9;42.5\r\n", Format{}},
		{"tab", "t\tpaw\tflow\n0\t5.1\t0\n0.01\t5.9\t42.5\n", Format{}},
		{"runs of spaces", "  t    paw   flow\n0.00   5.1    0.0  \n0.01 5.9\t42.5\n", Format{}},
		{"header reordered, unknown column ignored", "flow,note,paw,t\n0,1,5.1,0\n42.5,2,5.9,0.01\n", Format{}},
		{"header case", "T,PAW,Flow\n0,5.1,0\n0.01,5.9,42.5\n", Format{}},
		{"columns given", "5.1,0.0,0.00\n5.9,42.5,0.01\n", Format{Columns: []string{"paw", "flow", "t"}}},
		{"comments and blanks", "# a comment\n\n  # another\nt,paw,flow\n0,5.1,0\n\n0.01,5.9,42.5\n", Format{}},
		{"ms and L/s", "t,paw,flow\n0,5.1,0\n10,5.9,0.70833333333333333\n", Format{Units: map[string]string{"t": "ms", "flow": "L/s"}}},
		{"mL/s", "t,paw,flow\n0,5.1,0\n0.01,5.9,708.33333333333333\n", Format{Units: map[string]string{"flow": "mL/s"}}},
		{"flow sign", "t,paw,flow\n0,5.1,0\n0.01,5.9,-42.5\n", Format{FlowSign: -1}},
		{"rate without t", "paw,flow\n5.1,0\n5.9,42.5\n", Format{RateHz: 100}},
		{"no final newline", "t,paw,flow\n0,5.1,0\n0.01,5.9,42.5", Format{}},
		{"explicit delimiter", "t paw flow\n0 5.1 0\n0.01 5.9 42.5\n", Format{Delimiter: "space"}},
		{"directive fills format", "# breathd format columns=paw,flow delimiter=semicolon rate_hz=100\n5.1;0\n5.9;42.5\n", Format{}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			got, c, err := decodeAll(t, tc.input, tc.f)
			if err != nil {
				t.Fatal(err)
			}
			if c.BadTotal() != 0 {
				t.Fatalf("bad lines %v", c.Bad)
			}
			if len(got) != len(want) {
				t.Fatalf("got %d samples, want %d: %+v", len(got), len(want), got)
			}
			for i := range want {
				g, w := got[i], want[i]
				if !near(g.T, w.T, 1e-12) || !near(g.Paw, w.Paw, 1e-12) || !near(g.Flow, w.Flow, 1e-9) || g.Gap {
					t.Errorf("sample %d = %+v, want %+v", i, g, w)
				}
			}
		})
	}
}

func near(a, b, tol float64) bool { return math.Abs(a-b) <= tol }

// TestUnitFactors checks the conversions against NIST SP 811, Appendix B.8:
// 1 cmH2O = 98.0665 Pa; 1 mbar = 1 hPa = 100 Pa; 1 kPa = 1000 Pa.
func TestUnitFactors(t *testing.T) {
	const cmH2OPa = 98.0665 // NIST SP 811 B.8
	tests := []struct {
		col, unit string
		value     float64 // in that unit
		want      float64 // in internal units
	}{
		{"paw", "cmH2O", 20, 20},
		{"paw", "mbar", 98.0665, 100},                // 98.0665 mbar = 9806.65 Pa = 100 cmH2O
		{"paw", "hPa", 1, 100 / cmH2OPa},             // 1 hPa = 100 Pa
		{"paw", "kPa", 2.941995, 2941.995 / cmH2OPa}, // 30 cmH2O
		{"paw", "KPA", 1, 1000 / cmH2OPa},
		{"flow", "L/s", 1, 60},     // definition of the minute
		{"flow", "mL/s", 1000, 60}, // 1000 mL = 1 L
		{"t", "ms", 1500, 1.5},
		{"vol", "L", 0.5, 500},
	}
	for _, tc := range tests {
		f, err := UnitFactor(tc.col, tc.unit)
		if err != nil {
			t.Fatalf("%s %s: %v", tc.col, tc.unit, err)
		}
		if got := tc.value * f; !near(got, tc.want, 1e-9*math.Abs(tc.want)) {
			t.Errorf("%g %s = %.12g, want %.12g", tc.value, tc.unit, got, tc.want)
		}
	}
	// Treating mbar as cmH2O is a 1.9 % error (REFERENCES.md, from NIST SP 811).
	if f, _ := UnitFactor("paw", "mbar"); !near((1-1/f)*100, 1.93, 0.01) {
		t.Errorf("mbar factor %v: expected a 1.9 %% difference from cmH2O", f)
	}
	if _, err := UnitFactor("paw", "psi"); err == nil {
		t.Error("psi accepted")
	}
}

func TestBadLinesCountedByCause(t *testing.T) {
	long := strings.Repeat("1", MaxLineBytes+10)
	input := strings.Join([]string{
		"t,paw,flow",
		"0.00,5,0",
		"garbage here",        // field count (one field with the delimiter detected as comma)
		"0.01,abc,0",          // not a number
		"0.02,NaN,0",          // not finite
		"0.03,5,Inf",          // not finite
		"0.04,5,1e999",        // not finite (overflow)
		"0.05,200,0",          // paw out of range
		"0.06,5,-700",         // flow out of range
		"0.07,5,0,9",          // field count
		long,                  // too long
		"0.08,5,0",            // good
		"0.05,5,0",            // time backwards
		"0.08,5,0",            // time not later
		"0.09,5,0",            // good
		"",                    // blank: not bad
		"0.10,5,",             // empty field: not a number
		"# breathd clock zzz", // bad directive
		"0.11,5,0",            // good
	}, "\n") + "\n"
	got, c, err := decodeAll(t, input, Format{})
	if err != nil {
		t.Fatal(err)
	}
	wantBad := [NumCauses]int64{
		CauseTooLong: 1, CauseFieldCount: 2, CauseNotNumber: 2, CauseNotFinite: 3,
		CauseOutOfRange: 2, CauseTimeBackwards: 2, CauseBadDirective: 1,
	}
	if c.Bad != wantBad {
		t.Errorf("bad = %v, want %v", c.Bad, wantBad)
	}
	const causes = "bad_directive 1, field_count 2, not_finite 3, not_number 2, out_of_range 2, time_backwards 2, too_long 1"
	if got := c.BadCauses(); got != causes {
		t.Errorf("BadCauses() = %q", got)
	}
	if len(got) != 4 || c.Samples != 4 {
		t.Fatalf("got %d good samples (%d counted), want 4", len(got), c.Samples)
	}
	if got[3].T != 0.11 {
		t.Errorf("last sample %+v", got[3])
	}
}

func TestLineErrorPosition(t *testing.T) {
	d, _ := NewDecoder(strings.NewReader("t,paw,flow\n0,5,0\n0.01,x,0\n"), Format{})
	var s Sample
	d.Decode(&s)
	err := d.Decode(&s)
	var le *LineError
	if !errors.As(err, &le) || le.Line != 3 || le.Field != 1 || le.Cause != CauseNotNumber {
		t.Fatalf("err = %v", err)
	}
	if !errors.Is(err, ErrBadLine) || err.Error() != "line 3 field 2: not_number" {
		t.Errorf("error %q does not unwrap to ErrBadLine or reads wrong", err)
	}
}

func TestTooLongAcrossBuffer(t *testing.T) {
	// A line longer than the read buffer is discarded whole.
	huge := strings.Repeat("9", 3*readBufBytes)
	input := "t,paw,flow\n0,5,0\n" + huge + "\n0.01,5,0\n" + huge // last one without newline
	got, c, err := decodeAll(t, input, Format{})
	if err != nil {
		t.Fatal(err)
	}
	if c.Bad[CauseTooLong] != 2 || len(got) != 2 {
		t.Errorf("too long %d, samples %d", c.Bad[CauseTooLong], len(got))
	}
}

func TestLineLimitExact(t *testing.T) {
	// A line of exactly MaxLineBytes (plus CR) is decoded; one byte more is not.
	pad := func(n int) string {
		s := "0.01,5,0"
		return s[:5] + strings.Repeat("0", n-len(s)) + s[5:]
	}
	ok := pad(MaxLineBytes)
	over := pad(MaxLineBytes + 1)
	_, c, _ := decodeAll(t, "t,paw,flow\n0,5,0\n"+ok+"\r\n", Format{})
	if c.Samples != 2 {
		t.Errorf("%d-byte line rejected: %v", len(ok), c.Bad)
	}
	_, c, _ = decodeAll(t, "t,paw,flow\n0,5,0\n"+over+"\n", Format{})
	if c.Bad[CauseTooLong] != 1 {
		t.Errorf("%d-byte line accepted", len(over))
	}
}

func TestGapsAndResync(t *testing.T) {
	input := "t,paw,flow\n0,5,0\n0.01,5,0\n0.6,5,0\n0.61,5,0\n" +
		// the device clock resets: five increasing lines before 0.61
		"0.00,5,0\n0.01,5,0\n0.02,5,0\n0.03,5,0\n0.04,5,0\n0.05,5,0\n"
	got, c, err := decodeAll(t, input, Format{})
	if err != nil {
		t.Fatal(err)
	}
	if c.Gaps != 2 || c.Resyncs != 1 || c.Bad[CauseTimeBackwards] != 4 {
		t.Fatalf("gaps %d resyncs %d backwards %d", c.Gaps, c.Resyncs, c.Bad[CauseTimeBackwards])
	}
	if !got[2].Gap || got[2].T != 0.6 || !got[4].Gap || got[4].T != 0.04 || got[5].Gap {
		t.Errorf("samples %+v", got)
	}
	// a custom gap limit
	_, c, _ = decodeAll(t, "0,5,0\n0.3,5,0\n", Format{GapLimit: 200 * time.Millisecond})
	if c.Gaps != 1 {
		t.Errorf("gap limit 0.2 s: %d gaps", c.Gaps)
	}
}

func TestRateIndexKeepsBadSlots(t *testing.T) {
	got, _, _ := decodeAll(t, "5,0\nx,0\n5,0\n", Format{Columns: []string{"paw", "flow"}, RateHz: 50})
	if len(got) != 2 || got[1].T != 0.04 {
		t.Errorf("samples %+v", got)
	}
}

func TestFormatErrors(t *testing.T) {
	for _, tc := range []struct{ input string }{
		{"paw,flow\n5,0\n"}, // no t, no rate
	} {
		_, _, err := decodeAll(t, tc.input, Format{})
		var fe *FormatError
		if !errors.As(err, &fe) {
			t.Errorf("%q: err = %v, want a FormatError", tc.input, err)
		}
	}
	for _, input := range []string{"t,paw,volume\n0,5,0\n", "t,paw,paw,flow\n0,5,5,0\n"} {
		_, c, err := decodeAll(t, input, Format{})
		if err != nil || c.Bad[CauseBadHeader] != 1 {
			t.Errorf("%q: err %v, bad %v: want one bad header", input, err, c.Bad)
		}
	}
	bad := []Format{
		{Delimiter: "pipe"}, {Units: map[string]string{"paw": "psi"}}, {FlowSign: 2},
		{Columns: []string{"t", "paw"}}, {Columns: []string{"paw", "flow"}}, {RateHz: -1},
	}
	for _, f := range bad {
		if _, err := NewDecoder(strings.NewReader(""), f); err == nil {
			t.Errorf("format %+v accepted", f)
		}
	}
}

func TestVolColumn(t *testing.T) {
	got, _, _ := decodeAll(t, "t,paw,flow,vol\n0,5,0,0.25\n", Format{Units: map[string]string{"vol": "L"}})
	if len(got) != 1 || got[0].Vol != 250 {
		t.Fatalf("%+v", got)
	}
	got, _, _ = decodeAll(t, "0,5,0\n", Format{})
	if !math.IsNaN(got[0].Vol) {
		t.Errorf("vol without a column = %v, want NaN", got[0].Vol)
	}
}

func TestClockDirective(t *testing.T) {
	input := "# breathd clock 2026-12-01T08:00:00Z\nt,paw,flow\n10,5,0\n12.5,5,0\n"
	d, _ := NewDecoder(strings.NewReader(input), Format{})
	var s Sample
	d.Decode(&s)
	w, ok := d.Wall(s.T + 2.5)
	if !ok || !w.Equal(time.Date(2026, 12, 1, 8, 0, 2, 5e8, time.UTC)) {
		t.Errorf("wall = %v %v", w, ok)
	}
}

func TestDirectiveRoundTrip(t *testing.T) {
	f := Format{Columns: []string{"paw", "flow"}, Delimiter: "tab", RateHz: 50,
		Units: map[string]string{"paw": "mbar", "flow": "L/s"}, FlowSign: -1, GapLimit: time.Second}
	input := "# " + f.Directive() + "\n5\t1\n6\t-1\n"
	got, c, err := decodeAll(t, input, Format{})
	if err != nil || c.BadTotal() != 0 || len(got) != 2 {
		t.Fatalf("%v %v %d", err, c.Bad, len(got))
	}
	if !near(got[1].Paw, 6*100/98.0665, 1e-12) || got[1].Flow != 60 || got[1].T != 0.02 {
		t.Errorf("%+v", got[1])
	}
	// flags win over the directive
	got, _, _ = decodeAll(t, input, Format{FlowSign: 1})
	if got[1].Flow != -60 {
		t.Errorf("flow sign from flags ignored: %+v", got[1])
	}
}

func TestReaders(t *testing.T) {
	input := "t,paw,flow\n0,5,0\n0.01,5.9,42.5\n0.02,6,40\n"
	for name, r := range map[string]io.Reader{
		"one byte": iotest.OneByteReader(strings.NewReader(input)),
		"half":     iotest.HalfReader(strings.NewReader(input)),
		"data+EOF": iotest.DataErrReader(strings.NewReader(input)),
		"time out": iotest.TimeoutReader(strings.NewReader(input)),
	} {
		d, _ := NewDecoder(r, Format{})
		got, _, err := drain(d)
		if name == "time out" {
			if !errors.Is(err, iotest.ErrTimeout) {
				t.Errorf("%s: err = %v, want the reader's error", name, err)
			}
			continue
		}
		if err != nil || len(got) != 3 {
			t.Errorf("%s: %d samples, err %v", name, len(got), err)
		}
	}
}

func TestDecoderFormatResolved(t *testing.T) {
	d, _ := NewDecoder(strings.NewReader("flow;paw;t\n0;5;0\n"), Format{Units: map[string]string{"paw": "mbar"}})
	d.Decode(new(Sample))
	f := d.Format()
	if strings.Join(f.Columns, ",") != "flow,paw,t" || f.Delimiter != "semicolon" || f.Units["paw"] != "mbar" {
		t.Errorf("resolved format %+v", f)
	}
}

// TestParseNumberAgreesWithStrconv: strconv.ParseFloat is the reference.
func TestParseNumberAgreesWithStrconv(t *testing.T) {
	inputs := []string{"0", "-0", "+1", "1.", ".5", "0.1", "123.456", "-42.125", "1e3", "1E-3", "2.5e+2",
		"999999999999999", "9999999999999999", "1234567890123456789", "0.000000000000000000000001",
		"1e22", "1e23", "1e-22", "1e-23", "0x1p-2", "inf", "-Infinity", "nan", "1_000", "", ".", "e5",
		"1e", "--1", "1.2.3", "00012.5000", "4.9e-324", "1.7976931348623157e308", "1e400", "30.00"}
	for _, in := range inputs {
		checkAgainstStrconv(t, in)
	}
}

func checkAgainstStrconv(t *testing.T, in string) {
	t.Helper()
	got, kind := parseNumber([]byte(in))
	want, err := strconv.ParseFloat(in, 64)
	switch {
	case err != nil && errors.Is(err, strconv.ErrRange):
		if kind != numNotFinite {
			t.Errorf("%q: kind %d, want not finite", in, kind)
		}
	case err != nil:
		if kind != numSyntax {
			t.Errorf("%q: kind %d, want syntax error", in, kind)
		}
	case math.IsNaN(want) || math.IsInf(want, 0):
		if kind != numNotFinite {
			t.Errorf("%q: kind %d, want not finite", in, kind)
		}
	default:
		if kind != numOK || math.Float64bits(got) != math.Float64bits(want) {
			t.Errorf("%q: got %v (kind %d), strconv says %v", in, got, kind, want)
		}
	}
}

func FuzzParseNumber(f *testing.F) {
	for _, s := range []string{"1.5", "-0.25", "1e5", "nan", "12345678901234567", ".e"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, in string) { checkAgainstStrconv(t, in) })
}

// FuzzDecode: no input panics, every line is accounted for, and every
// sample is finite and in range.
func FuzzDecode(f *testing.F) {
	f.Add([]byte("t,paw,flow\n0,5,0\n0.01,6,30\n"), "")
	f.Add([]byte("# breathd format columns=paw,flow rate_hz=50\n1 2\n3 4\n"), "")
	f.Add([]byte("0;1;2\r\n0.1;nan;3\r\n"), "auto")
	// a port opened mid-line: a lone number first (issue 16)
	f.Add([]byte("2.5\n0.00,5.0,0.0\n0.01,5.1,1.0\n"), "")
	f.Add([]byte("-29.35\n0.00,5.0,0.0\n"), "auto")
	// a header of 40 columns, three of them known
	f.Add([]byte(forty()+"\n"+strings.Repeat("1,", 39)+"2\n"), "")
	// NUL bytes in and between lines
	f.Add([]byte("t,paw,flow\n0,5\x00,0\n\x00\x00\n0.01,6,30\x00\n"), "")
	f.Fuzz(func(t *testing.T, data []byte, delim string) {
		if _, err := parseDelimiter(delim); err != nil {
			delim = ""
		}
		d, err := NewDecoder(bytes.NewReader(data), Format{Delimiter: delim})
		if err != nil {
			t.Fatal(err)
		}
		n := 0
		for ; n <= len(data)+1; n++ {
			var s Sample
			err := d.Decode(&s)
			if err != nil {
				var le *LineError
				if errors.As(err, &le) {
					continue
				}
				break
			}
			if math.IsNaN(s.T) || math.IsInf(s.T, 0) || s.Paw < PawMin || s.Paw > PawMax || math.Abs(s.Flow) > FlowMax {
				t.Fatalf("implausible sample %+v", s)
			}
		}
		if n > len(data)+1 {
			t.Fatal("decoder did not end")
		}
		c := d.Counts()
		if c.Samples+c.BadTotal() > c.Lines {
			t.Fatalf("counts %+v exceed lines", c)
		}
		// the one-pass fast path and the general path agree bit for bit
		fast, _ := NewDecoder(bytes.NewReader(data), Format{Delimiter: delim})
		slow, _ := NewDecoder(bytes.NewReader(data), Format{Delimiter: delim})
		slow.noFast = true
		a, ca, ea := drain(fast)
		b, cb, eb := drain(slow)
		if (ea == nil) != (eb == nil) || len(a) != len(b) || ca.Bad != cb.Bad {
			t.Fatalf("fast path %d samples %v %v, general path %d samples %v %v", len(a), ca.Bad, ea, len(b), cb.Bad, eb)
		}
		sameSamples(t, "one-pass fast path against the general path", a, b)
		// and so does the batch path, on the input repeated until it
		// fills a batch window many times over
		rep := bytes.Repeat(data, 1+4*batchWindow/(len(data)+1))
		slow, _ = NewDecoder(bytes.NewReader(rep), Format{Delimiter: delim})
		slow.noFast = true
		batch, _ := NewDecoder(bytes.NewReader(rep), Format{Delimiter: delim})
		a, ca, ea = drainBatch(batch, 7)
		b, cb, eb = drain(slow)
		if (ea == nil) != (eb == nil) || ca != cb {
			t.Fatalf("batch path %d samples %+v %v, general path %d samples %+v %v", len(a), ca, ea, len(b), cb, eb)
		}
		sameSamples(t, "batch path against the general path", a, b)
	})
}

// dayStream is 24 h at 100 Hz (8.64 M lines) of t,paw,flow with the
// digits a ventilator prints. Generated once per test binary.
var dayStream = sync.OnceValue(func() []byte { return GenerateLines(24*3600*100, 100) })

// GenerateLines writes n lines of a plain square-wave breathing pattern at
// rateHz, for benchmarks only (the lung simulator makes realistic streams).
func GenerateLines(n int, rateHz float64) []byte {
	b := make([]byte, 0, n*20)
	b = append(b, "t,paw,flow\n"...)
	for i := 0; i < n; i++ {
		t := float64(i) / rateHz
		ph := math.Mod(t, 3)
		paw, flow := 5.0+0.01*float64(i%7), -20*math.Exp(-(ph-1)/0.4)
		if ph < 1 {
			paw, flow = 12+15*ph, 30.0
		}
		b = strconv.AppendFloat(b, t, 'f', 2, 64)
		b = append(b, ',')
		b = strconv.AppendFloat(b, paw, 'f', 2, 64)
		b = append(b, ',')
		b = strconv.AppendFloat(b, flow, 'f', 2, 64)
		b = append(b, '\n')
	}
	return b
}

// BenchmarkDecode decodes the day-long stream the way the device loop
// does, in batches (DecodeBatch); one op is one line, so allocs/op is the
// per-line allocation.
func BenchmarkDecode(b *testing.B) {
	data := dayStream()
	r := bytes.NewReader(data)
	d, _ := NewDecoder(r, Format{})
	var s [4096]Sample
	b.SetBytes(int64(len(data)) / (24 * 3600 * 100))
	b.ReportAllocs()
	b.ResetTimer()
	for left := b.N; left > 0; {
		n, err := d.DecodeBatch(s[:min(left, len(s))])
		left -= n
		if err == io.EOF {
			r.Reset(data)
			d.Reset(r)
		}
	}
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "lines/s")
}

// BenchmarkDecodeLine decodes the same stream one line per call (Decode).
func BenchmarkDecodeLine(b *testing.B) {
	data := dayStream()
	r := bytes.NewReader(data)
	d, _ := NewDecoder(r, Format{})
	var s Sample
	b.SetBytes(int64(len(data)) / (24 * 3600 * 100))
	b.ReportAllocs()
	b.ResetTimer()
	for range b.N {
		if err := d.Decode(&s); err == io.EOF {
			r.Reset(data)
			d.Reset(r)
		}
	}
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "lines/s")
}

// BenchmarkDecodeBaseline is the plain way: bufio.Scanner, split, and
// strconv.ParseFloat, on the same lines.
func BenchmarkDecodeBaseline(b *testing.B) {
	data := dayStream()
	sc := bufio.NewScanner(bytes.NewReader(data))
	var sink float64
	b.SetBytes(int64(len(data)) / (24 * 3600 * 100))
	b.ReportAllocs()
	b.ResetTimer()
	for range b.N {
		if !sc.Scan() {
			sc = bufio.NewScanner(bytes.NewReader(data))
			continue
		}
		rest, more := sc.Bytes(), true
		for more {
			var f []byte
			f, rest, more = bytes.Cut(rest, []byte{','})
			if v, err := strconv.ParseFloat(string(f), 64); err == nil {
				sink += v
			}
		}
	}
	_ = sink
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "lines/s")
}

// liveSource hands out two lines per Read, like a serial port delivering
// a burst, and fails the test if the decoder reads again while a line it
// was given has not been returned yet (on a real port that read blocks).
type liveSource struct {
	t     *testing.T
	lines []string
	sent  int
	taken *int
}

func (r *liveSource) Read(p []byte) (int, error) {
	if *r.taken < r.sent {
		r.t.Fatalf("decoder read again with line %d of %d waiting", *r.taken+1, r.sent)
	}
	if r.sent == len(r.lines) {
		return 0, io.EOF
	}
	n := copy(p, r.lines[r.sent]+r.lines[r.sent+1])
	r.sent += 2
	return n, nil
}

// TestNoReadWhileLineWaits: a decoded line is returned before the decoder
// reads again, so a live stream is never delayed by a line.
func TestNoReadWhileLineWaits(t *testing.T) {
	taken := 0
	src := &liveSource{t: t, taken: &taken}
	for i := 0; i < 100; i++ {
		src.lines = append(src.lines, strconv.FormatFloat(float64(i)/100, 'f', 2, 64)+",5.0,0.0\n")
	}
	d, _ := NewDecoder(src, Format{})
	var s Sample
	for d.Decode(&s) == nil {
		taken++
	}
	if taken != 100 {
		t.Errorf("decoded %d lines", taken)
	}
}

// TestNoiseBeforeFirstLine: a live port opened mid-stream may deliver half
// a line or noise first; that is a bad line, not a header that stops the
// device.
func TestNoiseBeforeFirstLine(t *testing.T) {
	for _, first := range []string{"\x00\x17\xff,garbage,zz", "0,5.2", "aw,flow", "#!ignored comment"} {
		got, c, err := decodeAll(t, first+"\n0.00,5.0,0.0\n0.01,5.1,1.0\n", Format{})
		if err != nil || len(got) != 2 {
			t.Errorf("%q first: %d samples, err %v, bad %v", first, len(got), err, c.Bad)
		}
	}
	// a header that names some columns but not paw and flow is a bad line
	// of its own cause, and says why; the data then has the default columns
	d, _ := NewDecoder(strings.NewReader("t,pressure,volume\n0,5,0\n"), Format{})
	got, c, _ := drain(d)
	if c.Bad[CauseBadHeader] != 1 || len(got) != 1 || d.HeaderError() == nil ||
		!strings.Contains(d.HeaderError().Error(), "paw and flow are required") {
		t.Errorf("bad header: %v %v %v", c.Bad, got, d.HeaderError())
	}
}

// forty is a header of 40 columns: t, paw and flow among others.
func forty() string {
	names := []string{"t", "paw", "flow"}
	for i := len(names); i < 40; i++ {
		names = append(names, "extra"+strconv.Itoa(i))
	}
	return strings.Join(names, ",")
}
