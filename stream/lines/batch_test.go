package lines

import (
	"bytes"
	"errors"
	"io"
	"math"
	"testing"
)

// drainBatch is drain with DecodeBatch in batches of n.
func drainBatch(d *Decoder, n int) ([]Sample, Counts, error) {
	var out []Sample
	buf := make([]Sample, n)
	for {
		k, err := d.DecodeBatch(buf)
		out = append(out, buf[:k]...)
		var le *LineError
		switch {
		case err == nil:
			if k == 0 {
				return out, d.Counts(), errors.New("DecodeBatch returned nothing and no error")
			}
		case errors.As(err, &le):
		case errors.Is(err, io.EOF):
			return out, d.Counts(), nil
		default:
			return out, d.Counts(), err
		}
	}
}

// sameSamples fails unless a and b are the same bit for bit.
func sameSamples(t *testing.T, what string, a, b []Sample) {
	t.Helper()
	if len(a) != len(b) {
		t.Fatalf("%s: %d samples against %d", what, len(a), len(b))
	}
	for i := range a {
		if math.Float64bits(a[i].T) != math.Float64bits(b[i].T) || math.Float64bits(a[i].Paw) != math.Float64bits(b[i].Paw) ||
			math.Float64bits(a[i].Flow) != math.Float64bits(b[i].Flow) || math.Float64bits(a[i].Vol) != math.Float64bits(b[i].Vol) ||
			a[i].Gap != b[i].Gap {
			t.Fatalf("%s: sample %d: %+v against %+v", what, i, a[i], b[i])
		}
	}
}

func TestBatchSameAsGeneral(t *testing.T) {
	inputs := map[string][]byte{
		"day stream": GenerateLines(100000, 100),
		"mixed": bytes.Repeat([]byte("t;paw;flow;vol;x\r\n0.5;5.1;-0.0;1;a\r\n0.51;+5.9;42.5;2;bb\r\n"+
			"0.52 ;  6; .5 ;3;c\r\n0.53;7.;-12345.6;4;d\r\n0.54;1e1;1;5;e\r\n0.55;200;1;1;f\r\n0.50;1;1;1;g\r\n"+
			"# a comment\r\n1000000.125;7;8;9;h\r\n1000000.126;7;8;9\r\n99999999.000001;1;2;3;i\r\n"), 200),
		"spaces": bytes.Repeat([]byte("0.0 5 0\n0.01\t6 \t 30 \n0.02   7 -30\n0.03 8 1.25 \n"), 500),
	}
	for name, data := range inputs {
		for _, n := range []int{1, 7, 4096} {
			slow, _ := NewDecoder(bytes.NewReader(data), Format{})
			slow.noFast = true
			a, ca, ea := drain(slow)
			d, _ := NewDecoder(bytes.NewReader(data), Format{})
			b, cb, eb := drainBatch(d, n)
			if ea != nil || eb != nil || ca != cb {
				t.Fatalf("%s/%d: %v, %v; counts %+v against %+v", name, n, ea, eb, ca, cb)
			}
			sameSamples(t, name, a, b)
		}
	}
}
