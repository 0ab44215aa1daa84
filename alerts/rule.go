// Package alerts evaluates threshold rules on breaths, on the rolling
// window and on a device's technical state, with a delay before a rule is
// raised and hysteresis before it clears, and turns every transition into
// an event. It is pure: no I/O, no logging, no clock of its own — the
// caller passes stream and wall-clock time.
//
// breathd is advisory: these events are not a certified alarm system.
package alerts

import (
	"errors"
	"fmt"
	"math"
	"regexp"
	"strings"

	"breathd/mechanics"
)

// Level is how urgent a rule is.
type Level string

// Levels, in increasing urgency.
const (
	LevelNotice  Level = "notice"
	LevelWarning Level = "warning"
	LevelUrgent  Level = "urgent"
)

// Comparison is how a rule compares its field with its threshold.
type Comparison string

// Comparisons.
const (
	Above   Comparison = "above"   // condition: value > threshold; clears below threshold − hysteresis
	Below   Comparison = "below"   // condition: value < threshold; clears above threshold + hysteresis
	Outside Comparison = "outside" // condition: value < low or > high; clears inside [low + h, high − h]
)

// Rule is one threshold rule. Field names a per-breath field of
// mechanics.Fields(), a derived one (peak_plateau_gap), a rolling one
// (median.<field>, iqr.<field>, slope.compliance, slope.dp,
// compliance_change, rise.peak, rise.resistive, rise.elastic,
// asynchrony_index) or a
// technical one (no_samples, no_breaths, circuit_open, bad_lines,
// sample_rate_off, port_lost, format_suspect).
type Rule struct {
	ID         string     `yaml:"id"`
	Field      string     `yaml:"field"`
	Compare    Comparison `yaml:"compare"`   // above, below or outside
	Threshold  float64    `yaml:"threshold"` // above, below
	Low        float64    `yaml:"low"`       // outside
	High       float64    `yaml:"high"`      // outside
	Hysteresis float64    `yaml:"hysteresis"`
	// RaiseAfter is how many consecutive evaluations (breaths, or ticks for
	// technical fields) the condition must hold; RaiseAfterSec, if set, is
	// how long it must hold as well, s.
	RaiseAfter    int     `yaml:"raise_after"`
	RaiseAfterSec float64 `yaml:"raise_after_s"`
	// ClearAfter is how many consecutive evaluations must be back past the
	// hysteresis margin before it clears.
	ClearAfter int    `yaml:"clear_after"`
	Level      Level  `yaml:"level"`    // notice, warning or urgent
	Latching   bool   `yaml:"latching"` // stays raised until acknowledged
	Off        bool   `yaml:"off"`      // switched off
	Source     string `yaml:"source"`   // where the default comes from
}

var validRuleID = regexp.MustCompile(`^[a-z0-9_]{1,48}$`)

// technical fields are evaluated on ticks, not breaths.
var technical = map[string]bool{"no_samples": true, "no_breaths": true, "circuit_open": true, "format_suspect": true,
	"bad_lines": true, "sample_rate_off": true, "port_lost": true}

// Validate reports the first unusable setting.
func (r *Rule) Validate() error {
	if !validRuleID.MatchString(r.ID) {
		return fmt.Errorf("rule id %q: use 1–48 of a–z 0–9 _", r.ID)
	}
	if _, err := fieldKind(r.Field); err != nil {
		return fmt.Errorf("rule %s: %w", r.ID, err)
	}
	switch r.Compare {
	case Above, Below:
		if math.IsNaN(r.Threshold) {
			return fmt.Errorf("rule %s: threshold is not a number", r.ID)
		}
	case Outside:
		if !(r.Low < r.High) {
			return fmt.Errorf("rule %s: low %g must be below high %g", r.ID, r.Low, r.High)
		}
		if 2*r.Hysteresis >= r.High-r.Low {
			return fmt.Errorf("rule %s: hysteresis %g leaves no band to clear in", r.ID, r.Hysteresis)
		}
	default:
		return fmt.Errorf("rule %s: compare %q: want above, below or outside", r.ID, r.Compare)
	}
	switch r.Level {
	case LevelNotice, LevelWarning, LevelUrgent:
	default:
		return fmt.Errorf("rule %s: level %q: want notice, warning or urgent", r.ID, r.Level)
	}
	if r.RaiseAfter < 1 || r.ClearAfter < 1 || r.Hysteresis < 0 || r.RaiseAfterSec < 0 {
		return fmt.Errorf("rule %s: raise_after and clear_after must be at least 1, hysteresis and raise_after_s not negative", r.ID)
	}
	return nil
}

// field kinds
const (
	kindBreath = iota
	kindDerived
	kindRolling
	kindTech
)

func fieldKind(name string) (int, error) {
	if technical[name] {
		return kindTech, nil
	}
	if name == "peak_plateau_gap" {
		return kindDerived, nil
	}
	if mechanics.FieldIndex(name) >= 0 {
		return kindBreath, nil
	}
	switch name {
	case "slope.compliance", "slope.dp", "compliance_change", "rise.peak", "rise.resistive", "rise.elastic", "asynchrony_index":
		return kindRolling, nil
	}
	if stat, f, ok := strings.Cut(name, "."); ok && (stat == "median" || stat == "iqr") && mechanics.FieldIndex(f) >= 0 {
		return kindRolling, nil
	}
	if now, ok := renamed[name]; ok {
		return 0, fmt.Errorf("field %q is now called %q (the name of its default rule, since payload version 2)", name, now)
	}
	return 0, fmt.Errorf("unknown field %q", name)
}

// renamed are the technical fields' names before payload version 2.
var renamed = map[string]string{"since_sample": "no_samples", "since_breath": "no_breaths", "bad_per_min": "bad_lines", "rate_error": "sample_rate_off"}

// Override changes a rule by id, or adds one with a new id. Every field
// that is set (present in the configuration, so 0 and false count)
// replaces the rule's; the others keep it.
type Override struct {
	ID            string      `yaml:"id"`
	Field         *string     `yaml:"field"`
	Compare       *Comparison `yaml:"compare"`
	Threshold     *float64    `yaml:"threshold"`
	Low           *float64    `yaml:"low"`
	High          *float64    `yaml:"high"`
	Hysteresis    *float64    `yaml:"hysteresis"`
	RaiseAfter    *int        `yaml:"raise_after"`
	RaiseAfterSec *float64    `yaml:"raise_after_s"`
	ClearAfter    *int        `yaml:"clear_after"`
	Level         *Level      `yaml:"level"`
	Latching      *bool       `yaml:"latching"`
	Off           *bool       `yaml:"off"`
	Source        *string     `yaml:"source"`
}

// apply sets the fields o sets.
func (o *Override) apply(r *Rule) {
	set(&r.Field, o.Field)
	set(&r.Compare, o.Compare)
	set(&r.Threshold, o.Threshold)
	set(&r.Low, o.Low)
	set(&r.High, o.High)
	set(&r.Hysteresis, o.Hysteresis)
	set(&r.RaiseAfter, o.RaiseAfter)
	set(&r.RaiseAfterSec, o.RaiseAfterSec)
	set(&r.ClearAfter, o.ClearAfter)
	set(&r.Level, o.Level)
	set(&r.Latching, o.Latching)
	set(&r.Off, o.Off)
	set(&r.Source, o.Source)
}

func set[T any](dst *T, v *T) {
	if v != nil {
		*dst = *v
	}
}

// Merge applies overrides to the defaults by id, in order: a known id
// changes the fields the override sets, a new id adds a rule. Off
// switches a rule off (and off: false on again).
func Merge(defaults []Rule, overrides []Override) ([]Rule, error) {
	out := append([]Rule(nil), defaults...)
	for _, o := range overrides {
		i := -1
		for k := range out {
			if out[k].ID == o.ID {
				i = k
			}
		}
		if i < 0 {
			if o.Field == nil { // a new rule names its field: this is more likely a misspelled id
				return nil, fmt.Errorf("rule %q is not one of the rules%s; a new rule needs field, compare, threshold, raise_after, clear_after and level",
					o.ID, nearest(o.ID, out))
			}
			out = append(out, Rule{ID: o.ID})
			i = len(out) - 1
		}
		o.apply(&out[i])
	}
	seen := map[string]bool{}
	for i := range out {
		if seen[out[i].ID] {
			return nil, fmt.Errorf("rule id %q twice", out[i].ID)
		}
		seen[out[i].ID] = true
		if out[i].Off {
			continue
		}
		if err := out[i].Validate(); err != nil {
			return nil, err
		}
	}
	return out, nil
}

// ErrAcknowledged is returned by Ack for an event acknowledged before:
// nothing changes.
var ErrAcknowledged = errors.New("already acknowledged")

// ErrUnknownEvent is returned by Ack for an id no raised rule carries.
var ErrUnknownEvent = errors.New("no raised rule has that event id")

// nearest says which rule id is closest to id, as ` (did you mean "x"?)`,
// or "" when none is close.
func nearest(id string, rules []Rule) string {
	best, bestD := "", 4 // more than three edits away is no suggestion
	for _, r := range rules {
		if d := editDistance(id, r.ID); d < bestD {
			best, bestD = r.ID, d
		}
	}
	if best == "" {
		return ""
	}
	return fmt.Sprintf(" (did you mean %q?)", best)
}

// editDistance is the Levenshtein distance between a and b.
func editDistance(a, b string) int {
	prev := make([]int, len(b)+1)
	cur := make([]int, len(b)+1)
	for j := range prev {
		prev[j] = j
	}
	for i := 1; i <= len(a); i++ {
		cur[0] = i
		for j := 1; j <= len(b); j++ {
			cost := 1
			if a[i-1] == b[j-1] {
				cost = 0
			}
			cur[j] = min(prev[j]+1, cur[j-1]+1, prev[j-1]+cost)
		}
		prev, cur = cur, prev
	}
	return prev[len(b)]
}
