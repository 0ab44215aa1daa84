// Package payload is the output contract: the JSON payloads breathd
// publishes (breath, trend, event, active, status), the CSV of breaths
// that analyze writes, and the counters they print. Every payload is one
// JSON object carrying "v" (Version), the device, and "at" (RFC 3339, UTC);
// a value that was not computed is null. The encoders are pure: the same
// inputs give the same bytes, which the golden files in testdata hold.
package payload

import (
	"encoding/json"
	"math"
	"time"

	"breathd/alerts"
	"breathd/mechanics"
	"breathd/stream"
	"breathd/stream/lines"
)

// Version is the "v" of every JSON payload.
const Version = 2

var nanValue = math.NaN()

// Num is a number that encodes NaN and ±Inf as null, rounded to 4
// decimals: every number breathd writes as JSON.
type Num float64

// num is Num, as this package writes it.
type num = Num

// MarshalJSON encodes the number, or null when it is not finite.
func (n Num) MarshalJSON() ([]byte, error) {
	f := float64(n)
	if math.IsNaN(f) || math.IsInf(f, 0) {
		return []byte("null"), nil
	}
	return json.Marshal(math.Round(f*1e4) / 1e4)
}

// stamp is a wall-clock time as RFC 3339 in UTC, or null when it is not
// known (the zero time).
type stamp time.Time

// MarshalJSON encodes the time, or null.
func (t stamp) MarshalJSON() ([]byte, error) {
	if time.Time(t).IsZero() {
		return []byte("null"), nil
	}
	return json.Marshal(time.Time(t).UTC().Format(time.RFC3339Nano))
}

// eventPayload is an event transition as published and as written by
// analyze --events.
type eventPayload struct {
	V          int               `json:"v" doc:"|payload version"`
	ID         string            `json:"id" doc:"|unique id: <device>/<rule>/<run>-<seq>; an acknowledgement names it"`
	Seq        int64             `json:"seq" doc:"|transition number of this device and run"`
	Device     string            `json:"device" doc:"|device id"`
	Rule       string            `json:"rule" doc:"|the rule's id"`
	Transition alerts.Transition `json:"transition" doc:"|raised, cleared or acknowledged"`
	Level      alerts.Level      `json:"level" doc:"|notice, warning or urgent"`
	Field      string            `json:"field" doc:"|the field the rule watches"`
	Value      num               `json:"value" doc:"|the field's value at the transition, in its unit"`
	Threshold  num               `json:"threshold" doc:"|the threshold of an above or below rule"`
	Low        num               `json:"low" doc:"|the band's low end of an outside rule"`
	High       num               `json:"high" doc:"|the band's high end of an outside rule"`
	Latching   bool              `json:"latching" doc:"|stays raised until acknowledged"`
	T          num               `json:"t" doc:"s|stream time of the transition"`
	At         stamp             `json:"at" doc:"|wall-clock time of the transition (RFC 3339, UTC)"`
}

// Event encodes an event as its JSON payload (one line, no newline).
func Event(ev *alerts.Event) []byte {
	p := eventPayload{V: Version, ID: ev.ID, Seq: ev.Seq, Device: ev.Device, Rule: ev.Rule,
		Transition: ev.Transition, Level: ev.Level, Field: ev.Field, Value: num(ev.Value),
		Threshold: num(ev.Threshold), Low: num(ev.Low), High: num(ev.High), Latching: ev.Latching,
		T: num(ev.T), At: stamp(ev.At)}
	b, _ := json.Marshal(p)
	return b
}

// Breath encodes a breath record (BreathKeys): "v", device, run, seq, "at"
// (the wall-clock time of its start, b.At; null when unknown), the fields
// of mechanics.Fields() under their names (null when not computed),
// flags and asynchrony.
func Breath(device, run string, b *mechanics.Breath) []byte {
	var vals [mechanics.NumFields]float64
	v := b.Values(vals[:0])
	m := make(map[string]any, len(v)+6)
	m["v"], m["device"], m["run"], m["seq"], m["at"] = Version, device, run, b.Seq, stamp(b.At)
	for i, f := range mechanics.Fields() {
		m[f.Name] = num(v[i])
	}
	m["flags"], m["asynchrony"] = array(b.Flags.Words()), array(b.Asynchrony.Words())
	out, _ := json.Marshal(m)
	return out
}

// array is words as a JSON array, [] for none.
func array(words []string) []string {
	if words == nil {
		return []string{}
	}
	return words
}

type statPayload struct {
	Median num `json:"median" doc:"|median of the window's values, in the field's unit"`
	Q1     num `json:"q1" doc:"|first quartile"`
	Q3     num `json:"q3" doc:"|third quartile"`
	IQR    num `json:"iqr" doc:"|q3 − q1"`
	N      int `json:"n" doc:"|values counted (those no flag disowns)"`
}

type risePayload struct {
	Cause           string `json:"cause"`
	Method          string `json:"method"`
	Peak            num    `json:"peak"`
	Resistive       num    `json:"resistive"`
	Elastic         num    `json:"elastic"`
	BaselineBreaths int    `json:"baseline_breaths"`
}

// trendPayload is the rolling window as published.
type trendPayload struct {
	V                int                    `json:"v" doc:"|payload version"`
	Device           string                 `json:"device" doc:"|device id"`
	Seq              int64                  `json:"seq" doc:"|the seq of the breath after which the window was computed"`
	At               stamp                  `json:"at" doc:"|wall-clock time of the computation"`
	T                num                    `json:"t" doc:"s|stream time of the window's end"`
	Breaths          int                    `json:"breaths" doc:"|breaths in the window (the last 20 within 5 min)"`
	Span             num                    `json:"span" doc:"s|time the window's breaths span"`
	Fields           map[string]statPayload `json:"fields" doc:"|per breath field: median, q1, q3, iqr and n (see trend_stat)"`
	ComplianceSlope  num                    `json:"compliance_slope" doc:"mL/cm[H2O]/h|slope of cstat (or of reliable fit_c) over the last 15 min of breaths; null until they span 10 min"`
	DPSlope          num                    `json:"dp_slope" doc:"cm[H2O]/h|slope of dp over the last 15 min of breaths; null until they span 10 min"`
	ComplianceChange num                    `json:"compliance_change" doc:"%|the window's median compliance against the 30 min before it"`
	NetFlow          num                    `json:"net_flow" doc:"L/min|median (vti − vte)/duration: the flow sensor's drift, or a leak"`
	Rise             risePayload            `json:"rise" doc:"|why the peak pressure rose: cause (none, resistive, elastic, both), method, peak, resistive and elastic rises in cm[H2O], baseline_breaths"`
	Asynchrony       tallyPayload           `json:"asynchrony" doc:"|the window's patient–ventilator asynchrony: index, events, cycles, counts by type (see asynchrony_tally)"`
	AsynchronyPeriod *tallyPayload          `json:"asynchrony_period" doc:"|the same over the last complete fixed 10-minute period of stream time (from 0 s); null before one has ended"`
}

// tallyPayload is an asynchrony tally as published.
type tallyPayload struct {
	Index  num            `json:"index" doc:"%|asynchrony index: events / (cycles + ineffective efforts) × 100; null under 10 cycles"`
	Events int            `json:"events" doc:"|asynchrony events: each word of each breath once, ineffective efforts by their number"`
	Cycles int            `json:"cycles" doc:"|ventilator cycles (breaths)"`
	Counts map[string]int `json:"counts" doc:"|events by type, under the words of the breath's asynchrony"`
	Start  num            `json:"start" doc:"s|stream time of the first breath's start (a period: its start)"`
	End    num            `json:"end" doc:"s|stream time of the last breath's end (a period: its end)"`
}

func tallyOf(a *mechanics.Tally) tallyPayload {
	counts := make(map[string]int, mechanics.NumAsynchronies)
	for i, n := range a.Counts {
		counts[mechanics.AsynchronyWord(i)] = n
	}
	start, end := num(a.Start), num(a.End)
	if a.Cycles == 0 {
		start, end = num(math.NaN()), num(math.NaN())
	}
	return tallyPayload{num(a.Index()), a.Events(), a.Cycles, counts, start, end}
}

// Trend encodes the rolling window summary after breath seq.
func Trend(device string, seq int64, tr *mechanics.Trend, at time.Time) []byte {
	fields := make(map[string]statPayload, mechanics.NumFields)
	for i, f := range mechanics.Fields() {
		s := tr.StatAt(i)
		fields[f.Name] = statPayload{num(s.Median), num(s.Q1), num(s.Q3), num(s.IQR()), s.N}
	}
	r := tr.Rise
	var period *tallyPayload
	if tr.HasPeriod {
		p := tallyOf(&tr.Period)
		period = &p
	}
	out, _ := json.Marshal(trendPayload{Version, device, seq, stamp(at), num(tr.At), tr.N, num(tr.Span), fields,
		num(tr.CSlope), num(tr.DPSlope), num(tr.CChange), num(tr.NetFlow),
		risePayload{r.Cause, r.Method, num(r.PeakRise), num(r.ResistiveRise), num(r.ElasticRise), r.BaselineBreaths},
		tallyOf(&tr.Asynchrony), period})
	return out
}

type activePayload struct {
	Rule     string       `json:"rule" doc:"|the rule's id"`
	Level    alerts.Level `json:"level" doc:"|notice, warning or urgent"`
	Field    string       `json:"field" doc:"|the field it watches"`
	EventID  string       `json:"event_id" doc:"|the id of the event that raised it: what an acknowledgement names"`
	Since    num          `json:"since_t" doc:"s|stream time it was raised"`
	SinceAt  stamp        `json:"since_at" doc:"|wall-clock time it was raised"`
	Value    num          `json:"value" doc:"|the field's latest value"`
	Acked    bool         `json:"acknowledged" doc:"|acknowledged (a latching rule still raised)"`
	Latching bool         `json:"latching" doc:"|stays raised until acknowledged"`
}

// Active encodes the set of rules raised now.
func Active(device string, seq int64, active []alerts.Active, at time.Time) []byte {
	list := make([]activePayload, 0, len(active))
	for _, a := range active {
		list = append(list, activePayload{a.Rule, a.Level, a.Field, a.EventID, num(a.Since),
			stamp(a.SinceAt), num(a.Value), a.Acked, a.Latching})
	}
	out, _ := json.Marshal(struct {
		V      int             `json:"v"`
		Device string          `json:"device"`
		Seq    int64           `json:"seq"`
		At     stamp           `json:"at"`
		Active []activePayload `json:"active"`
	}{Version, device, seq, stamp(at), list})
	return out
}

// Source says which breathd publishes a device: its run, host, start and
// version. Two sources for one device on one broker are a mistake that
// the status lets the publishers see.
type Source struct {
	Run     string    // random, made at start
	Host    string    // the machine's name
	Since   time.Time // when the run started
	Version string    // breathd's version
}

// Status encodes the device's status: online or offline, its source, its
// counters and the advisory notice.
func Status(device string, seq int64, state, reason string, src Source, st stream.Status, pc Counters, at time.Time) []byte {
	bad := make(map[string]int64, lines.NumCauses)
	for i, n := range st.Counts.Bad {
		bad[lines.Cause(i).String()] = n
	}
	counters := map[string]any{
		"samples": st.Counts.Samples, "bad_lines": bad, "gaps": st.Counts.Gaps, "breaths": st.Breaths,
		"breaths_dropped": map[string]int64{"gap": st.Drops.Gap, "open_circuit": st.Drops.Open, "too_long": st.Drops.TooLong},
		"events":          st.Events, "queue_depth": pc.QueueDepth, "records_dropped": pc.Dropped, "messages_sent": pc.Sent,
		"reconnects": pc.Reconnects, "acks": pc.Acks, "acks_refused": pc.AcksRefused, "events_not_on_disk": pc.Unqueued,
		"rate_hz": num(st.Counts.RateHz()),
		// the flow channel's delay behind the pressure channel, as
		// estimated (or configured) and as the channels are aligned by, s
		"flow_delay": num(st.Channels.Delay), "flow_delay_aligned": num(st.Channels.Aligned),
		"flow_delay_fixed": st.Channels.Fixed,
		"paw_noise":        num(st.Channels.PawSD), "flow_noise": num(st.Channels.FlowSD),
	}
	if st.HasHealth {
		counters["port_connected"], counters["port_outages"] = st.Health.Connected, st.Health.Outages
	}
	if st.Recorded {
		counters["recording_files"], counters["recording_write_errors"] = st.Recording.Files, st.Recording.WriteErrors
	}
	counters["queue_last_error"] = pc.QueueError
	out, _ := json.Marshal(statusPayload{Version, device, seq, state, reason, stamp(at), src.Run, src.Host, stamp(src.Since), src.Version, st.Hint, stream.Advisory, counters})
	return out
}

// statusPayload is the status as published.
type statusPayload struct {
	V        int            `json:"v" doc:"|payload version"`
	Device   string         `json:"device" doc:"|device id"`
	Seq      int64          `json:"seq" doc:"|status number of this run"`
	State    string         `json:"state" doc:"|online or offline"`
	Reason   string         `json:"reason,omitempty" doc:"|why offline: stopped, or connection lost (the will)"`
	At       stamp          `json:"at" doc:"|wall-clock time of the status"`
	Run      string         `json:"run,omitempty" doc:"|random id of this breathd run"`
	Host     string         `json:"host,omitempty" doc:"|the machine's name"`
	Since    stamp          `json:"since" doc:"|when the run started"`
	Version  string         `json:"version,omitempty" doc:"|breathd's version"`
	Hint     string         `json:"format_hint" doc:"|a plausibility check's advice when the stream looks decoded with wrong units or sign; empty when none"`
	Advisory string         `json:"advisory" doc:"|the advisory notice"`
	Counters map[string]any `json:"counters" doc:"|the device's counters (see counters)"`
}

// wavePayload is a second of the downsampled waveform.
type wavePayload struct {
	V      int    `json:"v" doc:"|payload version"`
	Device string `json:"device" doc:"|device id"`
	Run    string `json:"run" doc:"|random id of this breathd run"`
	T0     Num    `json:"t0" doc:"s|stream time of the first point"`
	Hz     int    `json:"hz" doc:"Hz|points per second (40 ms means of the samples)"`
	Paw    []Num  `json:"paw" doc:"cm[H2O]|airway pressure, a point every 1/hz s"`
	Flow   []Num  `json:"flow" doc:"L/min|flow into the patient, a point every 1/hz s"`
}

// Wave encodes points of the waveform, from stream time t0 at hz.
func Wave(device, run string, t0 float64, hz int, paw, flow []float64) []byte {
	p := wavePayload{V: Version, Device: device, Run: run, T0: Num(t0), Hz: hz, Paw: make([]Num, len(paw)), Flow: make([]Num, len(flow))}
	for i := range paw {
		p.Paw[i], p.Flow[i] = Num(paw[i]), Num(flow[i])
	}
	out, _ := json.Marshal(p)
	return out
}

// Will is the status a broker publishes when the device's publisher is
// lost: the state, the reason and the device, nothing that would be stale
// by then (no counters, no time).
func Will(device, reason string) []byte {
	out, _ := json.Marshal(struct {
		V      int    `json:"v"`
		Device string `json:"device"`
		State  string `json:"state"`
		Reason string `json:"reason"`
	}{Version, device, "offline", reason})
	return out
}

// Counters are a publisher's own counts, for the status payload.
type Counters struct {
	QueueDepth, Dropped, Sent, Reconnects, Acks, AcksRefused, Unqueued int64
	QueueError                                                         string // the durable queue's latest disk error, "" when none
}
