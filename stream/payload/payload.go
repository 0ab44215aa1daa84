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

// num is a number that encodes NaN and ±Inf as null.
type num float64

// MarshalJSON encodes the number, or null when it is not finite.
func (n num) MarshalJSON() ([]byte, error) {
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
	V          int               `json:"v"`
	ID         string            `json:"id"`
	Seq        int64             `json:"seq"`
	Device     string            `json:"device"`
	Rule       string            `json:"rule"`
	Transition alerts.Transition `json:"transition"`
	Level      alerts.Level      `json:"level"`
	Field      string            `json:"field"`
	Value      num               `json:"value"`
	Threshold  num               `json:"threshold"`
	Low        num               `json:"low"`
	High       num               `json:"high"`
	Latching   bool              `json:"latching"`
	T          num               `json:"t"`
	At         stamp             `json:"at"`
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

// Breath encodes a breath record: "v", device, "at" (the wall-clock time
// of its start, b.At; null when unknown), and the fields of
// mechanics.Fields() under their names (null when not computed), seq and
// flags.
func Breath(device string, b *mechanics.Breath) []byte {
	var vals [mechanics.NumFields]float64
	v := b.Values(vals[:0])
	m := make(map[string]any, len(v)+5)
	m["v"], m["device"], m["seq"], m["at"] = Version, device, b.Seq, stamp(b.At)
	for i, f := range mechanics.Fields() {
		m[f.Name] = num(v[i])
	}
	flags := b.Flags.Words()
	if flags == nil {
		flags = []string{}
	}
	m["flags"] = flags
	out, _ := json.Marshal(m)
	return out
}

type statPayload struct {
	Median num `json:"median"`
	Q1     num `json:"q1"`
	Q3     num `json:"q3"`
	IQR    num `json:"iqr"`
	N      int `json:"n"`
}

type risePayload struct {
	Cause           string `json:"cause"`
	Method          string `json:"method"`
	Peak            num    `json:"peak"`
	Resistive       num    `json:"resistive"`
	Elastic         num    `json:"elastic"`
	BaselineBreaths int    `json:"baseline_breaths"`
}

// Trend encodes the rolling window summary after breath seq.
func Trend(device string, seq int64, tr *mechanics.Trend, at time.Time) []byte {
	fields := make(map[string]statPayload, mechanics.NumFields)
	for i, f := range mechanics.Fields() {
		s := tr.StatAt(i)
		fields[f.Name] = statPayload{num(s.Median), num(s.Q1), num(s.Q3), num(s.IQR()), s.N}
	}
	r := tr.Rise
	out, _ := json.Marshal(struct {
		V                int                    `json:"v"`
		Device           string                 `json:"device"`
		Seq              int64                  `json:"seq"`
		At               stamp                  `json:"at"`
		T                num                    `json:"t"`
		Breaths          int                    `json:"breaths"`
		Span             num                    `json:"span"`
		Fields           map[string]statPayload `json:"fields"`
		ComplianceSlope  num                    `json:"compliance_slope"`
		DPSlope          num                    `json:"dp_slope"`
		ComplianceChange num                    `json:"compliance_change"`
		NetFlow          num                    `json:"net_flow"`
		Rise             risePayload            `json:"rise"`
	}{Version, device, seq, stamp(at), num(tr.At), tr.N, num(tr.Span), fields,
		num(tr.CSlope), num(tr.DPSlope), num(tr.CChange), num(tr.NetFlow),
		risePayload{r.Cause, r.Method, num(r.PeakRise), num(r.ResistiveRise), num(r.ElasticRise), r.BaselineBreaths}})
	return out
}

type activePayload struct {
	Rule     string       `json:"rule"`
	Level    alerts.Level `json:"level"`
	Field    string       `json:"field"`
	EventID  string       `json:"event_id"`
	Since    num          `json:"since_t"`
	SinceAt  stamp        `json:"since_at"`
	Value    num          `json:"value"`
	Acked    bool         `json:"acknowledged"`
	Latching bool         `json:"latching"`
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
	out, _ := json.Marshal(struct {
		V        int            `json:"v"`
		Device   string         `json:"device"`
		Seq      int64          `json:"seq"`
		State    string         `json:"state"`
		Reason   string         `json:"reason,omitempty"`
		At       stamp          `json:"at"`
		Run      string         `json:"run,omitempty"`
		Host     string         `json:"host,omitempty"`
		Since    stamp          `json:"since"`
		Version  string         `json:"version,omitempty"`
		Hint     string         `json:"format_hint"`
		Advisory string         `json:"advisory"`
		Counters map[string]any `json:"counters"`
	}{Version, device, seq, state, reason, stamp(at), src.Run, src.Host, stamp(src.Since), src.Version, st.Hint, stream.Advisory, counters})
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
