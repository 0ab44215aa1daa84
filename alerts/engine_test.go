package alerts

import (
	"errors"
	"math"
	"strings"
	"testing"
	"time"

	"breathd/mechanics"

	"pgregory.net/rapid"
)

var wall = time.Date(2026, 12, 1, 8, 0, 0, 0, time.UTC)

func plateauRule() Rule {
	return Rule{ID: "plateau_high", Field: "pplat", Compare: Above, Threshold: 30, Hysteresis: 1,
		RaiseAfter: 3, ClearAfter: 2, Level: LevelWarning}
}

// feed evaluates a sequence of plateau values (NaN: no plateau) and
// returns the transitions seen, one string per event.
func feed(t *testing.T, e *Engine, values []float64) []string {
	t.Helper()
	var got []string
	for i, v := range values {
		b := mechanics.Breath{TEnd: float64(i+1) * 4, PPlat: v}
		for _, ev := range e.Breath(&b, nil, wall) {
			got = append(got, string(ev.Transition)+"@"+itoa(i))
		}
	}
	return got
}

func itoa(i int) string { return string(rune('0'+i/10)) + string(rune('0'+i%10)) }

func TestStateMachine(t *testing.T) {
	nan := math.NaN()
	tests := []struct {
		name   string
		rule   func(*Rule)
		values []float64
		want   []string
	}{
		{"one breath over raises nothing", nil, []float64{25, 32, 25, 25}, nil},
		{"two over, one under, two over: nothing", nil, []float64{32, 32, 28, 32, 32}, nil},
		{"three consecutive raise once", nil, []float64{32, 32, 32, 32, 32, 32}, []string{"raised@02"}},
		{"inside the hysteresis band does not clear", nil, []float64{32, 32, 32, 29.5, 29.5, 29.5, 29.5}, []string{"raised@02"}},
		{"two good breaths clear once", nil, []float64{32, 32, 32, 28, 28, 28, 28}, []string{"raised@02", "cleared@04"}},
		{"a bad breath restarts the clearing count", nil, []float64{32, 32, 32, 28, 31, 28, 28}, []string{"raised@02", "cleared@06"}},
		{"a band value restarts it too", nil, []float64{32, 32, 32, 28, 29.5, 28, 28}, []string{"raised@02", "cleared@06"}},
		{"null neither raises nor clears", nil, []float64{32, nan, 32, nan, 32, nan, 28, nan, 28}, []string{"raised@04", "cleared@08"}},
		{"null does not break a run", nil, []float64{32, 32, nan, nan, 32}, []string{"raised@04"}},
		{"time delay as well as count", func(r *Rule) { r.RaiseAfter, r.RaiseAfterSec = 1, 10 },
			[]float64{32, 32, 32, 32, 32}, []string{"raised@03"}}, // 4 s apart: 12 s after the first at the 4th
		{"below", func(r *Rule) { r.Compare, r.Threshold = Below, 10 }, []float64{5, 5, 5, 12, 12}, []string{"raised@02", "cleared@04"}},
		{"outside a band", func(r *Rule) { r.Compare, r.Low, r.High, r.Hysteresis = Outside, 20, 30, 1 },
			[]float64{15, 35, 15, 25, 25}, []string{"raised@02", "cleared@04"}},
		{"latching stays", func(r *Rule) { r.Latching = true }, []float64{32, 32, 32, 28, 28, 28, 28, 28}, []string{"raised@02"}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			r := plateauRule()
			if tc.rule != nil {
				tc.rule(&r)
			}
			e, err := NewEngine("bed1", "r1", []Rule{r})
			if err != nil {
				t.Fatal(err)
			}
			got := feed(t, e, tc.values)
			if len(got) != len(tc.want) {
				t.Fatalf("events %v, want %v", got, tc.want)
			}
			for i := range got {
				if got[i] != tc.want[i] {
					t.Fatalf("events %v, want %v", got, tc.want)
				}
			}
		})
	}
}

func TestLatchingAcknowledgement(t *testing.T) {
	r := plateauRule()
	r.Latching = true
	e, _ := NewEngine("bed1", "r1", []Rule{r})
	feed(t, e, []float64{32, 32, 32})
	act := e.Active()
	if len(act) != 1 || act[0].EventID != "bed1/plateau_high/r1-1" {
		t.Fatalf("active %+v", act)
	}
	if _, err := e.Ack("bed1/plateau_high/r1-99", 0, wall); !errors.Is(err, ErrUnknownEvent) {
		t.Errorf("unknown id: %v", err)
	}
	// acknowledged while the cause is present: stays, clears by itself later
	evs, err := e.Ack(act[0].EventID, 13, wall)
	if err != nil || len(evs) != 1 || evs[0].Transition != Acknowledged {
		t.Fatalf("ack: %v %+v", err, evs)
	}
	if got := feed(t, e, []float64{28, 28}); len(got) != 1 || got[0] != "cleared@01" {
		t.Errorf("after the ack the rule clears by itself: %v", got)
	}
	// cause gone first, then the ack clears it
	feed(t, e, []float64{32, 32, 32, 28, 28, 28})
	if len(e.Active()) != 1 {
		t.Fatal("latching rule cleared without an acknowledgement")
	}
	evs, _ = e.Ack(e.Active()[0].EventID, 50, wall)
	if len(evs) != 2 || evs[0].Transition != Acknowledged || evs[1].Transition != Cleared || len(e.Active()) != 0 {
		t.Errorf("ack after the cause ended: %+v", evs)
	}
}

func TestEventFields(t *testing.T) {
	e, _ := NewEngine("bed1", "k2", []Rule{plateauRule()})
	var evs []Event
	for i := 0; i < 3; i++ {
		b := mechanics.Breath{TEnd: float64(i) * 4, PPlat: 33}
		evs = append(evs, e.Breath(&b, nil, wall)...)
	}
	ev := evs[0]
	if ev.ID != "bed1/plateau_high/k2-1" || ev.Rule != "plateau_high" || ev.Level != LevelWarning || ev.Field != "pplat" ||
		ev.Value != 33 || ev.Threshold != 30 || ev.T != 8 || !ev.At.Equal(wall) || !math.IsNaN(ev.Low) {
		t.Errorf("event %+v", ev)
	}
}

// TestNeverTwoRaisedInARow: over random value sequences (with nulls and
// acknowledgements) every rule's events alternate raised → (acknowledged)
// → cleared, and Active agrees with the last transition.
func TestNeverTwoRaisedInARow(t *testing.T) {
	rapid.Check(t, func(t *rapid.T) {
		r := plateauRule()
		r.RaiseAfter = rapid.IntRange(1, 5).Draw(t, "raise")
		r.ClearAfter = rapid.IntRange(1, 5).Draw(t, "clear")
		r.Hysteresis = rapid.Float64Range(0, 3).Draw(t, "hyst")
		r.Latching = rapid.Bool().Draw(t, "latching")
		e, _ := NewEngine("d", "r", []Rule{r})
		n := rapid.IntRange(1, 200).Draw(t, "n")
		raised := false
		for i := 0; i < n; i++ {
			var evs []Event
			if rapid.IntRange(0, 9).Draw(t, "ackOrValue") == 0 {
				if a := e.Active(); len(a) > 0 {
					evs, _ = e.Ack(a[0].EventID, float64(i), wall)
				}
			} else {
				v := rapid.Float64Range(20, 40).Draw(t, "v")
				if rapid.IntRange(0, 5).Draw(t, "null") == 0 {
					v = math.NaN()
				}
				b := mechanics.Breath{TEnd: float64(i), PPlat: v}
				evs = e.Breath(&b, nil, wall)
			}
			for _, ev := range evs {
				switch ev.Transition {
				case Raised:
					if raised {
						t.Fatalf("raised twice in a row at %d", i)
					}
					raised = true
				case Cleared:
					if !raised {
						t.Fatalf("cleared while not raised at %d", i)
					}
					raised = false
				case Acknowledged:
					if !raised {
						t.Fatalf("acknowledged while not raised at %d", i)
					}
				}
			}
			if (len(e.Active()) == 1) != raised {
				t.Fatalf("active %v, raised %v", e.Active(), raised)
			}
		}
	})
}

func TestDefaultsValid(t *testing.T) {
	rules, err := Merge(Defaults(), []Override{{ID: "plateau_high", Threshold: new(28.0)}, {ID: "power_high", Off: new(true)},
		{ID: "my_rule", Field: new("median.cstat"), Compare: new(Below), Threshold: new(25.0), RaiseAfter: new(2), ClearAfter: new(2),
			Level: new(LevelNotice)}})
	if err != nil {
		t.Fatal(err)
	}
	e, err := NewEngine("x", "r", rules)
	if err != nil {
		t.Fatal(err)
	}
	for _, r := range rules {
		if r.ID == "plateau_high" && r.Threshold != 28 {
			t.Error("override lost")
		}
		if r.Source == "" && r.ID != "my_rule" {
			t.Errorf("default %s has no source", r.ID)
		}
	}
	if len(e.rules) != len(Defaults()) { // one off, one added
		t.Errorf("%d rules compiled", len(e.rules))
	}
	for _, bad := range []Override{{ID: "Bad-Id"}, {ID: "x", Field: new("nope")}, {ID: "x", Field: new("dp"), Compare: new(Comparison("near"))}} {
		if _, err := Merge(nil, []Override{bad}); err == nil {
			t.Errorf("%+v accepted", bad)
		}
	}
}

func TestEngineBreathDoesNotAllocate(t *testing.T) {
	e, _ := NewEngine("bed1", "r", Defaults())
	w, _ := mechanics.NewWindow(mechanics.WindowConfig{})
	b := mechanics.Breath{TEnd: 4, PPlat: 20, PPeak: 25, PEEP: 5, DP: 15, VTi: 450, MP: 10, SI: 1, EEF: 0, Leak: 1, VTPBW: 6, Cstat: 30, FitC: 30}
	for i := 0; i < 100; i++ {
		b.TStart, b.TEnd = float64(i)*4, float64(i)*4+4
		w.Add(&b)
		e.Breath(&b, w, wall)
	}
	allocs := testing.AllocsPerRun(200, func() {
		b.TStart += 4
		b.TEnd += 4
		w.Add(&b)
		e.Breath(&b, w, wall)
		e.Tick(Unknown(), b.TEnd, wall)
	})
	if allocs != 0 {
		t.Errorf("%v allocations per breath without events", allocs)
	}
}

// TestDisownedValuesChangeNothing: a plateau whose pause had not settled
// (plateau_unsettled) or a fit under effort is published with its flag but
// is null to the rules: it neither raises nor clears.
func TestDisownedValuesChangeNothing(t *testing.T) {
	e, err := NewEngine("d", "r", []Rule{plateauRule(),
		{ID: "compliance_low", Field: "fit_c", Compare: Below, Threshold: 30, Hysteresis: 1, RaiseAfter: 2, ClearAfter: 2, Level: LevelNotice}})
	if err != nil {
		t.Fatal(err)
	}
	var got []string
	for i := range 6 {
		b := mechanics.Breath{TEnd: float64(i+1) * 4, PPlat: 35, FitC: 20, Flags: mechanics.FlagPlateauUnsettled | mechanics.FlagActiveEffort}
		for _, ev := range e.Breath(&b, nil, wall) {
			got = append(got, ev.Rule+" "+string(ev.Transition))
		}
	}
	if len(got) != 0 {
		t.Errorf("disowned values raised %v", got)
	}
	b := mechanics.Breath{TEnd: 100, PPlat: 35, FitC: 20}
	for range 3 {
		got = got[:0]
		for _, ev := range e.Breath(&b, nil, wall) {
			got = append(got, ev.Rule+" "+string(ev.Transition))
		}
		b.TEnd += 4
	}
	if len(got) != 1 || got[0] != "plateau_high raised" {
		t.Errorf("trusted values: %v on the third", got)
	}
}

// TestMisspelledRuleID: an override whose id is not a rule's and that
// names no field is a misspelling: the error names the id and the
// nearest one. (Issue 17.)
func TestMisspelledRuleID(t *testing.T) {
	_, err := Merge(Defaults(), []Override{{ID: "plateau_hihg", Threshold: new(28.0)}})
	if err == nil || !strings.Contains(err.Error(), `"plateau_hihg" is not one of the rules (did you mean "plateau_high"?)`) {
		t.Errorf("misspelled id: %v", err)
	}
}

// TestAsynchronyIndexBoundary: the default rule raises when the window's
// asynchrony index is above 10 %, not at 10 % itself (Blanch et al.,
// Intensive Care Med 2015;41:633 report "> 10 %"; some authors use
// ≥ 10 %: the boundary is pinned here). 20 breaths, 2 of them double
// triggers: 2/20 = 10.0 % for 40 breaths, no event; 3 or 4 of 20
// (15–20 %): raised after the rule's 20 breaths. The index waits for 10
// cycles in the window.
func TestAsynchronyIndexBoundary(t *testing.T) {
	var rule Rule
	for _, r := range Defaults() {
		if r.ID == "asynchrony_high" {
			rule = r
		}
	}
	if rule.Field != "asynchrony_index" || rule.Threshold != 10 || rule.Compare != Above {
		t.Fatalf("default rule %+v: want asynchrony_index above 10", rule)
	}
	run := func(every int) (raisedAt int) {
		e, err := NewEngine("bed1", "r", []Rule{rule})
		if err != nil {
			t.Fatal(err)
		}
		w, _ := mechanics.NewWindow(mechanics.WindowConfig{})
		for i := range 60 {
			b := mechanics.Breath{TStart: float64(i) * 4, TEnd: float64(i+1) * 4}
			if i%every == 0 {
				b.Asynchrony = mechanics.AsyDoubleTrigger
			}
			w.Add(&b)
			for _, ev := range e.Breath(&b, w, wall) {
				if ev.Transition == Raised {
					return i
				}
			}
		}
		return -1
	}
	if at := run(10); at >= 0 { // 2 in every 20: exactly 10 %
		t.Errorf("an index of exactly 10 %% raised the rule at breath %d", at)
	}
	if at := run(6); at != 28 { // 3 or 4 in 20 from the 10th breath on: 19 breaths later
		t.Errorf("an index of 15–20 %% raised the rule at breath %d, want 28 (index from breath 9, held for 20)", at)
	}
}
