package payload

import (
	"bytes"
	"encoding/json"
	"math"
	"slices"
	"strings"
	"testing"
	"time"

	"breathd/alerts"
	"breathd/mechanics"
	"breathd/stream"
)

// TestDictionaryCoversEveryField: the data dictionary is the output as
// written — the CSV header, the breath, event, trend and status payloads'
// keys — with a meaning for each, a UCUM unit for each per-breath field,
// and a Frictionless Table Schema (specs.frictionlessdata.io/table-schema:
// types integer, number, string, datetime; missingValues) for the CSV.
// Common practice, no source.
func TestDictionaryCoversEveryField(t *testing.T) {
	d := Dictionary("test")
	names := func(es []Entry) []string {
		var out []string
		for _, e := range es {
			if e.Meaning == "" || e.Type == "" {
				t.Errorf("%s: no meaning or type", e.Name)
			}
			out = append(out, e.Name)
		}
		return out
	}
	keys := func(payload []byte) []string {
		var m map[string]any
		if err := json.Unmarshal(payload, &m); err != nil {
			t.Fatal(err)
		}
		var out []string
		for k := range m {
			out = append(out, k)
		}
		slices.Sort(out)
		return out
	}
	same := func(what string, a, b []string) {
		a, b = slices.Clone(a), slices.Clone(b)
		slices.Sort(a)
		slices.Sort(b)
		if !slices.Equal(a, b) {
			t.Errorf("%s: written %v, described %v", what, a, b)
		}
	}
	var buf bytes.Buffer
	c := NewCSVWriter(&buf, "r1")
	c.Breath("bed1", breath(1), nil)
	c.Flush()
	header, _, _ := strings.Cut(buf.String(), "\n")
	if want := strings.Join(names(d.CSV), ","); header != want {
		t.Errorf("CSV header\n%s\nthe dictionary\n%s", header, want)
	}
	same("breath", keys(Breath("bed1", "r1", breath(1))), names(d.Breath))
	nan := math.NaN()
	same("event", keys(Event(&alerts.Event{Value: 1, Threshold: 2, Low: nan, High: nan})), names(d.Event))
	w, _ := mechanics.NewWindow(mechanics.WindowConfig{})
	w.Add(breath(1))
	same("trend", keys(Trend("bed1", 1, w.Trend(), time.Time{})), names(d.Trend))
	st := stream.Status{HasHealth: true, Recorded: true}
	status := Status("bed1", 1, "offline", "stopped", Source{Run: "r1", Host: "h", Version: "v"}, st, Counters{}, time.Time{})
	same("status", keys(status), names(d.Status))
	var sm struct{ Counters map[string]any }
	json.Unmarshal(status, &sm)
	var counters []string
	for k := range sm.Counters {
		counters = append(counters, k)
	}
	same("status counters", counters, names(d.Counters))
	same("wave", keys(Wave("bed1", "r1", 1.5, 25, []float64{5}, []float64{30})), names(d.Wave))
	names(d.Active)
	names(d.TrendStat)

	for _, e := range d.Breath {
		if mechanics.FieldIndex(e.Name) >= 0 && e.Unit == "" {
			t.Errorf("%s: no unit", e.Name)
		}
	}
	var schema struct {
		Fields []struct {
			Name, Type, Description, Unit string
		}
		MissingValues []string
	}
	if err := json.Unmarshal(TableSchema(), &schema); err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(schema.MissingValues, []string{""}) || len(schema.Fields) != len(d.CSV) {
		t.Fatalf("schema %+v", schema)
	}
	for i, f := range schema.Fields {
		if f.Name != d.CSV[i].Name || f.Unit != d.CSV[i].Unit || f.Description == "" ||
			!slices.Contains([]string{"integer", "number", "string", "datetime"}, f.Type) {
			t.Errorf("schema field %+v", f)
		}
	}
	var flags []string
	for name := range mechanics.FlagInfo() {
		flags = append(flags, name)
	}
	same("flags", flags, names(d.Flags))
}
