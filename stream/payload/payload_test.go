package payload

import (
	"bytes"
	"encoding/json"
	"flag"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"breathd/alerts"
	"breathd/device"
	"breathd/mechanics"
	"breathd/stream"
	"breathd/stream/lines"
)

var update = flag.Bool("update", false, "rewrite the golden files in testdata")

// at is the wall-clock time every payload here carries.
var at = time.Date(2026, 12, 1, 8, 0, 4, 250_000_000, time.UTC)

// breath is a passive volume-control breath whose numbers follow from
// each other as the formulas of README's field table give them: VT 500 mL,
// rr 15, constant flow 60 L/min over ti 0.8 s plus a 0.2 s pause, ppeak
// 30, pplat 25, PEEP 5: dp 20, cstat 500/20 = 25, cdyn 500/25 = 20,
// rinsp (30 − 25)/1 L/s = 5, tau 5·0.025 = 0.125 s, mp 0.098·15·0.5·(30 −
// 10) = 14.7 J/min (the worked example's arithmetic, REFERENCES.md).
func breath(seq int64) *mechanics.Breath {
	t := float64(seq-1) * 4
	return &mechanics.Breath{Seq: seq, TStart: t, TEnd: t + 4, Ti: 1, Te: 3, RR: 15, IE: 3, VTi: 500, VTe: 498, Leak: 0.4,
		PPeak: 30, PPlat: 25, PEEP: 5, PMean: 10.6, DP: 20, Cstat: 25, Cdyn: 20, Rinsp: 5,
		FitR: 5, FitC: 25, FitP0: 5, FitR2: 0.9991, Tau: 0.125, MP: 14.7, SI: 1.01, E2Pct: 2.5, PauseDecay: 0.1,
		PEEPi: 0, VTPBW: math.NaN(), EEF: -0.3, At: at.Add(time.Duration(t) * time.Second)}
}

// golden compares got with testdata/name, or writes it with -update. The
// files are the output contract of DESIGN §6 as breathd writes it; a
// change to one is a change of the contract and needs a new "v".
func golden(t *testing.T, name string, got []byte) {
	t.Helper()
	var pretty bytes.Buffer
	if err := json.Indent(&pretty, got, "", "  "); err != nil {
		t.Fatalf("%s: not JSON: %v\n%s", name, err, got)
	}
	pretty.WriteByte('\n')
	path := filepath.Join("testdata", name)
	if *update {
		if err := os.WriteFile(path, pretty.Bytes(), 0o644); err != nil {
			t.Fatal(err)
		}
		return
	}
	want, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("%v (run go test ./stream/payload -update)", err)
	}
	if !bytes.Equal(pretty.Bytes(), want) {
		t.Errorf("%s differs from the golden file:\n%s", name, pretty.Bytes())
	}
	var m map[string]any
	json.Unmarshal(got, &m)
	if name == "status_will.json" { // nothing that could be stale: no time
		if m["v"] != float64(Version) || m["at"] != nil {
			t.Errorf("will %v", m)
		}
		return
	}
	if m["v"] != float64(Version) || m["at"] == nil {
		t.Errorf(`%s: no "v": %d or no "at"`, name, Version)
	}
	if _, err := time.Parse(time.RFC3339Nano, m["at"].(string)); err != nil {
		t.Errorf(`%s: "at" is not RFC 3339: %v`, name, err)
	}
}

func TestBreathGolden(t *testing.T) {
	golden(t, "breath.json", Breath("bed1", "r1", breath(12)))
	b := breath(13)
	b.PPlat, b.DP, b.Cstat, b.Rinsp, b.PauseDecay, b.SI = math.NaN(), math.NaN(), math.NaN(), math.NaN(), math.NaN(), math.NaN()
	b.FitR2 = 0.81
	b.Flags = mechanics.FlagNoPlateau | mechanics.FlagActiveEffort | mechanics.FlagFitUnreliable
	golden(t, "breath_active.json", Breath("bed1", "r1", b))
	// without a clock, no wall-clock time: null, never the time of the run
	b.At = time.Time{}
	var m map[string]any
	json.Unmarshal(Breath("bed1", "r1", b), &m)
	if v, ok := m["at"]; !ok || v != nil {
		t.Errorf("unknown time encoded as %v", v)
	}
}

func TestTrendGolden(t *testing.T) {
	w, err := mechanics.NewWindow(mechanics.WindowConfig{SlopeMin: 30}) // slopes over these 48 s
	if err != nil {
		t.Fatal(err)
	}
	for seq := int64(1); seq <= 12; seq++ {
		b := breath(seq)
		b.PPlat += 0.1 * float64(seq%3) // three plateaus, so the quartiles differ
		b.DP = b.PPlat - b.PEEP
		b.Cstat = b.VTi / b.DP
		w.Add(b)
	}
	golden(t, "trend.json", Trend("bed1", 12, w.Trend(), at))
}

func events() []alerts.Event {
	nan := math.NaN()
	return []alerts.Event{
		{ID: "bed1/dp_high/r1-3", Seq: 3, Device: "bed1", Rule: "dp_high", Transition: "raised", Level: "warning",
			Field: "dp", Value: 16.2, Threshold: 15, Low: nan, High: nan, T: 48, At: at},
		{ID: "bed1/rr_range/r1-4", Seq: 4, Device: "bed1", Rule: "rr_range", Transition: "raised", Level: "notice",
			Field: "rr", Value: 41, Threshold: nan, Low: 8, High: 40, Latching: true, T: 52, At: at.Add(4 * time.Second)},
	}
}

func TestEventGolden(t *testing.T) {
	evs := events()
	golden(t, "event.json", Event(&evs[0]))
	golden(t, "event_outside.json", Event(&evs[1]))
}

func TestActiveGolden(t *testing.T) {
	evs := events()
	var active []alerts.Active
	for _, e := range evs {
		active = append(active, alerts.Active{Rule: e.Rule, Level: e.Level, Field: e.Field, EventID: e.ID,
			Since: e.T, SinceAt: e.At, Value: e.Value, Latching: e.Latching, Acked: e.Latching})
	}
	golden(t, "active.json", Active("bed1", 7, active, at))
	golden(t, "active_none.json", Active("bed1", 8, nil, at))
}

func TestStatusGolden(t *testing.T) {
	st := stream.Status{Device: "bed1", Breaths: 12, Events: 2,
		Counts:   lines.Counts{Lines: 4803, Comments: 2, Samples: 4800, Gaps: 1, FirstT: 0, LastT: 47.99},
		Drops:    mechanics.Drops{Gap: 1},
		Channels: mechanics.Channels{Delay: 0.02, Aligned: 0.02, PawSD: 0.2, FlowSD: 0.5},
		Health:   device.Health{Connected: true, Outages: 1}, HasHealth: true,
		Recording: device.RecordStats{Files: 2, WriteErrors: 1}, Recorded: true}
	st.Counts.Bad[lines.CauseNotNumber] = 1
	pc := Counters{QueueDepth: 0, Sent: 30, Reconnects: 1, Acks: 1, QueueError: "write events.log: no space left on device"}
	src := Source{Run: "4f2a91c0", Host: "board7", Since: at.Add(-time.Hour), Version: "v0.9.0"}
	golden(t, "status.json", Status("bed1", 5, "online", "", src, st, pc, at))
	golden(t, "status_offline.json", Status("bed1", 6, "offline", "stopped", src, stream.Status{Device: "bed1"}, Counters{}, at))
	golden(t, "status_will.json", Will("bed1", "connection lost"))
	var m struct{ Advisory string }
	json.Unmarshal(Status("bed1", 1, "online", "", Source{}, st, pc, at), &m)
	if m.Advisory != stream.Advisory || !strings.Contains(m.Advisory, "not a medical device") {
		t.Errorf("advisory %q", m.Advisory)
	}
}

// TestCSV: the header is seq, every field of the registry, flags,
// asynchrony, at, device and run; a value not computed is an empty cell. DESIGN §6.
func TestCSV(t *testing.T) {
	var buf bytes.Buffer
	c := NewCSVWriter(&buf, "r1")
	c.Breath("bed1", breath(1), nil)
	c.Flush()
	rows := strings.Split(strings.TrimSpace(buf.String()), "\n")
	head, row := strings.Split(rows[0], ","), strings.Split(rows[1], ",")
	if len(head) != mechanics.NumFields+6 || head[0] != "seq" || !slices.Equal(head[len(head)-5:], []string{"flags", "asynchrony", "at", "device", "run"}) ||
		len(row) != len(head) || !slices.Equal(row[len(row)-2:], []string{"bed1", "r1"}) {
		t.Fatalf("header %v, row %v", head, row)
	}
	for i, f := range mechanics.Fields() {
		if head[i+1] != f.Name {
			t.Errorf("column %d is %q, the registry says %q", i+1, head[i+1], f.Name)
		}
	}
	if got := row[mechanics.FieldIndex("vt_pbw")+1]; got != "" {
		t.Errorf("null vt_pbw written as %q", got)
	}
	if got := row[mechanics.FieldIndex("cstat")+1]; got != "25.00" {
		t.Errorf("cstat written as %q", got)
	}
}
