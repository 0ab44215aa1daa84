package alerts

import (
	"fmt"
	"math"
	"strconv"
	"strings"
	"time"

	"breathd/mechanics"
)

// Transition is what happened to a rule.
type Transition string

// Transitions of a rule.
const (
	Raised       Transition = "raised"
	Cleared      Transition = "cleared"
	Acknowledged Transition = "acknowledged"
)

// Tech is a device's technical state, given to Tick. A NaN field is not
// known at this tick and changes nothing; the yes/no fields are 1 or 0.
type Tech struct {
	SinceSample float64 // time since the last sample, s
	SinceBreath float64 // time since the last breath while samples arrive, s
	CircuitOpen float64 // 1: pressure near zero without flow
	BadPerMin   float64 // bad lines over the last minute
	RateError   float64 // |seen − configured| / configured sample rate, %
	PortLost    float64 // 1: the serial port is gone
	// FormatSuspect is 1 when the numbers look like a format read wrongly
	// (flow in L/s taken for L/min, a reversed flow sign, …)
	FormatSuspect float64
}

// Unknown is a Tech with every field NaN.
func Unknown() Tech {
	n := math.NaN()
	return Tech{n, n, n, n, n, n, n}
}

// Event is one transition of one rule.
type Event struct {
	ID         string     // device/rule/run-seq, unique per device and run
	Seq        int64      // the device's event number in this run
	Device     string     // device id
	Rule       string     // rule id
	Transition Transition // raised, cleared or acknowledged
	Level      Level      // notice, warning or urgent
	Field      string     // the field the rule watches
	Value      float64    // its value at the transition (NaN for an acknowledgement)
	Threshold  float64    // above/below: the threshold; outside: NaN
	Low, High  float64    // outside: the band; else NaN
	Latching   bool       // the rule stays raised until acknowledged
	T          float64    // stream time, s
	At         time.Time  // wall-clock time
}

// Active is a rule raised now.
type Active struct {
	Rule     string
	Level    Level
	Field    string
	EventID  string    // the raising event's id, for Ack
	Since    float64   // stream time raised, s
	SinceAt  time.Time // wall-clock time raised
	Value    float64   // the latest value evaluated
	Acked    bool      // acknowledged, still raised
	Latching bool
}

type state struct {
	r        Rule
	kind     int
	index    int    // breath field index, or field index for median./iqr.
	rolling  string // the rolling name without its statistic
	raised   bool
	acked    bool
	pending  bool // latching: its cause has cleared, waiting for the acknowledgement
	hold     int
	since    float64 // stream time the condition began to hold; NaN when not
	clear    int
	eventID  string
	raisedT  float64
	raisedAt time.Time
	last     float64
}

// Engine evaluates one device's rules. It is not safe for concurrent use.
type Engine struct {
	device string
	run    string
	rules  []state
	seq    int64
	vals   []float64
	out    []Event
	trend  bool // some rule needs the rolling window
}

// NewEngine compiles the rules that are not off for a device. run
// distinguishes this run's event ids from earlier runs' (e.g. the start
// time in base 36).
func NewEngine(device, run string, rules []Rule) (*Engine, error) {
	e := &Engine{device: device, run: run, vals: make([]float64, 0, mechanics.NumFields), out: make([]Event, 0, 8)}
	for _, r := range rules {
		if r.Off {
			continue
		}
		if err := r.Validate(); err != nil {
			return nil, err
		}
		kind, _ := fieldKind(r.Field)
		st := state{r: r, kind: kind, index: -1, since: math.NaN(), last: math.NaN()}
		switch kind {
		case kindBreath:
			st.index = mechanics.FieldIndex(r.Field)
		case kindRolling:
			e.trend = true
			if stat, f, ok := strings.Cut(r.Field, "."); ok && (stat == "median" || stat == "iqr") {
				st.index, st.rolling = mechanics.FieldIndex(f), stat
			} else {
				st.rolling = r.Field
			}
		}
		e.rules = append(e.rules, st)
	}
	return e, nil
}

var iPeak, iPlat = mechanics.FieldIndex("ppeak"), mechanics.FieldIndex("pplat")

// Breath evaluates the breath and rolling rules on a breath and returns
// the transitions, valid until the next call. A value the breath's flags
// disown (mechanics.Breath.Untrusted) is null to the rules. w may be nil
// (rolling rules then see null). It allocates only for the events it
// returns.
func (e *Engine) Breath(b *mechanics.Breath, w *mechanics.Window, wall time.Time) []Event {
	e.out = e.out[:0]
	e.vals = b.TrustedValues(e.vals[:0]) // a value its flags disown changes nothing
	var tr *mechanics.Trend
	if e.trend && w != nil {
		tr = w.Trend()
	}
	for i := range e.rules {
		st := &e.rules[i]
		var v float64
		switch st.kind {
		case kindTech:
			continue
		case kindBreath:
			v = e.vals[st.index]
		case kindDerived: // peak_plateau_gap
			v = e.vals[iPeak] - e.vals[iPlat]
		case kindRolling:
			v = rolling(st, tr)
		}
		e.step(st, v, b.TEnd, wall)
	}
	return e.out
}

func rolling(st *state, tr *mechanics.Trend) float64 {
	if tr == nil {
		return math.NaN()
	}
	switch st.rolling {
	case "median":
		return tr.StatAt(st.index).Median
	case "iqr":
		return tr.StatAt(st.index).IQR()
	case "slope.compliance":
		return tr.CSlope
	case "slope.dp":
		return tr.DPSlope
	case "compliance_change":
		return tr.CChange
	case "rise.peak":
		return tr.Rise.PeakRise
	case "rise.resistive":
		return tr.Rise.ResistiveRise
	case "rise.elastic":
		return tr.Rise.ElasticRise
	case "asynchrony_index":
		return tr.Asynchrony.Index()
	}
	return math.NaN()
}

// Tick evaluates the technical rules at stream time t and returns the
// transitions, valid until the next call.
func (e *Engine) Tick(tech Tech, t float64, wall time.Time) []Event {
	e.out = e.out[:0]
	for i := range e.rules {
		st := &e.rules[i]
		if st.kind != kindTech {
			continue
		}
		e.step(st, techValue(st.r.Field, &tech), t, wall)
	}
	return e.out
}

func techValue(field string, t *Tech) float64 {
	switch field {
	case "no_samples":
		return t.SinceSample
	case "no_breaths":
		return t.SinceBreath
	case "circuit_open":
		return t.CircuitOpen
	case "bad_lines":
		return t.BadPerMin
	case "sample_rate_off":
		return t.RateError
	case "port_lost":
		return t.PortLost
	case "format_suspect":
		return t.FormatSuspect
	}
	return math.NaN()
}

// violates says whether v meets the rule's condition.
func violates(r *Rule, v float64) bool {
	switch r.Compare {
	case Above:
		return v > r.Threshold
	case Below:
		return v < r.Threshold
	}
	return v < r.Low || v > r.High
}

// back says whether v is past the hysteresis margin on the good side.
func back(r *Rule, v float64) bool {
	switch r.Compare {
	case Above:
		return v < r.Threshold-r.Hysteresis
	case Below:
		return v > r.Threshold+r.Hysteresis
	}
	return v > r.Low+r.Hysteresis && v < r.High-r.Hysteresis
}

// step is the rule's state machine for one evaluation. A null value
// changes nothing.
func (e *Engine) step(st *state, v, t float64, wall time.Time) {
	if math.IsNaN(v) {
		return
	}
	r := &st.r
	st.last = v
	if !st.raised {
		if !violates(r, v) {
			st.hold, st.since = 0, math.NaN()
			return
		}
		st.hold++
		if math.IsNaN(st.since) {
			st.since = t
		}
		if st.hold >= r.RaiseAfter && t-st.since >= r.RaiseAfterSec {
			st.raised, st.acked, st.pending, st.clear = true, false, false, 0
			st.raisedT, st.raisedAt = t, wall
			ev := e.emit(st, Raised, v, t, wall)
			st.eventID = ev.ID
		}
		return
	}
	if !back(r, v) {
		st.clear = 0 // in the band or still violating: not a good evaluation
		if violates(r, v) {
			st.pending = false
		}
		return
	}
	st.clear++
	if st.clear < r.ClearAfter {
		return
	}
	if r.Latching && !st.acked {
		st.pending = true
		return
	}
	e.clearRule(st, v, t, wall)
}

func (e *Engine) clearRule(st *state, v, t float64, wall time.Time) {
	st.raised, st.acked, st.pending, st.hold, st.clear, st.since = false, false, false, 0, 0, math.NaN()
	e.emit(st, Cleared, v, t, wall)
}

func (e *Engine) emit(st *state, transition Transition, v, t float64, wall time.Time) *Event {
	e.seq++
	r := &st.r
	ev := Event{Seq: e.seq, Device: e.device, Rule: r.ID, Transition: transition, Level: r.Level, Field: r.Field,
		Value: v, Threshold: r.Threshold, Low: math.NaN(), High: math.NaN(), Latching: r.Latching, T: t, At: wall}
	if r.Compare == Outside {
		ev.Threshold, ev.Low, ev.High = math.NaN(), r.Low, r.High
	}
	ev.ID = e.device + "/" + r.ID + "/" + e.run + "-" + strconv.FormatInt(e.seq, 10)
	e.out = append(e.out, ev)
	return &e.out[len(e.out)-1]
}

// Ack acknowledges the raised rule whose raising event has id. A latching
// rule whose cause has already cleared then clears; otherwise it stays
// raised and clears by itself once its cause is gone. The events are valid
// until the next call.
func (e *Engine) Ack(id string, t float64, wall time.Time) ([]Event, error) {
	e.out = e.out[:0]
	for i := range e.rules {
		st := &e.rules[i]
		if !st.raised || st.eventID != id {
			continue
		}
		if st.acked {
			return e.out, fmt.Errorf("%w: %q", ErrAcknowledged, id) // nothing new
		}
		st.acked = true
		e.emit(st, Acknowledged, math.NaN(), t, wall)
		if st.pending {
			e.clearRule(st, st.last, t, wall)
		}
		return e.out, nil
	}
	return e.out, fmt.Errorf("%w: %q", ErrUnknownEvent, id)
}

// Active lists the rules raised now, in rule order.
func (e *Engine) Active() []Active {
	var out []Active
	for i := range e.rules {
		st := &e.rules[i]
		if st.raised {
			out = append(out, Active{Rule: st.r.ID, Level: st.r.Level, Field: st.r.Field, EventID: st.eventID,
				Since: st.raisedT, SinceAt: st.raisedAt, Value: st.last, Acked: st.acked, Latching: st.r.Latching})
		}
	}
	return out
}
