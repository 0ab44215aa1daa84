package mechanics

import (
	"math"
	"math/rand/v2"
	"slices"
	"testing"
	"time"

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
// (least squares; common practice).
func TestWindowSlopes(t *testing.T) {
	w, _ := NewWindow(WindowConfig{})
	var tr *Trend
	for i := 0; i < 30; i++ {
		ts := float64(i) * 4
		c := 50 - 36*ts/3600 // −36 mL/cmH2O per hour
		b := Breath{TStart: ts, TEnd: ts + 4, VTi: 500, PPlat: 5 + 500/c, PEEP: 5, Cstat: c, DP: 500 / c}
		w.Add(&b)
		tr = w.Trend()
	}
	if math.Abs(tr.CSlope+36) > 1e-6 || tr.DPSlope <= 0 {
		t.Errorf("slopes %v %v", tr.CSlope, tr.DPSlope)
	}
}

// attributionOf runs a scenario through detection and the window and
// returns the trend at the time given.
func attributionOf(t *testing.T, sc Scenario, at float64) Attribution {
	t.Helper()
	sc.Defaults()
	if err := sc.Validate(); err != nil {
		t.Fatal(err)
	}
	sim := NewSim(sc, nil)
	seg, _ := NewSegmenter(Config{}, sc.RateHz)
	w, _ := NewWindow(WindowConfig{})
	var last Attribution
	var s SimSample
	for sim.Next(&s) && s.T < at {
		if b := seg.Add(s.T, s.Paw, s.Flow, false); b != nil {
			w.Add(b)
			last = w.Trend().Rise
		}
	}
	return last
}

// TestRiseAttribution: the peak pressure is the resistive part (R × flow,
// the peak–plateau gap) plus the elastic part (VT/C, plateau above PEEP).
// A bronchospasm raises the gap past 10 cmH2O with the plateau flat; a
// stiffening lung raises plateau and peak with the gap flat (physiology
// teaching; common practice, no source).
func TestRiseAttribution(t *testing.T) {
	noise := Sensor{PawNoise: 0.2, FlowNoise: 0.5}
	spasm := Scenario{Seed: 1, RateHz: 50, Duration: 60 * time.Minute, Sensor: noise,
		Settings: Settings{Mode: ModeVC, R: 10, C: 45, PEEP: 6, RR: 14, VT: 430, Ti: 1.2, Pause: 0.3},
		Timeline: []Change{{At: 36 * time.Minute, Ramp: 3 * time.Minute, Set: map[string]float64{"r": 30}}}}
	a := attributionOf(t, spasm, 44*60)
	t.Logf("bronchospasm: %+v", a)
	// the slower exhalation leaves about 1 cmH2O of intrinsic PEEP
	// (τ = 30·0.045 = 1.35 s, Te 3.1 s: e^(−2.3) of the 9.5 cmH2O), which
	// shows as a small elastic rise
	if a.Cause != RiseResistive || a.Method != "plateau" || a.ResistiveRise < 8 || math.Abs(a.ElasticRise) > 1.5 {
		t.Errorf("bronchospasm attributed %+v", a)
	}
	stiff := Scenario{Seed: 2, RateHz: 50, Duration: 60 * time.Minute, Sensor: noise,
		Settings: Settings{Mode: ModeVC, R: 10, C: 50, PEEP: 8, RR: 18, VT: 480, Ti: 1.0, Pause: 0.3},
		Timeline: []Change{{At: 35 * time.Minute, Ramp: 5 * time.Minute, Set: map[string]float64{"c": 28}}}}
	a = attributionOf(t, stiff, 46*60)
	t.Logf("stiffening: %+v", a)
	if a.Cause != RiseElastic || a.ElasticRise < 5 || math.Abs(a.ResistiveRise) > 1 {
		t.Errorf("stiffening attributed %+v", a)
	}
	// without pauses the fitted R and C decide
	stiff.Settings.Pause = 0
	a = attributionOf(t, stiff, 46*60)
	t.Logf("stiffening without pauses: %+v", a)
	if a.Cause != RiseElastic || a.Method != "fit" {
		t.Errorf("stiffening without pauses attributed %+v", a)
	}
	steady := stiff
	steady.Timeline = nil
	if a = attributionOf(t, steady, 46*60); a.Cause != RiseNone {
		t.Errorf("steady attributed %+v", a)
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

// TestNetFlowShowsDrift: a flow sensor drifting by +3 L/min shows as a net
// inward flow of about 3 L/min over the window (the drift adds 3 L/min ×
// the breath's duration to vti − vte; common practice, no source).
func TestNetFlowShowsDrift(t *testing.T) {
	sc := Scenario{Seed: 2, RateHz: 100, Duration: 5 * time.Minute,
		Settings: Settings{Mode: ModeVC, R: 10, C: 50, PEEP: 5, RR: 15, VT: 450, Ti: 1.2, Pause: 0.3},
		Sensor:   Sensor{PawNoise: 0.2, FlowNoise: 0.5, FlowDrift: 36}} // 36 L/min per hour: 3 L/min at 5 min
	sc.Defaults()
	sim := NewSim(sc, nil)
	seg, _ := NewSegmenter(Config{}, 100)
	w, _ := NewWindow(WindowConfig{})
	var s SimSample
	for sim.Next(&s) {
		if b := seg.Add(s.T, s.Paw, s.Flow, false); b != nil {
			w.Add(b)
		}
	}
	// the window holds the last 20 breaths (about 80 s): the drift then is 2.2–3 L/min
	if nf := w.Trend().NetFlow; nf < 2 || nf > 3.2 {
		t.Errorf("net flow %.2f L/min, want the drift of about 2.6", nf)
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
	sc := Scenario{Seed: 9, RateHz: 100, Duration: time.Hour,
		Settings: Settings{Mode: ModeVC, R: 10, C: 50, PEEP: 5, RR: 15, VT: 450, Ti: 1.2, Pause: 0.3},
		Sensor:   Sensor{PawNoise: 0.2, FlowNoise: 0.5},
		Timeline: []Change{{At: 20 * time.Minute, Ramp: 10 * time.Minute, Set: map[string]float64{"rr": 25}}}}
	pairs, _, _ := runSim(t, sc, Config{})
	w, _ := NewWindow(WindowConfig{Breaths: 20, Span: 60})
	for i, p := range pairs {
		b := p.got
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
