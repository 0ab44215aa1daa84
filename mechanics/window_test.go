package mechanics

import (
	"math"
	"math/rand/v2"
	"slices"
	"testing"

	"gonum.org/v1/gonum/stat"
)

func TestWindowStatsAndLimits(t *testing.T) {
	w, err := NewWindow(WindowConfig{Breaths: 5, Span: 100})
	if err != nil {
		t.Fatal(err)
	}
	var tr *Trend
	for i, v := range []float64{9, 1, 5, 3, 7, 100} {
		b := Breath{TStart: float64(i) * 10, TEnd: float64(i)*10 + 10, VTi: v, PPlat: nan}
		w.Add(&b)
		tr = w.Trend()
	}
	// the last five breaths: 1 3 5 7 100 → median 5, quartiles 3 and 7
	// (linear interpolation between order statistics; common practice)
	st, _ := tr.Stat("vti")
	if st.N != 5 || st.Median != 5 || st.Q1 != 3 || st.Q3 != 7 || st.IQR() != 4 {
		t.Errorf("vti %+v", st)
	}
	if st, _ := tr.Stat("pplat"); st.N != 0 || !math.IsNaN(st.Median) {
		t.Errorf("pplat without values %+v", st)
	}
	// older than the span drops out even when the ring has room
	b := Breath{TStart: 500, TEnd: 510, VTi: 42}
	w.Add(&b)
	tr = w.Trend()
	if st, _ := tr.Stat("vti"); st.N != 1 || st.Median != 42 {
		t.Errorf("after a long pause %+v", st)
	}
}

// TestWindowSlopes: a compliance falling by a known rate gives that slope
// (least squares; common practice), over the last 15 minutes of breaths;
// before 10 minutes of breaths there is no slope.
func TestWindowSlopes(t *testing.T) {
	w, _ := NewWindow(WindowConfig{})
	for i := 0; i < 300; i++ { // 20 min
		ts := float64(i) * 4
		c := 50 - 36*ts/3600 // −36 mL/cmH2O per hour
		b := Breath{TStart: ts, TEnd: ts + 4, VTi: 500, PPlat: 5 + 500/c, PEEP: 5, Cstat: c, DP: 500 / c}
		w.Add(&b)
		tr := w.Trend()
		switch early := ts < 600; {
		case early && (!math.IsNaN(tr.CSlope) || !math.IsNaN(tr.DPSlope)):
			t.Fatalf("a slope after %.0f s of breaths: %v %v", ts, tr.CSlope, tr.DPSlope)
		case !early && (!(math.Abs(tr.CSlope+36) < 1e-6) || !(tr.DPSlope > 0)):
			t.Fatalf("slopes after %.0f s: %v %v", ts, tr.CSlope, tr.DPSlope)
		}
	}
}

func TestWindowDoesNotAllocate(t *testing.T) {
	w, _ := NewWindow(WindowConfig{})
	b := Breath{TStart: 0, TEnd: 4, VTi: 500, PPlat: 20, PEEP: 5, PPeak: 30, FitC: 33, Cstat: 33}
	for i := 0; i < 3000; i++ {
		b.TStart, b.TEnd = float64(i)*4, float64(i)*4+4
		w.Add(&b)
	}
	allocs := testing.AllocsPerRun(100, func() {
		b.TStart += 4
		b.TEnd += 4
		w.Add(&b)
		w.Trend()
	})
	if allocs != 0 {
		t.Errorf("%v allocations per Add", allocs)
	}
}

// TestMedianOfAgainstSort: selection gives the median a full sort gives
// (gonum's stat.Quantile on the sorted values, the empirical median with
// the two middle values averaged, as the reference library), on random
// sets of every size to 200, ties included.
func TestMedianOfAgainstSort(t *testing.T) {
	rng := rand.New(rand.NewPCG(7, 8))
	for n := 1; n <= 200; n++ {
		for range 20 {
			x := make([]float64, n)
			for i := range x {
				x[i] = math.Round(rng.NormFloat64() * 5) // ties
			}
			s := slices.Clone(x)
			slices.Sort(s)
			want := s[(n-1)/2]
			if n%2 == 0 {
				want = (s[n/2-1] + s[n/2]) / 2
			}
			if lo := stat.Quantile(0.5, stat.Empirical, s, nil); n%2 == 1 && lo != want {
				t.Fatalf("n %d: gonum median %g, sorted middle %g", n, lo, want)
			}
			if got := medianOf(x); got != want {
				t.Fatalf("n %d: median %g, want %g", n, got, want)
			}
		}
	}
}

// TestSortedPartsAgainstSort: the window's medians kept by moving sorted
// lists one breath at a time are the medians of the window's breaths
// sorted afresh (a sort is the reference; common practice, no source),
// over an hour of breaths whose window also loses breaths by age.
func TestSortedPartsAgainstSort(t *testing.T) {
	// an hour of breaths whose rate rises from 15 to 25 a minute, values
	// wandering, a plateau on some, an unreliable fit on others
	rng := rand.New(rand.NewPCG(9, 10))
	w, _ := NewWindow(WindowConfig{Breaths: 20, Span: 60})
	ts := 0.0
	for i := range 1100 {
		period := 60 / (15 + 10*min(1, float64(i)/500))
		b := Breath{TStart: ts, TEnd: ts + period, VTi: 450 + 20*rng.NormFloat64(), PEEP: 5 + 0.1*rng.NormFloat64(),
			PPeak: 20 + rng.NormFloat64(), PPlat: nan, Cstat: nan, FitC: 50 + 3*rng.NormFloat64()}
		if i%3 == 0 {
			b.PPlat = 14 + 0.5*rng.NormFloat64()
			b.Cstat = b.VTi / (b.PPlat - b.PEEP)
		}
		if i%7 == 0 {
			b.Flags = FlagFitUnreliable
		}
		ts += period
		w.Add(&b)
		w.Trend()
		parts := w.windowParts(w.idx)
		for k, get := range partFields {
			var x []float64
			for _, q := range parts {
				if v := get(q); !math.IsNaN(v) {
					x = append(x, v)
				}
			}
			slices.Sort(x)
			want := math.NaN()
			if len(x) > 0 {
				want = quantile(x, 0.5)
			}
			got, n := w.cur.median(k)
			if n != len(x) || (got != want && !(math.IsNaN(got) && math.IsNaN(want))) {
				t.Fatalf("breath %d part %d: median %g of %d, sorted afresh %g of %d", i, k, got, n, want, len(x))
			}
		}
	}
}

// TestWindowLeavesOutDisownedValues: the rolling statistics take a value
// only from breaths whose flags do not disown it (Untrusted).
func TestWindowLeavesOutDisownedValues(t *testing.T) {
	w, _ := NewWindow(WindowConfig{Breaths: 10})
	for i, c := range []float64{40, 41, 90, 42, 95} {
		b := Breath{TStart: float64(i) * 4, TEnd: float64(i)*4 + 4, FitC: c, VTi: 500, PPlat: nan}
		if c > 50 {
			b.Flags = FlagFitUnreliable
		}
		w.Add(&b)
	}
	tr := w.Trend()
	if st, _ := tr.Stat("fit_c"); st.N != 3 || st.Median != 41 {
		t.Errorf("fit_c %+v: want the three reliable ones, median 41", st)
	}
	if st, _ := tr.Stat("vti"); st.N != 5 {
		t.Errorf("vti %+v: the volume is every breath's", st)
	}
}
