package mechanics

import "iter"

// Field describes one per-breath numeric field of the output contract: the
// one registry of field names that the analysis, the rules, the payloads
// and the CSV share.
type Field struct {
	Name     string // the contract's name
	Unit     string // UCUM
	Decimals int    // decimals in the CSV
	Meaning  string // one line, for the data dictionary
	// DisownedBy are the flags under which the value is published but not
	// taken as the lung's (see Breath.Untrusted).
	DisownedBy Flags
}

// NumFields is the number of per-breath numeric fields.
const NumFields = len(fields)

// The flags under which the fitted mechanics, the plateau's numbers and
// the stress index are not the lung's: the fit under effort or when it is
// poor; the plateau when it had not settled or the patient pulled during
// it; the stress index when its segment or fit is poor or the pause shows
// that the lung's pressure depends on time (pendelluft, stress
// relaxation), which bends the pressure of a constant-flow inflation as a
// change of compliance would.
const (
	byFit     = FlagFitUnreliable | FlagActiveEffort
	byPlateau = FlagPlateauUnsettled | FlagActiveEffort
	bySI      = byFit | FlagSIUnreliable | FlagPlateauUnsettled
)

// fields is the registry, in output order (the order of Breath.Values).
var fields = [...]Field{
	{"t_start", "s", 3, "stream time of the inspiration's start", 0},
	{"t_end", "s", 3, "stream time of the next inspiration's start", 0},
	{"ti", "s", 3, "inspiratory time, with any pause", 0},
	{"te", "s", 3, "expiratory time", 0},
	{"rr", "/min", 2, "breath rate, 60/(ti + te)", 0},
	{"ie", "1", 2, "te/ti: the x of the I:E ratio 1:x", 0},
	{"vti", "mL", 1, "inspired volume", 0},
	{"vte", "mL", 1, "expired volume", 0},
	{"leak", "%", 1, "(vti − vte)/vti", 0},
	{"ppeak", "cm[H2O]", 2, "peak airway pressure", 0},
	{"pplat", "cm[H2O]", 2, "plateau pressure at the end of the end-inspiratory pause", byPlateau},
	{"peep", "cm[H2O]", 2, "end-expiratory airway pressure", 0},
	{"pmean", "cm[H2O]", 2, "mean airway pressure over the breath", 0},
	{"dp", "cm[H2O]", 2, "driving pressure, pplat − total PEEP", byPlateau},
	{"cstat", "mL/cm[H2O]", 2, "static compliance, vti/dp", byPlateau},
	{"cdyn", "mL/cm[H2O]", 2, "dynamic compliance, vti/(ppeak − peep)", 0},
	{"rinsp", "cm[H2O].s/L", 2, "inspiratory resistance, (ppeak − pplat)/end-inspiratory flow", byPlateau},
	{"fit_r", "cm[H2O].s/L", 2, "resistance from the equation-of-motion fit", byFit},
	{"fit_c", "mL/cm[H2O]", 2, "compliance from the equation-of-motion fit", byFit},
	{"fit_p0", "cm[H2O]", 2, "end-expiratory pressure from the equation-of-motion fit", byFit},
	{"fit_r2", "1", 4, "the fit's coefficient of determination", 0},
	{"tau", "s", 3, "time constant, fit_r · fit_c", byFit},
	{"mp", "J/min", 2, "mechanical power, simplified", 0},
	{"si", "1", 3, "stress index, the exponent of a power law over constant-flow inflation", bySI},
	{"e2_pct", "%", 1, "volume-dependent share of elastance", byFit},
	{"pause_decay", "cm[H2O]", 2, "pressure fall over the end-inspiratory pause", 0},
	{"peepi", "cm[H2O]", 2, "intrinsic PEEP from the fit at end expiration", byFit},
	{"vt_pbw", "mL/kg", 2, "vti per kg of predicted body weight", 0},
	{"eef", "L/min", 2, "end-expiratory flow", 0},
	{"ineffective_efforts", "1", 0, "efforts in this breath's expiration that no breath followed (see asynchrony)", 0},
}

// Fields yields the per-breath numeric fields in output order with their
// positions in Breath.Values.
func Fields() iter.Seq2[int, Field] {
	return func(yield func(int, Field) bool) {
		for i, f := range fields {
			if !yield(i, f) {
				return
			}
		}
	}
}

// FieldAt returns the field at position i of Breath.Values.
func FieldAt(i int) Field { return fields[i] }

// FieldIndex is the position of the field named name in Breath.Values,
// or −1.
func FieldIndex(name string) int {
	for i, f := range fields {
		if f.Name == name {
			return i
		}
	}
	return -1
}

// untrustedBy is each field's DisownedBy, for the per-breath path.
var untrustedBy = func() (by [NumFields]Flags) {
	for i, f := range fields {
		by[i] = f.DisownedBy
	}
	return by
}()
