package lungsim

import (
	"math"
	"testing"
	"time"
)

// simRun runs a noise-free scenario and returns its samples and truths.
func simRun(t *testing.T, sc Scenario) ([]SimSample, []Truth) {
	t.Helper()
	sc.Defaults()
	if err := sc.Validate(); err != nil {
		t.Fatal(err)
	}
	var truths []Truth
	sim := NewSim(sc, func(tr Truth) { truths = append(truths, tr) })
	var out []SimSample
	var s SimSample
	for sim.Next(&s) {
		out = append(out, s)
	}
	return out, truths
}

// at returns the sample nearest time t.
func at(ss []SimSample, t float64) SimSample {
	dt := ss[1].T - ss[0].T
	return ss[min(len(ss)-1, max(0, int(math.Round((t-ss[0].T)/dt))))]
}

func with(s Settings, f func(*Settings)) Settings { f(&s); return s }

// longPause is volume control with a 3 s end-inspiratory pause, for the
// lung's relaxation.
var longPause = Settings{Mode: ModeVC, R: 10, C: 50, PEEP: 5, RR: 8, VT: 500, Ti: 3.8, Pause: 3}

// TestTwoCompartmentsPause: two compartments of unequal time constants
// exchange gas during a pause (pendelluft) until they share one pressure:
// PEEP + VT/(C1 + C2) at equilibrium, approached with τ = R2·C1·C2/(C1 +
// C2) (the first compartment sits at the central node, R1 = 0: Otis et
// al., J Appl Physiol 1956;8:427, from memory).
func TestTwoCompartmentsPause(t *testing.T) {
	set := with(longPause, func(s *Settings) { s.C, s.C2, s.R2 = 20, 30, 20 })
	ss, _ := simRun(t, Scenario{RateHz: 1000, Duration: 8 * time.Second, Settings: set})
	end := at(ss, 3.79).PawTrue
	if want := 5 + 500.0/50; math.Abs(end-want) > 0.01 {
		t.Errorf("pressure at the pause's end %.4f, want %.4f", end, want)
	}
	tau := 20 * 0.020 * 0.030 / 0.050 // s
	p1, p2 := at(ss, 1.0).PawTrue, at(ss, 1.0+tau).PawTrue
	if r := (p2 - end) / (p1 - end); math.Abs(r-math.Exp(-1)) > 0.01 {
		t.Errorf("decay over τ %.3f s: ratio %.4f, want e^−1", tau, r)
	}
}

// TestViscoelasticPause: stress relaxation in a pause decays with τ =
// Rve/Eve to the static recoil PEEP + VT/C (the viscoelastic model of
// Bates, Lung Mechanics, Cambridge UP 2009, from memory; the exponential
// follows from its equation with no flow).
func TestViscoelasticPause(t *testing.T) {
	set := with(longPause, func(s *Settings) { s.ViscoC, s.ViscoR = 100, 4 })
	ss, _ := simRun(t, Scenario{RateHz: 1000, Duration: 8 * time.Second, Settings: set})
	end := at(ss, 3.79).PawTrue
	if want := 5 + 500.0/50; math.Abs(end-want) > 0.01 {
		t.Errorf("pressure at the pause's end %.4f, want %.4f", end, want)
	}
	tau := 4 * 0.100 // Rve/Eve = Rve·Cve, s
	p1, p2 := at(ss, 1.0).PawTrue, at(ss, 1.0+tau).PawTrue
	if r := (p2 - end) / (p1 - end); math.Abs(r-math.Exp(-1)) > 0.005 {
		t.Errorf("decay over τ %.3f s: ratio %.4f, want e^−1", tau, r)
	}
}

// TestVolumeDependentElastanceAndRohrer: at constant flow F the airway
// pressure is PEEP + R·F + K2·F² + V/C + E2·V² (the equation of motion with
// Rohrer's resistance, Pflügers Arch 1915, and a volume-dependent
// elastance, Kano et al., J Appl Physiol 1994;77:1185; both from memory).
func TestVolumeDependentElastanceAndRohrer(t *testing.T) {
	set := with(longPause, func(s *Settings) { s.E2, s.K2 = 20, 6 })
	ss, truths := simRun(t, Scenario{RateHz: 1000, Duration: 8 * time.Second, Settings: set})
	f := 0.5 / 0.8 // L/s
	for _, tm := range []float64{0.2, 0.5, 0.79} {
		v := f * tm
		want := 5 + 10*f + 6*f*f + v/0.05 + 20*v*v
		if got := at(ss, tm).PawTrue; math.Abs(got-want) > 1e-6 {
			t.Errorf("t %.2f: paw %.6f, want %.6f", tm, got, want)
		}
	}
	// the truth's static compliance is the chord over the breath
	if c := truths[0].CStatic; math.Abs(c-500/(10+20*0.25)) > 1e-6 {
		t.Errorf("static compliance %.4f", c)
	}
}

// TestCircuitVolume: with flow measured at the ventilator, the circuit's
// gas, Ccirc·(Pplat − PEEP), is measured as volume that never reaches the
// lung (Bartel, Bazik & Powner, Crit Care Med 1985;13:851, from memory).
func TestCircuitVolume(t *testing.T) {
	set := with(longPause, func(s *Settings) { s.CircuitC, s.ValveTime = 1.5, 0.01 })
	ss, truths := simRun(t, Scenario{RateHz: 1000, Duration: 8 * time.Second, Settings: set})
	var measured float64
	for i := 1; i < len(ss) && ss[i].T < 3.8; i++ {
		measured += (ss[i].Flow + ss[i-1].Flow) / 2 / 60 * (ss[i].T - ss[i-1].T) * 1000
	}
	plat := at(ss, 3.79).PawTrue
	lung := truths[0].VT
	if math.Abs(measured-500) > 0.5 || math.Abs(measured-lung-1.5*(plat-5)) > 0.5 {
		t.Errorf("measured %.2f mL, lung %.2f mL, plateau %.3f: the circuit holds %.2f mL, want %.2f",
			measured, lung, plat, measured-lung, 1.5*(plat-5))
	}
}

// TestSensorLagAndDelay: a first-order sensor sampled at interval dt
// reaches 1 − e^(−(n+1)·dt/τ) of a step n samples after it (the discrete
// exponential filter, sample and hold), and a pure delay shifts the channel
// by its length (the definitions).
func TestSensorLagAndDelay(t *testing.T) {
	base := Scenario{RateHz: 1000, Duration: 9 * time.Second, Settings: longPause}
	raw, _ := simRun(t, base)
	lagged := base
	lagged.Sensor = Sensor{FlowLag: 0.02, PawDelay: 0.015}
	got, _ := simRun(t, lagged)
	const t0 = 7.5                              // the second breath's start
	f0, f := at(got, t0-0.001).Flow, 0.5/0.8*60 // the filter's state before the step
	for _, n := range []int{0, 10, 20, 50} {
		want := f0 + (f-f0)*(1-math.Exp(-float64(n+1)*0.001/0.02))
		if v := at(got, t0+float64(n)*0.001).Flow; math.Abs(v-want) > 1e-3 {
			t.Errorf("flow %d samples after the step %.4f, want %.4f", n, v, want)
		}
	}
	for _, tm := range []float64{7.8, 8.0} {
		if p, w := at(got, tm).Paw, at(raw, tm-0.015).Paw; math.Abs(p-w) > 1e-9 {
			t.Errorf("pressure at %.3f s %.6f, want the raw one 15 ms earlier %.6f", tm, p, w)
		}
	}
}

// TestValveRampsKeepVolume: the valve's ramps reshape the flow but the
// volume delivered is still the set VT.
func TestValveRampsKeepVolume(t *testing.T) {
	for _, flow := range []string{"constant", "decelerating"} {
		set := with(longPause, func(s *Settings) { s.ValveTime, s.Flow = 0.02, flow })
		_, truths := simRun(t, Scenario{RateHz: 1000, Duration: 8 * time.Second, Settings: set})
		if vt := truths[0].VT; math.Abs(vt-500) > 0.01 {
			t.Errorf("%s flow: VT %.3f mL", flow, vt)
		}
	}
}

// TestCardiacOscillationInPause: with no flow at the airway the pressure
// inside the chest reaches it undamped: the pause's pressure oscillates by
// ±CardiacP about the static recoil (the definition of the model).
func TestCardiacOscillationInPause(t *testing.T) {
	set := with(longPause, func(s *Settings) { s.CardiacP, s.CardiacRate = 0.5, 90 })
	ss, _ := simRun(t, Scenario{RateHz: 1000, Duration: 8 * time.Second, Settings: set})
	lo, hi := math.Inf(1), math.Inf(-1)
	for _, s := range ss {
		if s.T > 1 && s.T < 3.7 {
			lo, hi = min(lo, s.PawTrue), max(hi, s.PawTrue)
		}
	}
	if math.Abs(hi-15.5) > 0.01 || math.Abs(lo-14.5) > 0.01 {
		t.Errorf("pause pressure %.3f…%.3f, want 14.5…15.5", lo, hi)
	}
}
