package lines

import (
	"strconv"
	"strings"
	"testing"
)

// commaLines is n comma-separated data lines of t,paw,flow at 100 Hz.
func commaLines(n int) string {
	var b strings.Builder
	for i := range n {
		b.WriteString(strconv.FormatFloat(float64(i)/100, 'f', 2, 64) + ",5.0,1.0\n")
	}
	return b.String()
}

// TestMidLineStartDoesNotLockTheDelimiter: a port opened mid-line may
// deliver a lone number first; it cannot tell the delimiter, so it is a
// bad line and the comma lines after it decode. And when the delimiter
// was taken from a line that misled, a run of lines that disagree makes
// the decoder look again. (Issue 16, item 1.)
func TestMidLineStartDoesNotLockTheDelimiter(t *testing.T) {
	for _, first := range []string{"2.5", ".35", "-29.35"} {
		got, c, err := decodeAll(t, first+"\n"+commaLines(200), Format{})
		if err != nil || len(got) != 200 || c.BadTotal() != 1 {
			t.Errorf("first line %q: %d samples, bad %v, %v", first, len(got), c.Bad, err)
		}
	}
	// a first line with a space in it fixes the delimiter to spaces: the
	// comma lines then disagree, and after a few the decoder looks again
	got, c, _ := decodeAll(t, "9 1\n"+commaLines(200), Format{})
	if len(got) < 190 {
		t.Errorf("after a misleading first line: %d samples, bad %v", len(got), c.Bad)
	}
	// a header after noise is still a header
	got, _, _ = decodeAll(t, "2.5\nt,paw,flow\n"+commaLines(50), Format{})
	if len(got) != 50 {
		t.Errorf("header after a lone number: %d samples", len(got))
	}
}

// TestManyColumns: a header of any number of columns that fits a line
// names the ones breathd reads; the others are ignored (README). (Issue
// 16, item 2.)
func TestManyColumns(t *testing.T) {
	var b strings.Builder
	b.WriteString(forty() + "\n")
	for i := range 100 {
		b.WriteString(strconv.FormatFloat(float64(i)/100, 'f', 2, 64) + ",5.0,1.0" + strings.Repeat(",7", 37) + "\n")
	}
	got, c, err := decodeAll(t, b.String(), Format{})
	if err != nil || len(got) != 100 || c.BadTotal() != 0 {
		t.Errorf("40 columns: %d samples, bad %v, %v", len(got), c.Bad, err)
	}
}

// TestHeaderNamesWithUnits: the header names and units real devices and
// spreadsheets write are read as columns and units; a unit given on the
// command line wins. The factors are those of TestUnitFactors (1 cmH2O =
// 98.0665 Pa; 1 L/s = 60 L/min). (Issue 17.)
func TestHeaderNamesWithUnits(t *testing.T) {
	for _, c := range []struct {
		header, line string
		paw, flow    float64
		tt           float64
	}{
		{"Time [s];Paw [mbar];Flow [L/s]", "0.5;9.80665;0.5", 10, 30, 0.5},
		{"time_ms,pressure_cmH2O,flow_lpm", "500,10,30", 10, 30, 0.5},
		{"Time (ms)\tAirway pressure (kPa)\tFlow (mL/s)", "500\t0.980665\t500", 10, 30, 0.5},
		{"t,paw,flow", "0.5,10,30", 10, 30, 0.5},
	} {
		got, cnt, err := decodeAll(t, c.header+"\n"+c.line+"\n", Format{})
		if err != nil || len(got) != 1 {
			t.Errorf("%q: %d samples, bad %v, %v", c.header, len(got), cnt.Bad, err)
			continue
		}
		s := got[0]
		if !near(s.Paw, c.paw, 1e-9) || !near(s.Flow, c.flow, 1e-9) || !near(s.T, c.tt, 1e-9) {
			t.Errorf("%q: t %g paw %g flow %g", c.header, s.T, s.Paw, s.Flow)
		}
	}
	// the command line's unit wins over the header's
	got, _, _ := decodeAll(t, "t,Paw [mbar],flow\n0,5,0\n", Format{Units: map[string]string{"paw": "cmH2O"}})
	if len(got) != 1 || got[0].Paw != 5 {
		t.Errorf("--unit paw=cmH2O over a header in mbar: %+v", got)
	}
}

// TestDecimalCommaBOMAndUTF16: decimal commas with a semicolon delimiter
// are read; a UTF-8 byte-order mark is skipped; UTF-16 text and images
// are named in one error. (Issue 17.)
func TestDecimalCommaBOMAndUTF16(t *testing.T) {
	got, c, err := decodeAll(t, "t;paw;flow\n0,00;5,5;-12,25\n0,01;6,0;1,5\n", Format{})
	if err != nil || len(got) != 2 || got[0].Paw != 5.5 || got[0].Flow != -12.25 || got[1].T != 0.01 {
		t.Errorf("decimal comma: %+v, bad %v, %v", got, c.Bad, err)
	}
	got, c, err = decodeAll(t, "\xef\xbb\xbft,paw,flow\n0,5,0\n", Format{})
	if err != nil || len(got) != 1 || c.BadTotal() != 0 {
		t.Errorf("BOM: %+v, bad %v, %v", got, c.Bad, err)
	}
	utf16 := "\xff\xfet\x00,\x00p\x00a\x00w\x00\n\x00"
	if _, _, err := decodeAll(t, utf16, Format{}); err == nil || !strings.Contains(err.Error(), "UTF-16") {
		t.Errorf("UTF-16: %v", err)
	}
	if _, _, err := decodeAll(t, "\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR", Format{}); err == nil || !strings.Contains(err.Error(), "PNG image") {
		t.Errorf("PNG: %v", err)
	}
}

// TestHeaderUnitsInTheFormat: the format as decoded carries the header's
// units, so that a recording's later files (which have no header) read
// the same.
func TestHeaderUnitsInTheFormat(t *testing.T) {
	d, _ := NewDecoder(strings.NewReader("Time [ms];Paw [mbar];Flow [L/s]\n0;5;0\n"), Format{})
	var s Sample
	if err := d.Decode(&s); err != nil {
		t.Fatal(err)
	}
	f := d.Format()
	if f.Units["t"] != "ms" || f.Units["paw"] != "mbar" || f.Units["flow"] != "L/s" {
		t.Errorf("units %v", f.Units)
	}
	again, _, err := decodeAll(t, "# "+f.Directive()+"\n500;5;1\n", Format{})
	if err != nil || len(again) != 1 || again[0].T != 0.5 || again[0].Flow != 60 {
		t.Errorf("read back with %q: %+v, %v", f.Directive(), again, err)
	}
}
