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
