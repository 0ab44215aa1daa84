package payload

import (
	"encoding/json"
	"reflect"
	"strings"
	"time"

	"breathd/alerts"
	"breathd/mechanics"
	"breathd/stream"
)

// Entry describes one field of a payload or one CSV column: the data
// dictionary's row. It is generated, never written by hand: the per-breath
// fields from mechanics.Fields(), the flags from mechanics.FlagInfo(), the
// payloads' own fields from their structs' json and doc tags.
type Entry struct {
	Name    string `json:"name"`
	Unit    string `json:"unit,omitempty"` // UCUM; "1" for a ratio
	Type    string `json:"type"`           // integer, number, string, boolean, datetime, array, object
	Meaning string `json:"meaning"`
	Null    string `json:"null,omitempty"` // when the value is null
}

// The columns and keys around the registry's fields.
var (
	entrySeq    = Entry{Name: "seq", Type: "integer", Meaning: "breath number since the device started"}
	entryFlags  = Entry{Name: "flags", Type: "array", Meaning: "the flags of the breath (see flags); in the CSV, words separated by spaces"}
	entryAsy    = Entry{Name: "asynchrony", Type: "array", Meaning: "the patient–ventilator asynchronies found in and just before the breath (see asynchrony); in the CSV, words separated by spaces"}
	entryAt     = Entry{Name: "at", Type: "datetime", Meaning: "wall-clock time of the breath's start (RFC 3339, UTC), from the recording's clock lines or the time a live source's first sample was read", Null: "when the stream has no clock"}
	entryDevice = Entry{Name: "device", Type: "string", Meaning: "device id"}
	entryRun    = Entry{Name: "run", Type: "string", Meaning: "random id of the breathd run (or analysis) that computed the record; seq starts again with each run"}
	entryV      = Entry{Name: "v", Type: "integer", Meaning: "payload version"}
)

// breathFields are the registry's per-breath fields as dictionary entries.
func breathFields() []Entry {
	var out []Entry
	for _, f := range mechanics.Fields() {
		null := "not computed for this breath"
		if w := f.DisownedBy.Words(); len(w) > 0 {
			null += "; published but not taken as the lung's under " + strings.Join(w, ", ")
		}
		out = append(out, Entry{Name: f.Name, Unit: f.Unit, Type: "number", Meaning: f.Meaning, Null: null})
	}
	return out
}

// CSVColumns are the columns of the breath CSV, in order.
func CSVColumns() []Entry {
	cols := append([]Entry{entrySeq}, breathFields()...)
	flags, asy := entryFlags, entryAsy
	flags.Type, asy.Type = "string", "string"
	return append(cols, flags, asy, entryAt, entryDevice, entryRun)
}

// BreathKeys are the keys of the breath payload.
func BreathKeys() []Entry {
	return append(append([]Entry{entryV, entryDevice, entryRun, entrySeq, entryAt}, breathFields()...), entryFlags, entryAsy)
}

// Dict is the data dictionary: every field breathd writes, with its unit,
// type, meaning and null rule.
type Dict struct {
	V         int     `json:"v"`
	Version   string  `json:"version"` // breathd's
	Quantiles string  `json:"quantiles"`
	Breath    []Entry `json:"breath"`
	Flags     []Entry `json:"flags"`
	// Asynchrony lists the words of a breath's asynchrony
	Asynchrony []Entry `json:"asynchrony"`
	// AsynchronyTally is the object under trend.asynchrony and
	// trend.asynchrony_period
	AsynchronyTally []Entry `json:"asynchrony_tally"`
	CSV             []Entry `json:"csv"`
	Trend           []Entry `json:"trend"`
	TrendStat       []Entry `json:"trend_stat"` // the object under trend.fields.<field>
	Event           []Entry `json:"event"`
	Active          []Entry `json:"active"` // each element of active.active
	Status          []Entry `json:"status"`
	Counters        []Entry `json:"counters"` // status.counters
	Wave            []Entry `json:"wave"`     // the opt-in waveform topic
}

// Dictionary returns the data dictionary of this version of breathd.
func Dictionary(version string) Dict {
	d := Dict{V: Version, Version: version,
		Quantiles: "median, q1 and q3 interpolate linearly between the order statistics (Hyndman–Fan type 7); iqr is q3 − q1; n counts the values no flag disowns",
		Breath:    BreathKeys(), CSV: CSVColumns(),
		Trend: entriesOf(trendPayload{}), TrendStat: entriesOf(statPayload{}), AsynchronyTally: entriesOf(tallyPayload{}),
		Event: entriesOf(eventPayload{}), Active: entriesOf(activePayload{}),
		Status: entriesOf(statusPayload{}), Counters: counterEntries, Wave: entriesOf(wavePayload{})}
	for name, meaning := range mechanics.FlagInfo() {
		d.Flags = append(d.Flags, Entry{Name: name, Type: "string", Meaning: meaning})
	}
	for name, meaning := range mechanics.AsynchronyInfo() {
		d.Asynchrony = append(d.Asynchrony, Entry{Name: name, Type: "string", Meaning: meaning})
	}
	return d
}

// entriesOf lists a payload struct's fields from their json and doc tags
// ("unit|meaning").
func entriesOf(v any) []Entry {
	t := reflect.TypeOf(v)
	var out []Entry
	for i := range t.NumField() {
		f := t.Field(i)
		name, _, _ := strings.Cut(f.Tag.Get("json"), ",")
		if name == "" || name == "-" {
			continue
		}
		unit, meaning, _ := strings.Cut(f.Tag.Get("doc"), "|")
		e := Entry{Name: name, Unit: unit, Meaning: meaning, Type: jsonType(f.Type)}
		switch f.Type {
		case reflect.TypeFor[num]():
			e.Null = "not computed"
		case reflect.TypeFor[stamp]():
			e.Null = "when the wall-clock time is unknown"
		}
		out = append(out, e)
	}
	return out
}

func jsonType(t reflect.Type) string {
	switch {
	case t == reflect.TypeFor[stamp]():
		return "datetime"
	case t == reflect.TypeFor[num]():
		return "number"
	}
	switch t.Kind() {
	case reflect.Int, reflect.Int64:
		return "integer"
	case reflect.Float64:
		return "number"
	case reflect.Bool:
		return "boolean"
	case reflect.String:
		return "string"
	case reflect.Slice:
		return "array"
	}
	return "object"
}

// counterEntries document the status payload's counters; a test holds
// them to the keys Status writes.
var counterEntries = []Entry{
	{Name: "samples", Type: "integer", Meaning: "samples decoded"},
	{Name: "bad_lines", Type: "object", Meaning: "lines skipped, by cause"},
	{Name: "gaps", Type: "integer", Meaning: "time steps over the gap limit"},
	{Name: "breaths", Type: "integer", Meaning: "breaths completed"},
	{Name: "breaths_dropped", Type: "object", Meaning: "breaths in progress dropped: gap, open_circuit, too_long"},
	{Name: "events", Type: "integer", Meaning: "rule transitions"},
	{Name: "queue_depth", Type: "integer", Meaning: "messages waiting to be published"},
	{Name: "records_dropped", Type: "integer", Meaning: "breath records and trends not published (broker away or queue full)"},
	{Name: "messages_sent", Type: "integer", Meaning: "messages the broker took"},
	{Name: "reconnects", Type: "integer", Meaning: "reconnections to the broker"},
	{Name: "acks", Type: "integer", Meaning: "acknowledgements taken"},
	{Name: "acks_refused", Type: "integer", Meaning: "acknowledgements refused (not a raised latching rule's event)"},
	{Name: "events_not_on_disk", Type: "integer", Meaning: "events kept in memory only because the state directory could not take them"},
	{Name: "rate_hz", Unit: "Hz", Type: "number", Meaning: "sample rate measured over the continuous stream", Null: "before two samples"},
	{Name: "flow_delay", Unit: "s", Type: "number", Meaning: "the flow channel's delay behind the pressure channel, as estimated or configured", Null: "before an estimate"},
	{Name: "flow_delay_aligned", Unit: "s", Type: "number", Meaning: "the delay the channels are aligned by"},
	{Name: "flow_delay_fixed", Type: "boolean", Meaning: "the delay is configured, not estimated"},
	{Name: "paw_noise", Unit: "cm[H2O]", Type: "number", Meaning: "pressure noise, standard deviation", Null: "before an estimate"},
	{Name: "flow_noise", Unit: "L/min", Type: "number", Meaning: "flow noise, standard deviation", Null: "before an estimate"},
	{Name: "port_connected", Type: "boolean", Meaning: "a serial source is delivering (serial sources only)"},
	{Name: "port_outages", Type: "integer", Meaning: "times a serial source was lost (serial sources only)"},
	{Name: "recording_files", Type: "integer", Meaning: "raw recording files written (recording devices only)"},
	{Name: "recording_write_errors", Type: "integer", Meaning: "failed writes to the raw recording (recording devices only)"},
	{Name: "queue_last_error", Type: "string", Meaning: "the durable queue's latest disk error, empty when none"},
}

// TableSchema is the Frictionless Table Schema (an open specification for
// tabular data) of the breath CSV: every column's name, type, description
// and unit; an empty cell is a missing value.
func TableSchema() []byte {
	type field struct {
		Name        string `json:"name"`
		Type        string `json:"type"`
		Description string `json:"description"`
		Unit        string `json:"unit,omitempty"` // UCUM; a custom property of ours
	}
	var fields []field
	for _, c := range CSVColumns() {
		d := c.Meaning
		if c.Null != "" {
			d += " (empty: " + c.Null + ")"
		}
		fields = append(fields, field{Name: c.Name, Type: c.Type, Description: d, Unit: c.Unit})
	}
	out, _ := json.MarshalIndent(struct {
		Fields        []field  `json:"fields"`
		MissingValues []string `json:"missingValues"`
	}{fields, []string{""}}, "", "  ")
	return append(out, '\n')
}

// rulePayload is a rule as the meta topic states it.
type rulePayload struct {
	ID         string  `json:"id"`
	Field      string  `json:"field"`
	Compare    string  `json:"compare"`
	Threshold  num     `json:"threshold"`
	Low        num     `json:"low"`
	High       num     `json:"high"`
	Hysteresis float64 `json:"hysteresis"`
	RaiseAfter int     `json:"raise_after"`
	ClearAfter int     `json:"clear_after"`
	Level      string  `json:"level"`
	Latching   bool    `json:"latching"`
	Source     string  `json:"source,omitempty"`
}

// Meta is the retained description of a device's output: breathd's
// version, the run, the device's rules and the data dictionary.
func Meta(device, run, version string, rules []alerts.Rule, at time.Time) []byte {
	rs := make([]rulePayload, 0, len(rules))
	for _, r := range rules {
		rp := rulePayload{ID: r.ID, Field: r.Field, Compare: string(r.Compare), Threshold: num(r.Threshold), Low: num(r.Low), High: num(r.High),
			Hysteresis: r.Hysteresis, RaiseAfter: r.RaiseAfter, ClearAfter: r.ClearAfter, Level: string(r.Level), Latching: r.Latching, Source: r.Source}
		if r.Compare == alerts.Outside {
			rp.Threshold = num(nanValue)
		} else {
			rp.Low, rp.High = num(nanValue), num(nanValue)
		}
		rs = append(rs, rp)
	}
	out, _ := json.Marshal(struct {
		V          int           `json:"v"`
		Device     string        `json:"device"`
		Run        string        `json:"run"`
		Version    string        `json:"version"`
		At         stamp         `json:"at"`
		Advisory   string        `json:"advisory"`
		Rules      []rulePayload `json:"rules"`
		Dictionary Dict          `json:"dictionary"`
	}{Version, device, run, version, stamp(at), stream.Advisory, rs, Dictionary(version)})
	return out
}
