package mechanics_test

import (
	"math"
	"testing"
	"time"

	"breathd/mechanics"
	"breathd/mechanics/lungsim"
)

// attributionOf runs a scenario through detection and the window and
// returns the trend at the time given.
func attributionOf(t *testing.T, sc lungsim.Scenario, at float64) mechanics.Attribution {
	t.Helper()
	sc.Defaults()
	if err := sc.Validate(); err != nil {
		t.Fatal(err)
	}
	sim := lungsim.NewSim(sc, nil)
	seg, _ := mechanics.NewSegmenter(mechanics.Config{}, sc.RateHz)
	w, _ := mechanics.NewWindow(mechanics.WindowConfig{})
	var last mechanics.Attribution
	var s lungsim.SimSample
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
	noise := lungsim.Sensor{PawNoise: 0.2, FlowNoise: 0.5}
	spasm := lungsim.Scenario{Seed: 1, RateHz: 50, Duration: 60 * time.Minute, Sensor: noise,
		Settings: lungsim.Settings{Mode: lungsim.ModeVC, R: 10, C: 45, PEEP: 6, RR: 14, VT: 430, Ti: 1.2, Pause: 0.3},
		Timeline: []lungsim.Change{{At: 36 * time.Minute, Ramp: 3 * time.Minute, Set: map[string]float64{"r": 30}}}}
	a := attributionOf(t, spasm, 44*60)
	t.Logf("bronchospasm: %+v", a)
	// the slower exhalation leaves about 1 cmH2O of intrinsic PEEP
	// (τ = 30·0.045 = 1.35 s, Te 3.1 s: e^(−2.3) of the 9.5 cmH2O), which
	// shows as a small elastic rise
	if a.Cause != mechanics.RiseResistive || a.Method != "plateau" || a.ResistiveRise < 8 || math.Abs(a.ElasticRise) > 1.5 {
		t.Errorf("bronchospasm attributed %+v", a)
	}
	stiff := lungsim.Scenario{Seed: 2, RateHz: 50, Duration: 60 * time.Minute, Sensor: noise,
		Settings: lungsim.Settings{Mode: lungsim.ModeVC, R: 10, C: 50, PEEP: 8, RR: 18, VT: 480, Ti: 1.0, Pause: 0.3},
		Timeline: []lungsim.Change{{At: 35 * time.Minute, Ramp: 5 * time.Minute, Set: map[string]float64{"c": 28}}}}
	a = attributionOf(t, stiff, 46*60)
	t.Logf("stiffening: %+v", a)
	if a.Cause != mechanics.RiseElastic || a.ElasticRise < 5 || math.Abs(a.ResistiveRise) > 1 {
		t.Errorf("stiffening attributed %+v", a)
	}
	// without pauses the fitted R and C decide
	stiff.Settings.Pause = 0
	a = attributionOf(t, stiff, 46*60)
	t.Logf("stiffening without pauses: %+v", a)
	if a.Cause != mechanics.RiseElastic || a.Method != "fit" {
		t.Errorf("stiffening without pauses attributed %+v", a)
	}
	steady := stiff
	steady.Timeline = nil
	if a = attributionOf(t, steady, 46*60); a.Cause != mechanics.RiseNone {
		t.Errorf("steady attributed %+v", a)
	}
}

// TestNetFlowShowsDrift: a flow sensor drifting by +3 L/min shows as a net
// inward flow of about 3 L/min over the window (the drift adds 3 L/min ×
// the breath's duration to vti − vte; common practice, no source).
func TestNetFlowShowsDrift(t *testing.T) {
	sc := lungsim.Scenario{Seed: 2, RateHz: 100, Duration: 5 * time.Minute,
		Settings: lungsim.Settings{Mode: lungsim.ModeVC, R: 10, C: 50, PEEP: 5, RR: 15, VT: 450, Ti: 1.2, Pause: 0.3},
		Sensor:   lungsim.Sensor{PawNoise: 0.2, FlowNoise: 0.5, FlowDrift: 36}} // 36 L/min per hour: 3 L/min at 5 min
	sc.Defaults()
	sim := lungsim.NewSim(sc, nil)
	seg, _ := mechanics.NewSegmenter(mechanics.Config{}, 100)
	w, _ := mechanics.NewWindow(mechanics.WindowConfig{})
	var s lungsim.SimSample
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
