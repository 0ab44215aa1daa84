package lungsim

import (
	"errors"
	"fmt"
	"math"
	"sort"
	"strings"
	"time"

	"breathd/mechanics"
)

// Ventilation modes of the simulator.
// Mode is the simulated ventilator's mode.
type Mode string

// Modes.
const (
	ModeVC Mode = "vc" // volume control: set flow, optional end-inspiratory pause
	ModePC Mode = "pc" // pressure control: set pressure above PEEP for Ti, with a rise time
	ModePS Mode = "ps" // pressure support: triggered by the patient, cycled at a fraction of peak flow
)

// Settings are the patient's lung, the ventilator's settings and the
// patient's effort, as they hold for one breath. Units are in the comments.
type Settings struct {
	Mode  Mode    `yaml:"mode"`  // vc, pc or ps
	R     float64 `yaml:"r"`     // airway resistance, cmH2O·s/L
	C     float64 `yaml:"c"`     // compliance, mL/cmH2O
	PEEP  float64 `yaml:"peep"`  // set PEEP, cmH2O
	RR    float64 `yaml:"rr"`    // set rate, 1/min (the backup rate in ps)
	VT    float64 `yaml:"vt"`    // vc: tidal volume, mL
	Ti    float64 `yaml:"ti"`    // vc, pc: inspiratory time including any pause, s
	Pause float64 `yaml:"pause"` // vc: end-inspiratory pause, s
	// PauseEvery makes the pause happen on every Nth breath only (0 or 1:
	// every breath).
	PauseEvery int     `yaml:"pause_every"`
	Flow       string  `yaml:"flow"`    // vc: constant (default) or decelerating (to 25 % of peak)
	PInsp      float64 `yaml:"pinsp"`   // pc, ps: pressure above PEEP, cmH2O
	Rise       float64 `yaml:"rise"`    // pc, ps: time to reach it, s
	Cycle      float64 `yaml:"cycle"`   // ps: end inspiration when flow falls below this fraction of its peak; default 0.25
	Trigger    float64 `yaml:"trigger"` // ps: patient flow that triggers a breath, L/min; default 2
	// TriggerDelay is the ventilator's response time after the trigger, s
	// (ps; default 0.06): the patient draws flow at PEEP meanwhile.
	TriggerDelay float64 `yaml:"trigger_delay"`
	// Patient effort: a half-sine muscle pressure of EffortP cmH2O lasting
	// EffortTime s, EffortRate times a minute (0: a passive patient).
	EffortRate float64 `yaml:"effort_rate"`
	EffortP    float64 `yaml:"effort_p"`
	EffortTime float64 `yaml:"effort_time"`
	Leak       float64 `yaml:"leak"` // leak flow per airway pressure, L/min per cmH2O

	// Efforts that are not all alike, and a ventilator that does not
	// always follow them (each 0: off). Shares are of efforts or breaths,
	// drawn at random from the scenario's seed.
	EffortJitter float64 `yaml:"effort_jitter"` // each effort's period varies by up to ± this share
	WeakShare    float64 `yaml:"weak_share"`    // share of efforts of only weak_p cmH2O …
	WeakP        float64 `yaml:"weak_p"`        // … too weak to trigger from expiration
	LongShare    float64 `yaml:"long_share"`    // share of efforts that last long_time s (the next waits half a second after) …
	LongTime     float64 `yaml:"long_time"`     // … and pull on after a pressure-support breath cycles
	LongP        float64 `yaml:"long_p"`        // their peak, cmH2O (0: effort_p)
	// ps: a share of breaths cycles at short_ti s whatever the flow, and a
	// share not before long_ti s.
	MaxTi       float64 `yaml:"max_ti"` // ps: cycle by time after this long, s; default 3
	ShortCycles float64 `yaml:"short_cycles"`
	ShortTi     float64 `yaml:"short_ti"`
	LongCycles  float64 `yaml:"long_cycles"`
	LongTi      float64 `yaml:"long_ti"`
	// vc, pc: a share of machine-started breaths entrains an effort
	// (effort_p, effort_time) that starts entrain_delay s after the
	// breath's start.
	EntrainShare float64 `yaml:"entrain_share"`
	EntrainDelay float64 `yaml:"entrain_delay"`

	// Beyond the single compartment (all 0: the ideal lung, integrated
	// exactly). R above is then the central airway's resistance.
	R2     float64 `yaml:"r2"`      // a second compartment's own resistance, cmH2O·s/L (with c2)
	C2     float64 `yaml:"c2"`      // its compliance, mL/cmH2O; c is the first's
	E2     float64 `yaml:"e2"`      // volume-dependent elastance of the first compartment, Pel = V/C + E2·V², cmH2O/L²
	K2     float64 `yaml:"k2"`      // flow-dependent airway resistance, ΔP = R·V' + K2·V'·|V'|, cmH2O·s²/L²
	ViscoC float64 `yaml:"visco_c"` // viscoelastic tissue: a spring of this compliance, mL/cmH2O, …
	ViscoR float64 `yaml:"visco_r"` // … in series with a dashpot of this resistance, cmH2O·s/L
	// CardiacP is the amplitude of a pressure oscillation inside the chest
	// at CardiacRate beats a minute, cmH2O.
	CardiacP    float64 `yaml:"cardiac_p"`
	CardiacRate float64 `yaml:"cardiac_rate"`
	// CircuitC is the breathing circuit's compliance, mL/cmH2O: flow is
	// then measured at the ventilator and includes the gas compressed in
	// the circuit.
	CircuitC float64 `yaml:"circuit_c"`
	// ValveTime is how long the ventilator's valves take to open or
	// close, s: volume-control flow rises and falls, and the pressure falls
	// to PEEP at expiration, over this long.
	ValveTime float64 `yaml:"valve_time"`
	// ValveR is the exhalation valve's resistance, cmH2O·s/L: in
	// expiration the airway pressure is PEEP + ValveR·(outward flow), and
	// falls below PEEP when the patient draws flow in (0: the valve holds
	// PEEP exactly).
	ValveR float64 `yaml:"valve_r"`
}

// ideal reports whether the lung is the single compartment with ideal
// valves, which the simulator integrates exactly.
func (s *Settings) ideal() bool {
	return s.C2 == 0 && s.E2 == 0 && s.K2 == 0 && s.ViscoC == 0 && s.CardiacP == 0 &&
		s.CircuitC == 0 && s.ValveTime == 0 && s.ValveR == 0
}

// numeric lists the settings a timeline may change, with their addresses.
func (s *Settings) numeric() map[string]*float64 {
	return map[string]*float64{
		"r": &s.R, "c": &s.C, "peep": &s.PEEP, "rr": &s.RR, "vt": &s.VT, "ti": &s.Ti,
		"pause": &s.Pause, "pinsp": &s.PInsp, "rise": &s.Rise, "cycle": &s.Cycle, "trigger": &s.Trigger, "trigger_delay": &s.TriggerDelay,
		"effort_rate": &s.EffortRate, "effort_p": &s.EffortP, "effort_time": &s.EffortTime, "leak": &s.Leak,
		"r2": &s.R2, "c2": &s.C2, "e2": &s.E2, "k2": &s.K2, "visco_c": &s.ViscoC, "visco_r": &s.ViscoR,
		"cardiac_p": &s.CardiacP, "cardiac_rate": &s.CardiacRate, "circuit_c": &s.CircuitC,
		"valve_time": &s.ValveTime, "valve_r": &s.ValveR,
		"effort_jitter": &s.EffortJitter, "weak_share": &s.WeakShare, "weak_p": &s.WeakP,
		"long_share": &s.LongShare, "long_time": &s.LongTime, "long_p": &s.LongP,
		"max_ti": &s.MaxTi, "short_cycles": &s.ShortCycles, "short_ti": &s.ShortTi, "long_cycles": &s.LongCycles, "long_ti": &s.LongTi,
		"entrain_share": &s.EntrainShare, "entrain_delay": &s.EntrainDelay,
	}
}

// PathError is a scenario setting the model cannot take, at its key path
// in a scenario file: "settings", "c" or "timeline", 2.
type PathError struct {
	Path []any // string keys and int indices
	Err  error
}

// Error is the key path and the problem, e.g. "settings.c: 0 out of range
// (1…500)".
func (e *PathError) Error() string {
	var b strings.Builder
	for i, p := range e.Path {
		if k, ok := p.(int); ok {
			fmt.Fprintf(&b, "[%d]", k)
		} else if i > 0 {
			fmt.Fprintf(&b, ".%v", p)
		} else {
			fmt.Fprint(&b, p)
		}
	}
	return b.String() + ": " + e.Err.Error()
}

// Unwrap returns the problem.
func (e *PathError) Unwrap() error { return e.Err }

// keyErr puts key before the path of err, or makes err a PathError at key.
func keyErr(key string, err error) error {
	var pe *PathError
	if errors.As(err, &pe) {
		return &PathError{Path: append([]any{key}, pe.Path...), Err: pe.Err}
	}
	return &PathError{Path: []any{key}, Err: err}
}

// Validate reports the first setting outside what the model handles, as a
// *PathError.
func (s *Settings) Validate() error {
	switch s.Mode {
	case ModeVC, ModePC, ModePS:
	default:
		return keyErr("mode", fmt.Errorf("%q: want vc, pc or ps", s.Mode))
	}
	checks := []struct {
		name     string
		v        float64
		min, max float64
	}{
		{"r", s.R, 0.5, 200}, {"c", s.C, 1, 500}, {"peep", s.PEEP, 0, 40}, {"rr", s.RR, 1, 120},
		{"pause", s.Pause, 0, 5}, {"rise", s.Rise, 0, 2}, {"effort_rate", s.EffortRate, 0, 80},
		{"effort_p", s.EffortP, 0, 40}, {"effort_time", s.EffortTime, 0, 3}, {"leak", s.Leak, 0, 5},
		{"cycle", s.Cycle, 0, 0.9}, {"trigger", s.Trigger, 0, 30}, {"trigger_delay", s.TriggerDelay, 0, 0.5},
		{"r2", s.R2, 0, 200}, {"c2", s.C2, 0, 500}, {"e2", s.E2, 0, 500}, {"k2", s.K2, 0, 100},
		{"visco_c", s.ViscoC, 0, 1000}, {"visco_r", s.ViscoR, 0, 200}, {"cardiac_p", s.CardiacP, 0, 5},
		{"cardiac_rate", s.CardiacRate, 0, 200}, {"circuit_c", s.CircuitC, 0, 10},
		{"valve_time", s.ValveTime, 0, 0.1}, {"valve_r", s.ValveR, 0, 50},
		{"effort_jitter", s.EffortJitter, 0, 0.5}, {"weak_share", s.WeakShare, 0, 1}, {"weak_p", s.WeakP, 0, 40},
		{"long_share", s.LongShare, 0, 1}, {"long_time", s.LongTime, 0, 3}, {"long_p", s.LongP, 0, 40},
		{"max_ti", s.MaxTi, 0, 3}, {"short_cycles", s.ShortCycles, 0, 0.5}, {"short_ti", s.ShortTi, 0, 3}, {"long_cycles", s.LongCycles, 0, 0.5},
		{"long_ti", s.LongTi, 0, 2.9}, {"entrain_share", s.EntrainShare, 0, 1}, {"entrain_delay", s.EntrainDelay, 0, 3},
	}
	for _, c := range checks {
		if math.IsNaN(c.v) || c.v < c.min || c.v > c.max {
			return keyErr(c.name, fmt.Errorf("%g out of range (%g…%g)", c.v, c.min, c.max))
		}
	}
	if s.Mode != ModePS && (s.Ti <= 0 || s.Ti >= 60/s.RR) {
		return keyErr("ti", fmt.Errorf("%g s must be above 0 and below the breath period %.2f s", s.Ti, 60/s.RR))
	}
	if s.Mode == ModeVC {
		if s.VT < 20 || s.VT > 2500 {
			return keyErr("vt", fmt.Errorf("%g mL out of range (20…2500)", s.VT))
		}
		if s.Pause >= s.Ti {
			return keyErr("pause", fmt.Errorf("%g s must be shorter than ti %g s", s.Pause, s.Ti))
		}
		if s.Flow != "" && s.Flow != "constant" && s.Flow != "decelerating" {
			return keyErr("flow", fmt.Errorf("%q: want constant or decelerating", s.Flow))
		}
	} else if s.PInsp <= 0 || s.PInsp > 60 {
		return keyErr("pinsp", fmt.Errorf("%g cmH2O out of range (above 0, up to 60)", s.PInsp))
	}
	if (s.C2 > 0) != (s.R2 > 0) {
		return keyErr("c2", errors.New("a second compartment needs both r2 and c2"))
	}
	if (s.ViscoC > 0) != (s.ViscoR > 0) {
		return keyErr("visco_c", errors.New("viscoelastic tissue needs both visco_c and visco_r"))
	}
	if s.CardiacP > 0 && s.CardiacRate <= 0 {
		return keyErr("cardiac_rate", errors.New("cardiac_p needs cardiac_rate"))
	}
	if s.EffortRate > 0 && (s.EffortP <= 0 || s.EffortTime <= 0) {
		return keyErr("effort_p", errors.New("effort_rate needs effort_p and effort_time"))
	}
	if p := 60 / s.EffortRate * (1 - s.EffortJitter); s.EffortRate > 0 && s.EffortTime >= p {
		return keyErr("effort_time", fmt.Errorf("%g s must be shorter than the shortest effort period %.2f s", s.EffortTime, p))
	}
	if s.WeakShare > 0 && s.WeakP <= 0 {
		return keyErr("weak_p", errors.New("weak_share needs weak_p"))
	}
	if s.LongShare > 0 && s.LongTime <= 0 {
		return keyErr("long_time", errors.New("long_share needs long_time"))
	}
	if s.ShortCycles > 0 && s.ShortTi <= s.Rise {
		return keyErr("short_ti", fmt.Errorf("%g s must be longer than the rise %g s", s.ShortTi, s.Rise))
	}
	if s.LongCycles > 0 && s.LongTi <= 0 {
		return keyErr("long_ti", errors.New("long_cycles needs long_ti"))
	}
	if s.EntrainShare > 0 && (s.EffortP <= 0 || s.EffortTime <= 0) {
		return keyErr("entrain_share", errors.New("entrained efforts need effort_p and effort_time"))
	}
	return nil
}

// Sensor describes the ventilator's measurement: dynamics, noise, drift,
// printing.
type Sensor struct {
	PawNoise  float64 `yaml:"paw_noise"`  // σ of Gaussian pressure noise, cmH2O
	FlowNoise float64 `yaml:"flow_noise"` // σ of Gaussian flow noise, L/min
	FlowDrift float64 `yaml:"flow_drift"` // flow offset drift, L/min per hour
	Digits    int     `yaml:"digits"`     // decimals printed for paw and flow; default 2
	PawLag    float64 `yaml:"paw_lag"`    // pressure sensor: first-order low-pass time constant, s
	FlowLag   float64 `yaml:"flow_lag"`   // flow sensor: the same, s
	FlowDelay float64 `yaml:"flow_delay"` // the flow channel arrives this much later than the pressure, s
	PawDelay  float64 `yaml:"paw_delay"`  // the pressure channel arrives this much later than the flow, s
}

// ideal reports whether the sensor reads the airway without dynamics.
func (s *Sensor) ideal() bool {
	return s.PawLag == 0 && s.FlowLag == 0 && s.FlowDelay == 0 && s.PawDelay == 0
}

// Change is one event on a scenario's timeline: from At, the settings in
// Set (keys as in Settings' YAML names) move to their new values, linearly
// over Ramp or at once; Mode switches the mode; Disconnect opens the
// circuit for that long. A ramp starts from the value in effect at At.
type Change struct {
	At         time.Duration      `yaml:"at"`
	Ramp       time.Duration      `yaml:"ramp"`
	Set        map[string]float64 `yaml:"set"`
	Mode       Mode               `yaml:"mode"`
	Disconnect time.Duration      `yaml:"disconnect"`
}

// Scenario is an invented simulated patient and what happens to them.
type Scenario struct {
	Name        string            `yaml:"name"`
	Description string            `yaml:"description"`
	Seed        uint64            `yaml:"seed"`
	RateHz      float64           `yaml:"rate_hz"`  // samples per second; default 100
	Duration    time.Duration     `yaml:"duration"` // default 10 min
	Patient     mechanics.Patient `yaml:"patient"`
	Settings    Settings          `yaml:"settings"`
	Sensor      Sensor            `yaml:"sensor"`
	Timeline    []Change          `yaml:"timeline"`
}

// Defaults fills unset fields: 100 Hz, 10 minutes, 2 printed digits, a
// 25 % cycle, a 2 L/min trigger, a 60 ms trigger delay and a 3 s longest
// pressure-support inspiration.
func (sc *Scenario) Defaults() {
	if sc.RateHz == 0 {
		sc.RateHz = 100
	}
	if sc.Duration == 0 {
		sc.Duration = 10 * time.Minute
	}
	if sc.Sensor.Digits == 0 {
		sc.Sensor.Digits = 2
	}
	if sc.Settings.Cycle == 0 {
		sc.Settings.Cycle = 0.25
	}
	if sc.Settings.Trigger == 0 {
		sc.Settings.Trigger = 2
	}
	if sc.Settings.TriggerDelay == 0 {
		sc.Settings.TriggerDelay = 0.06
	}
	if sc.Settings.MaxTi == 0 {
		sc.Settings.MaxTi = 3
	}
	if sc.Settings.Flow == "" {
		sc.Settings.Flow = "constant"
	}
}

// Validate checks the scenario and every point of its timeline.
func (sc *Scenario) Validate() error {
	if sc.RateHz < 10 || sc.RateHz > 1000 {
		return keyErr("rate_hz", fmt.Errorf("%g out of range (10…1000)", sc.RateHz))
	}
	if sc.Duration < 0 {
		return keyErr("duration", errors.New("negative"))
	}
	if sc.Sensor.PawNoise < 0 || sc.Sensor.FlowNoise < 0 || sc.Sensor.Digits < 0 || sc.Sensor.Digits > 6 {
		return keyErr("sensor", errors.New("noise must not be negative, digits 0…6"))
	}
	for _, v := range []float64{sc.Sensor.PawLag, sc.Sensor.FlowLag, sc.Sensor.FlowDelay, sc.Sensor.PawDelay} {
		if math.IsNaN(v) || v < 0 || v > 0.2 {
			return keyErr("sensor", errors.New("lags and delays must be 0…0.2 s"))
		}
	}
	if sc.Patient.Sex != "" || sc.Patient.HeightCm != 0 {
		if _, err := mechanics.PredictedBodyWeight(sc.Patient.Sex, sc.Patient.HeightCm); err != nil {
			return keyErr("patient", err)
		}
	}
	if err := sc.Settings.Validate(); err != nil {
		return keyErr("settings", err)
	}
	if !sort.SliceIsSorted(sc.Timeline, func(i, j int) bool { return sc.Timeline[i].At < sc.Timeline[j].At }) {
		return keyErr("timeline", errors.New("changes must be in order of at"))
	}
	probe := *sc
	for i, ch := range sc.Timeline {
		if ch.At < 0 || ch.Ramp < 0 || ch.Disconnect < 0 {
			return &PathError{Path: []any{"timeline", i}, Err: errors.New("negative time")}
		}
		for k := range ch.Set {
			if _, ok := probe.Settings.numeric()[k]; !ok {
				return &PathError{Path: []any{"timeline", i, "set", k}, Err: fmt.Errorf("unknown setting (one of %s)", settingNames())}
			}
		}
		probe.Settings = sc.settingsAt(ch.At + ch.Ramp)
		if err := probe.Settings.Validate(); err != nil {
			return &PathError{Path: []any{"timeline", i}, Err: fmt.Errorf("the settings from %v: %w", ch.At, err)}
		}
	}
	return nil
}

func settingNames() string {
	var s Settings
	names := make([]string, 0, 16)
	for k := range s.numeric() {
		names = append(names, k)
	}
	sort.Strings(names)
	return strings.Join(names, ", ")
}

// settingsAt returns the settings in effect at time t.
func (sc *Scenario) settingsAt(t time.Duration) Settings {
	cur := sc.Settings
	vals := cur.numeric()
	for _, ch := range sc.Timeline {
		if t < ch.At {
			break
		}
		frac := 1.0
		if ch.Ramp > 0 && t < ch.At+ch.Ramp {
			frac = float64(t-ch.At) / float64(ch.Ramp)
		}
		for k, v := range ch.Set {
			if p, ok := vals[k]; ok {
				*p += (v - *p) * frac
			}
		}
		if ch.Mode != "" {
			cur.Mode = ch.Mode
		}
	}
	return cur
}

// disconnectedAt reports whether the circuit is open at time t.
func (sc *Scenario) disconnectedAt(t time.Duration) bool {
	for _, ch := range sc.Timeline {
		if ch.Disconnect > 0 && t >= ch.At && t < ch.At+ch.Disconnect {
			return true
		}
	}
	return false
}
