package mechanics_test

import (
	"fmt"
	"math"
	"sort"
	"testing"
	"time"

	"breathd/mechanics"
	"breathd/mechanics/lungsim"
)

// matched pairs a simulated breath's truth with the breath breathd found.
type matched struct {
	truth lungsim.Truth
	got   mechanics.Breath
}

// runSim simulates sc through a Segmenter and pairs detected breaths with
// the truths whose start lies within 60 ms.
func runSim(t testing.TB, sc lungsim.Scenario, cfg mechanics.Config) (pairs []matched, truths []lungsim.Truth, found []mechanics.Breath) {
	t.Helper()
	sc.Defaults()
	if err := sc.Validate(); err != nil {
		t.Fatal(err)
	}
	sim := lungsim.NewSim(sc, func(tr lungsim.Truth) { truths = append(truths, tr) })
	seg, err := mechanics.NewSegmenter(cfg, sc.RateHz)
	if err != nil {
		t.Fatal(err)
	}
	var s lungsim.SimSample
	for sim.Next(&s) {
		// print to the sensor's digits, as the stream would carry them
		p := math.Round(s.Paw*100) / 100
		f := math.Round(s.Flow*100) / 100
		if b := seg.Add(s.T, p, f, false); b != nil {
			found = append(found, *b)
		}
	}
	j := 0
	for _, tr := range truths {
		for j < len(found) && found[j].TStart < tr.TStart-0.06 {
			j++
		}
		if j < len(found) && math.Abs(found[j].TStart-tr.TStart) <= 0.06 {
			pairs = append(pairs, matched{tr, found[j]})
		}
	}
	return pairs, truths, found
}

func median(x []float64) float64 {
	if len(x) == 0 {
		return math.NaN()
	}
	y := append([]float64(nil), x...)
	sort.Float64s(y)
	if len(y)%2 == 1 {
		return y[len(y)/2]
	}
	return (y[len(y)/2-1] + y[len(y)/2]) / 2
}

// errors collects per-breath errors of one quantity.
type errs map[string][]float64

func (e errs) add(name string, v float64) {
	if !math.IsNaN(v) {
		e[name] = append(e[name], v)
	}
}

func relErr(got, want float64) float64 { return math.Abs(got-want) / math.Abs(want) * 100 }

func accuracy(pairs []matched) errs {
	e := errs{}
	for _, p := range pairs {
		tr, b := p.truth, p.got
		e.add("vt%", relErr(b.VTi, tr.VT))
		e.add("peep", math.Abs(b.PEEP-(tr.PEEP+tr.IPEEP*0)))
		e.add("peak", math.Abs(b.PPeak-tr.Peak))
		e.add("rr%", relErr(b.RR, tr.RR))
		if !math.IsNaN(tr.Plateau) {
			e.add("plateau", math.Abs(b.PPlat-tr.Plateau))
			e.add("cstat%", relErr(b.Cstat, tr.VT/(tr.Plateau-tr.PEEP)))
		}
		e.add("fit_c%", relErr(b.FitC, tr.C))
		e.add("fit_r%", relErr(b.FitR, tr.R))
	}
	return e
}

func (e errs) report() string {
	names := make([]string, 0, len(e))
	for k := range e {
		names = append(names, k)
	}
	sort.Strings(names)
	s := ""
	for _, k := range names {
		s += fmt.Sprintf(" %s %.3f", k, median(e[k]))
	}
	return s
}

// detection counts the truths breathd could see (not the first, which the
// stream starts inside, nor the last, which ends with the stream) that were
// found, and the breaths found that match no truth.
func detection(pairs []matched, truths []lungsim.Truth, found []mechanics.Breath) (recall, falsePct float64) {
	seeable := len(truths) - 2
	hit := 0
	for _, p := range pairs {
		if p.truth.Seq != truths[0].Seq && p.truth.Seq != truths[len(truths)-1].Seq {
			hit++
		}
	}
	return float64(hit) / float64(seeable) * 100, float64(len(found)-len(pairs)) / float64(len(found)) * 100
}

// TestAccuracyAgainstSimulatorTruth: breathd's per-breath values against
// the lung model's truth, with sensor noise σ 0.2 cmH2O and 0.5 L/min.
// The targets are far tighter than the ventilator standard's ±(4 mL + 15 %)
// on volume (ISO 80601-2-12, from memory).
func TestAccuracyAgainstSimulatorTruth(t *testing.T) {
	limits := map[string]float64{"vt%": 2, "peep": 0.3, "plateau": 0.3, "peak": 0.5, "cstat%": 3,
		"fit_c%": 3, "fit_r%": 5, "rr%": 1}
	cases := []struct {
		name string
		set  lungsim.Settings
	}{
		{"vc pause", lungsim.Settings{Mode: lungsim.ModeVC, R: 10, C: 50, PEEP: 5, RR: 14.3, VT: 450, Ti: 1.2, Pause: 0.3}},
		{"vc no pause", lungsim.Settings{Mode: lungsim.ModeVC, R: 12, C: 40, PEEP: 8, RR: 17.1, VT: 420, Ti: 1.0}},
		{"vc decelerating", lungsim.Settings{Mode: lungsim.ModeVC, R: 8, C: 60, PEEP: 6, RR: 13.7, VT: 500, Ti: 1.3, Pause: 0.3, Flow: "decelerating"}},
		{"pc", lungsim.Settings{Mode: lungsim.ModePC, R: 10, C: 50, PEEP: 5, RR: 14.3, Ti: 1.2, PInsp: 15, Rise: 0.1}},
	}
	for _, tc := range cases {
		for _, rate := range []float64{50, 100, 200} {
			sc := lungsim.Scenario{Seed: 3, RateHz: rate, Duration: 30 * time.Minute, Settings: tc.set,
				Sensor: lungsim.Sensor{PawNoise: 0.2, FlowNoise: 0.5}}
			pairs, truths, found := runSim(t, sc, mechanics.Config{})
			recall, falsePct := detection(pairs, truths, found)
			e := accuracy(pairs)
			t.Logf("%s %g Hz: %d breaths, found %.2f %%, false %.2f %%;%s", tc.name, rate, len(truths)-2, recall, falsePct, e.report())
			if recall < 99.5 || falsePct > 0.5 {
				t.Errorf("%s %g Hz: detection %.2f %%, false %.2f %%", tc.name, rate, recall, falsePct)
			}
			for k, lim := range limits {
				if m := median(e[k]); m > lim {
					t.Errorf("%s %g Hz: median error %s %.3f over %g", tc.name, rate, k, m, lim)
				}
			}
		}
	}
}
