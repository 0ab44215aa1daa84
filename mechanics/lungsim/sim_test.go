package lungsim

import (
	"errors"
	"math"
	"strings"
	"testing"
	"time"

	"breathd/mechanics"
)

func passive(mode Mode) Scenario {
	return Scenario{RateHz: 100, Duration: time.Minute, Settings: Settings{
		Mode: mode, R: 10, C: 50, PEEP: 5, RR: 15, VT: 500, Ti: 1.2, Pause: 0.3, PInsp: 15}}
}

func checkScenario(t *testing.T, sc Scenario) {
	t.Helper()
	sc.Defaults()
	if err := sc.Validate(); err != nil {
		t.Fatal(err)
	}
}

// TestConstantFlowInflation: during constant-flow inflation from rest,
// P(t) = PEEP + R·F + F·t/C (follows from the equation of motion; Bates,
// Lung Mechanics, Cambridge UP 2009, ch. 3).
func TestConstantFlowInflation(t *testing.T) {
	sc := passive(ModeVC)
	checkScenario(t, sc)
	sim := NewSim(sc, nil)
	const R, C, peep = 10.0, 0.050, 5.0 // cmH2O·s/L, L/cmH2O, cmH2O
	F := 0.5 / 0.9                      // L/s: 500 mL over Ti − pause
	var s SimSample
	for i := 0; i < 90; i++ { // the flow phase of the first breath
		sim.Next(&s)
		want := peep + R*F + F*s.T/C
		if math.Abs(s.PawTrue-want) > 1e-9 || math.Abs(s.FlowTrue-F*60) > 1e-9 {
			t.Fatalf("t %.2f: paw %.6f flow %.4f, want %.6f and %.4f", s.T, s.PawTrue, s.FlowTrue, want, F*60)
		}
	}
	// the pause: flow zero, pressure at PEEP + VT/C = 15 cmH2O
	for i := 0; i < 30; i++ {
		sim.Next(&s)
		if math.Abs(s.PawTrue-15) > 1e-9 || s.FlowTrue != 0 {
			t.Fatalf("pause t %.2f: paw %.6f flow %.4f", s.T, s.PawTrue, s.FlowTrue)
		}
	}
}

// TestPressureControlExponential: with a step of ΔP above PEEP,
// V(t) = C·ΔP·(1 − e^(−t/τ)) and V'(t) = (ΔP/R)·e^(−t/τ), τ = R·C (Bates
// 2009, ch. 3). Worked example (analytic): C 40 mL/cmH2O, R 10 cmH2O·s/L,
// ΔP 15 cmH2O, Ti 1 s → τ 0.4 s, VT = 0.6·(1 − e^(−2.5)) = 0.551 L.
func TestPressureControlExponential(t *testing.T) {
	sc := Scenario{RateHz: 200, Duration: 10 * time.Second, Settings: Settings{
		Mode: ModePC, R: 10, C: 40, PEEP: 5, RR: 12, Ti: 1, PInsp: 15}}
	checkScenario(t, sc)
	var truths []Truth
	sim := NewSim(sc, func(tr Truth) { truths = append(truths, tr) })
	const tau = 0.4
	var s SimSample
	for sim.Next(&s) && s.T < 0.999 {
		want := 15.0 / 10 * math.Exp(-s.T/tau) * 60 // L/min
		if math.Abs(s.FlowTrue-want) > 1e-6*want {
			t.Fatalf("t %.3f: flow %.6f L/min, want %.6f", s.T, s.FlowTrue, want)
		}
	}
	for sim.Next(&s) {
	}
	if len(truths) == 0 {
		t.Fatal("no breath completed")
	}
	if vt := truths[0].VT; math.Abs(vt-551) > 0.5 {
		t.Errorf("first breath VT %.2f mL, want 551 (0.6·(1 − e^−2.5) L)", vt)
	}
}

// TestPassiveExhalation: V(t) = VT·e^(−t/τ). Worked example (university
// biomedical-engineering course notes on passive exhalation): R 2
// cmH2O·s/L, C 0.1 L/cmH2O, VT 1 L → V(0.25 s) = 0.2865 L; half-time
// 0.1386 s.
func TestPassiveExhalation(t *testing.T) {
	sc := Scenario{RateHz: 1000, Duration: 3 * time.Second, Settings: Settings{
		Mode: ModeVC, R: 2, C: 100, PEEP: 5, RR: 20, VT: 1000, Ti: 1, Pause: 0.2}}
	checkScenario(t, sc)
	sim := NewSim(sc, nil)
	const tau = 0.2 // s
	var s SimSample
	vol := func() float64 { return -s.FlowTrue / 60 * tau } // passive: V = −V'·τ, L
	for sim.Next(&s) {
		switch {
		case math.Abs(s.T-1.25) < 1e-9:
			if math.Abs(vol()-0.2865) > 0.00005 {
				t.Errorf("V(0.25 s) = %.5f L, want 0.2865", vol())
			}
		case math.Abs(s.T-(1+0.1386)) < 0.0006:
			if math.Abs(vol()-0.5) > 0.002 {
				t.Errorf("V at the half-time = %.4f L, want 0.5", vol())
			}
		}
	}
}

// TestTruthOfPassiveVolumeControl: with a pause, plateau = PEEP + VT/C and
// driving pressure = VT/C (Amato et al., NEJM 2015;372:747: ΔP = VT/Crs).
func TestTruthOfPassiveVolumeControl(t *testing.T) {
	sc := passive(ModeVC)
	var truths []Truth
	sim := NewSim(sc, func(tr Truth) { truths = append(truths, tr) })
	for s := (SimSample{}); sim.Next(&s); {
	}
	if len(truths) != 15 { // 15/min for one minute; the 15th ends at 60 s
		t.Fatalf("%d breaths", len(truths))
	}
	// Exhalation is not complete after Te = 2.8 s with τ = 0.5 s. Passive
	// exhalation leaves a fraction q = e^(−Te/τ) of the volume (Bates 2009,
	// ch. 3), so in the steady state the alveolar pressure left above PEEP
	// is x = (VT/C + x)·q, x = (VT/C)·q/(1 − q).
	q := math.Exp(-2.8 / 0.5)
	ipeep := 10 * q / (1 - q)
	F := 0.5 / 0.9
	for _, tr := range truths[2:] {
		if math.Abs(tr.VT-500) > 1e-6 || math.Abs(tr.Plateau-15-ipeep) > 1e-4 || math.Abs(tr.DP-10) > 1e-6 ||
			math.Abs(tr.RR-15) > 1e-9 || tr.Active || math.Abs(tr.IPEEP-ipeep) > 1e-4 {
			t.Errorf("breath %+v, intrinsic PEEP want %.5f", tr, ipeep)
		}
		// peak at the last flow sample: PEEP + iPEEP + R·F + F·(tflow − dt)/C
		if want := 5 + ipeep + 10*F + F*0.89/0.05; math.Abs(tr.Peak-want) > 1e-4 {
			t.Errorf("peak %.4f, want %.4f", tr.Peak, want)
		}
	}
}

func TestSimDeterministicAndNoisy(t *testing.T) {
	sc := passive(ModeVC)
	sc.Seed = 7
	sc.Sensor = Sensor{PawNoise: 0.2, FlowNoise: 0.5}
	run := func(seed uint64) []SimSample {
		sc.Seed = seed
		sim := NewSim(sc, nil)
		var out []SimSample
		for s := (SimSample{}); sim.Next(&s); {
			out = append(out, s)
		}
		return out
	}
	a, b, c := run(7), run(7), run(8)
	if len(a) != 6000 {
		t.Fatalf("%d samples", len(a))
	}
	same, diff := true, false
	var sum2 float64
	for i := range a {
		same = same && a[i] == b[i]
		diff = diff || a[i].Paw != c[i].Paw
		sum2 += (a[i].Paw - a[i].PawTrue) * (a[i].Paw - a[i].PawTrue)
	}
	if !same || !diff {
		t.Errorf("same seed identical %v, other seed differs %v", same, diff)
	}
	if sd := math.Sqrt(sum2 / float64(len(a))); math.Abs(sd-0.2) > 0.01 {
		t.Errorf("pressure noise σ %.3f, want 0.2", sd)
	}
}

func TestPressureSupportTriggeredAndActive(t *testing.T) {
	sc := Scenario{RateHz: 100, Duration: 2 * time.Minute, Settings: Settings{
		Mode: ModePS, R: 10, C: 50, PEEP: 5, RR: 8, PInsp: 10, Rise: 0.1,
		EffortRate: 20, EffortP: 5, EffortTime: 0.8}}
	checkScenario(t, sc)
	var truths []Truth
	sim := NewSim(sc, func(tr Truth) { truths = append(truths, tr) })
	for s := (SimSample{}); sim.Next(&s); {
	}
	trig := 0
	for _, tr := range truths {
		if tr.Triggered && tr.Active {
			trig++
		}
	}
	// efforts at 20/min over 2 min; the backup rate (8/min) is not needed
	if trig < 35 || len(truths) > 42 {
		t.Errorf("%d breaths, %d triggered by effort", len(truths), trig)
	}
}

func TestTimelineRampAndDisconnect(t *testing.T) {
	sc := passive(ModeVC)
	sc.Duration = 10 * time.Minute
	sc.Timeline = []Change{
		{At: 2 * time.Minute, Ramp: 4 * time.Minute, Set: map[string]float64{"c": 25}},
		{At: 8 * time.Minute, Disconnect: 30 * time.Second},
	}
	checkScenario(t, sc)
	if c := sc.settingsAt(4 * time.Minute).C; math.Abs(c-37.5) > 1e-9 {
		t.Errorf("C halfway through the ramp %g, want 37.5", c)
	}
	var truths []Truth
	sim := NewSim(sc, func(tr Truth) { truths = append(truths, tr) })
	open := 0
	for s := (SimSample{}); sim.Next(&s); {
		if s.Open {
			open++
		}
	}
	if open != 3000 {
		t.Errorf("%d open samples, want 30 s at 100 Hz", open)
	}
	for _, tr := range truths {
		if tr.TStart < 8*60+30 && tr.TEnd > 8*60 {
			t.Errorf("a breath spans the disconnection: %+v", tr)
		}
	}
	last := truths[len(truths)-1]
	if last.C != 25 || math.Abs(last.DP-20) > 1e-6 {
		t.Errorf("after the ramp C %g DP %g", last.C, last.DP)
	}
}

// TestScenarioValidate: every setting the model cannot take is refused
// as a *PathError at its key path in the scenario file. Common practice,
// no source.
func TestScenarioValidate(t *testing.T) {
	bad := []struct {
		f    func(*Scenario)
		path string
	}{
		{func(s *Scenario) { s.Settings.Mode = "hfov" }, "settings.mode"},
		{func(s *Scenario) { s.Settings.C = 0 }, "settings.c"},
		{func(s *Scenario) { s.Settings.Ti = 5 }, "settings.ti"},
		{func(s *Scenario) { s.Settings.Pause = 2 }, "settings.pause"},
		{func(s *Scenario) { s.RateHz = 5 }, "rate_hz"},
		{func(s *Scenario) { s.Timeline = []Change{{At: time.Minute, Set: map[string]float64{"compliance": 3}}} }, "timeline[0].set.compliance"},
		{func(s *Scenario) { s.Timeline = []Change{{At: time.Minute, Set: map[string]float64{"c": -3}}} }, "timeline[0]"},
		{func(s *Scenario) { s.Timeline = []Change{{At: 2 * time.Minute}, {At: time.Minute}} }, "timeline"},
		{func(s *Scenario) { s.Patient = mechanics.Patient{Sex: "x", HeightCm: 170} }, "patient"},
	}
	for i, c := range bad {
		sc := passive(ModeVC)
		c.f(&sc)
		sc.Defaults()
		err := sc.Validate()
		var pe *PathError
		if !errors.As(err, &pe) || !strings.HasPrefix(err.Error(), c.path+": ") {
			t.Errorf("case %d: %v, want a PathError at %s", i, err, c.path)
		}
	}
}
