package plot

import (
	"errors"
	"strings"
	"testing"
)

// TestCheck: the picture's kind and the strip's length are checked before
// any work. Common practice, no source.
func TestCheck(t *testing.T) {
	for _, c := range []struct {
		out  string
		span float64
		ok   bool
	}{{"a.png", 30, true}, {"a.SVG", 3600, true}, {"a.gif", 30, false}, {"a", 30, false}, {"a.png", 0, false}, {"a.png", 3601, false}} {
		err := Check(c.out, c.span)
		if (err == nil) != c.ok {
			t.Errorf("%s %g: %v", c.out, c.span, err)
		}
	}
	if err := Check("a.gif", 30); !errors.Is(err, ErrKind) {
		t.Errorf("gif: %v", err)
	}
}

// TestRoundTicks: ticks fall on 1, 2 or 5 times a power of ten and carry
// no more decimals than their step (common practice, no source).
func TestRoundTicks(t *testing.T) {
	for _, c := range []struct {
		lo, hi float64
		want   string
	}{
		{0.06, 24.9, "5 10 15 20"},
		{-52, 38, "-40 -20 0 20"},
		{0.02, 3, "0.5 1.0 1.5 2.0 2.5 3.0"},
		{9.3, 10.4, "9.4 9.6 9.8 10.0 10.2 10.4"},
		{-3, 460, "0 100 200 300 400"},
	} {
		var got []string
		for _, tk := range (roundTicks{}).Ticks(c.lo, c.hi) {
			if tk.Label != "" {
				got = append(got, tk.Label)
			}
		}
		if g := strings.Join(got, " "); g != c.want {
			t.Errorf("%g–%g: %q, want %q", c.lo, c.hi, g, c.want)
		}
	}
}
