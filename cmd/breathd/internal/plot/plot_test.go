package plot

import (
	"errors"
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
