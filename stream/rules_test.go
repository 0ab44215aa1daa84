package stream

import (
	"bytes"
	"context"
	"fmt"
	"io"
	"testing"
	"time"

	"breathd/alerts"
	"breathd/device"
	"breathd/mechanics"
	"breathd/mechanics/lungsim"
)

// collect keeps events and the trend at each event.
type collect struct {
	events []alerts.Event
	rise   []mechanics.Attribution
	w      *mechanics.Window
}

func (c *collect) Breath(_ string, _ *mechanics.Breath, w *mechanics.Window) { c.w = w }
func (c *collect) Event(ev *alerts.Event, _ []alerts.Active) {
	c.events = append(c.events, *ev)
	c.rise = append(c.rise, c.w.Trend().Rise)
}

func (c *collect) first(rule string, transition alerts.Transition) (alerts.Event, int, bool) {
	for i, ev := range c.events {
		if ev.Rule == rule && ev.Transition == transition {
			return ev, i, true
		}
	}
	return alerts.Event{}, -1, false
}

// simulate runs a scenario through the whole device loop with the default
// rules and returns the events and the truths.
func simulate(t *testing.T, sc lungsim.Scenario) (*collect, []lungsim.Truth) {
	t.Helper()
	sc.Defaults()
	if err := sc.Validate(); err != nil {
		t.Fatal(err)
	}
	var truths []lungsim.Truth
	src := device.NewSim(sc, device.SimFormat{Header: true}, 0, func(tr lungsim.Truth) { truths = append(truths, tr) })
	c := &collect{}
	mcfg := mechanics.Config{Sex: sc.Patient.Sex, HeightCm: sc.Patient.HeightCm}
	if _, err := Run(context.Background(), src, Config{Device: "sim", Mechanics: mcfg, Rules: alerts.Defaults(), Sink: c}); err != nil {
		t.Fatal(err)
	}
	return c, truths
}

var noise = lungsim.Sensor{PawNoise: 0.2, FlowNoise: 0.5}

// TestStiffeningRaisesDrivingPressure: driving pressure over 15 cmH2O
// (Amato 2015; Aoyama 2018) is raised a few breaths after the true driving
// pressure crosses 15 and not before.
func TestStiffeningRaisesDrivingPressure(t *testing.T) {
	sc := lungsim.Scenario{Seed: 12, RateHz: 100, Duration: 40 * time.Minute, Sensor: noise,
		Patient:  mechanics.Patient{Sex: "male", HeightCm: 175},
		Settings: lungsim.Settings{Mode: lungsim.ModeVC, R: 10, C: 50, PEEP: 8, RR: 18, VT: 480, Ti: 1.0, Pause: 0.3},
		Timeline: []lungsim.Change{{At: 5 * time.Minute, Ramp: 30 * time.Minute, Set: map[string]float64{"c": 28}}}}
	c, truths := simulate(t, sc)
	ev, _, ok := c.first("driving_pressure_high", alerts.Raised)
	if !ok {
		t.Fatalf("not raised; events %+v", c.events)
	}
	cross := -1
	for i, tr := range truths {
		if tr.DP > 15 {
			cross = i
			break
		}
	}
	late := 0
	for _, tr := range truths[cross:] {
		if tr.TEnd <= ev.T+1e-6 {
			late++
		}
	}
	t.Logf("true driving pressure crossed 15 cmH2O at breath %d (t %.0f s); raised at t %.0f s, %d breaths later",
		truths[cross].Seq, truths[cross].TStart, ev.T, late)
	if ev.T < truths[cross].TEnd || late > 6 {
		t.Errorf("raised at %.1f s, %d breaths after the crossing", ev.T, late)
	}
}

// TestBronchospasmRaisesGapAsResistive: the peak–plateau gap passes 10
// cmH2O (common practice, no source) and the rise is attributed to the
// resistive part.
func TestBronchospasmRaisesGapAsResistive(t *testing.T) {
	sc := lungsim.Scenario{Seed: 13, RateHz: 100, Duration: 45 * time.Minute, Sensor: noise,
		Settings: lungsim.Settings{Mode: lungsim.ModeVC, R: 10, C: 45, PEEP: 6, RR: 14, VT: 430, Ti: 1.2, Pause: 0.3},
		Timeline: []lungsim.Change{{At: 33 * time.Minute, Ramp: 3 * time.Minute, Set: map[string]float64{"r": 30}},
			{At: 40 * time.Minute, Ramp: 2 * time.Minute, Set: map[string]float64{"r": 10}}}}
	c, _ := simulate(t, sc)
	ev, i, ok := c.first("peak_plateau_gap_high", alerts.Raised)
	if !ok {
		t.Fatalf("gap rule not raised: %+v", c.events)
	}
	t.Logf("gap raised at t %.0f s (resistance ramp from 1980 s), attribution %+v", ev.T, c.rise[i])
	if c.rise[i].Cause != mechanics.RiseResistive {
		t.Errorf("attributed %s", c.rise[i].Cause)
	}
	if _, _, ok := c.first("resistance_rising", alerts.Raised); !ok {
		t.Error("resistance_rising not raised")
	}
	if _, _, ok := c.first("peak_plateau_gap_high", alerts.Cleared); !ok {
		t.Error("gap rule not cleared after the episode")
	}
	if _, _, ok := c.first("plateau_high", alerts.Raised); ok {
		t.Error("plateau raised by a resistive episode")
	}
}

// TestDisconnectionRaisesCircuitOpen: within the configured delay (open
// for 1 s, then 4 s, evaluated each second) and cleared after.
func TestDisconnectionRaisesCircuitOpen(t *testing.T) {
	sc := lungsim.Scenario{Seed: 15, RateHz: 100, Duration: 10 * time.Minute, Sensor: noise,
		Settings: lungsim.Settings{Mode: lungsim.ModeVC, R: 11, C: 48, PEEP: 7, RR: 16, VT: 400, Ti: 1.1, Pause: 0.25},
		Timeline: []lungsim.Change{{At: 4 * time.Minute, Disconnect: 40 * time.Second}}}
	c, _ := simulate(t, sc)
	up, _, ok1 := c.first("circuit_open", alerts.Raised)
	down, _, ok2 := c.first("circuit_open", alerts.Cleared)
	if !ok1 || !ok2 {
		t.Fatalf("circuit_open raised %v cleared %v: %+v", ok1, ok2, c.events)
	}
	delay, after := up.T-240, down.T-280
	t.Logf("circuit open raised %.1f s after the disconnection, cleared %.1f s after reconnection", delay, after)
	if delay < 4 || delay > 7 || after < 0 || after > 6 {
		t.Errorf("raised after %.1f s, cleared %.1f s after reconnection", delay, after)
	}
}

// TestSteadyRaisesNothing: a steady passive adult over 24 simulated hours
// (6 under the race detector) raises no rule.
func TestSteadyRaisesNothing(t *testing.T) {
	hours := 24.0
	if raceEnabled || testing.Short() {
		hours = 6
	}
	sc := lungsim.Scenario{Seed: 11, RateHz: 100, Duration: time.Duration(hours * float64(time.Hour)), Sensor: noise,
		Patient:  mechanics.Patient{Sex: "female", HeightCm: 165},
		Settings: lungsim.Settings{Mode: lungsim.ModeVC, R: 9, C: 55, PEEP: 6, RR: 16, VT: 420, Ti: 1.1, Pause: 0.3}}
	c, truths := simulate(t, sc)
	t.Logf("%.0f h, %d breaths, %d events", hours, len(truths), len(c.events))
	for _, ev := range c.events {
		t.Errorf("event %s %s at %.0f s value %.2f", ev.Rule, ev.Transition, ev.T, ev.Value)
	}
}

// TestAheadSameAsInline: decoding in a goroutine of its own (analyze)
// gives the same breaths and the same events, with the same wall-clock
// times from the recording's clock directives, as the plain loop.
func TestAheadSameAsInline(t *testing.T) {
	sc := lungsim.Scenario{Seed: 12, RateHz: 100, Duration: 40 * time.Minute, Sensor: noise,
		Settings: lungsim.Settings{Mode: lungsim.ModeVC, R: 10, C: 50, PEEP: 8, RR: 18, VT: 480, Ti: 1.0, Pause: 0.3},
		Timeline: []lungsim.Change{{At: 5 * time.Minute, Ramp: 30 * time.Minute, Set: map[string]float64{"c": 28}}}}
	sc.Defaults()
	var raw bytes.Buffer
	io.Copy(&raw, device.NewSim(sc, device.SimFormat{Header: true}, 0, nil))
	// a clock directive every 6000 lines (a minute), as a recording has
	var rec bytes.Buffer
	start := time.Date(2026, 12, 1, 8, 0, 0, 0, time.UTC)
	for i, line := range bytes.SplitAfter(raw.Bytes(), []byte("\n")) {
		if i%6000 == 1 {
			fmt.Fprintf(&rec, "# breathd clock %s\n", start.Add(time.Duration(i-1)*10*time.Millisecond).Format(time.RFC3339Nano))
		}
		rec.Write(line)
	}
	run := func(ahead bool) (*collect, Status) {
		c := &collect{}
		st, err := Run(context.Background(), io.NopCloser(bytes.NewReader(rec.Bytes())),
			Config{Device: "d", Rules: alerts.Defaults(), Sink: c, Ahead: ahead})
		if err != nil {
			t.Fatal(err)
		}
		return c, st
	}
	a, sa := run(false)
	b, sb := run(true)
	if sa.Breaths != sb.Breaths || sa.Counts.Samples != sb.Counts.Samples || len(a.events) != len(b.events) || len(a.events) == 0 {
		t.Fatalf("inline %d breaths %d events, ahead %d breaths %d events", sa.Breaths, len(a.events), sb.Breaths, len(b.events))
	}
	for i := range a.events {
		x, y := a.events[i], b.events[i]
		if x.Rule != y.Rule || x.Transition != y.Transition || x.T != y.T || x.Value != y.Value || !x.At.Equal(y.At) {
			t.Errorf("event %d: inline %+v, ahead %+v", i, x, y)
		}
	}
	if want := start.Add(time.Duration(a.events[0].T * float64(time.Second))); a.events[0].At.Sub(want).Abs() > 20*time.Millisecond {
		t.Errorf("event wall time %v, want about %v", a.events[0].At, want)
	}
}
