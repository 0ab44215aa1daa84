// Package mechanics finds breaths in a pressure/flow stream and computes
// their respiratory mechanics, keeps the rolling window of them and says
// which of their values can be trusted. It does no I/O and no logging; the
// lung model that plays a patient for the simulator and the tests is
// mechanics/lungsim, which the analysis never imports.
//
// Units everywhere: pressure cmH2O, flow L/min, volume mL, time s,
// compliance mL/cmH2O, resistance cmH2O·s/L, power J/min. A value that
// cannot be computed for a breath is NaN (null in the output formats).
package mechanics

import (
	"iter"
	"math"
	"strings"
	"time"
)

// Flags mark a breath's conditions.
type Flags uint16

// The flags, by their output word.
const (
	FlagNoPlateau            Flags = 1 << iota // no end-inspiratory pause with near-zero flow
	FlagActiveEffort                           // the patient's own effort shows in the waveform
	FlagFitUnreliable                          // the equation-of-motion fit is poor: fit_* are not mechanics
	FlagGap                                    // the breath before this one was dropped (gap, open circuit, too long)
	FlagLeak                                   // leak above the configured limit
	FlagIncompleteExhalation                   // expiratory flow not back to zero at the next start
	FlagVariableFlow                           // inspiratory flow not constant: no rinsp, no stress index
	FlagPlateauUnsettled                       // pressure still fell over the pause: pplat, dp and cstat are not static
	FlagIntrinsicPEEP                          // alveolar pressure above PEEP at end expiration: dp and cstat use total PEEP
	FlagSIUnreliable                           // the stress index's segment is too short or its fit poor
	numFlags                 = iota
)

var flagWords = [numFlags]string{"no_plateau", "active_effort", "fit_unreliable", "gap", "leak",
	"incomplete_exhalation", "variable_flow", "plateau_unsettled", "intrinsic_peep", "si_unreliable"}

// flagMeanings say what each flag means, for the data dictionary.
var flagMeanings = [numFlags]string{
	"no end-inspiratory pause with near-zero flow: pplat, dp and cstat are null",
	"the patient's own effort shows in the waveform: the fitted mechanics and the plateau are not the lung's",
	"the equation-of-motion fit is poor (R² under 0.95) or the breath is active: fit_* are not mechanics",
	"the breath before this one was dropped (a gap, an open circuit or a breath too long)",
	"leak over 15 %",
	"end-expiratory flow below −5 L/min, past its noise",
	"inspiratory flow not constant: no rinsp, no stress index",
	"the pressure was still falling at the pause's end: the plateau is not static",
	"end-expiratory flow past its noise and peepi ≥ 0.5 cmH2O: dp and cstat use total PEEP",
	"the stress index's segment is short, its fit poor, or undecided; or the pause shows relaxation",
}

// FlagInfo yields each flag's output word and meaning, in bit order.
func FlagInfo() iter.Seq2[string, string] { return pairs(flagWords[:], flagMeanings[:]) }

// pairs yields words[i] with meanings[i], in order.
func pairs(words, meanings []string) iter.Seq2[string, string] {
	return func(yield func(string, string) bool) {
		for i, w := range words {
			if !yield(w, meanings[i]) {
				return
			}
		}
	}
}

// Words lists the flags' output words.
func (f Flags) Words() []string { return words(uint64(f), flagWords[:]) }

// String joins the flags' words with spaces.
func (f Flags) String() string { return strings.Join(f.Words(), " ") }

// AppendWords appends the flags' words separated by sep, without
// allocating when b has room.
func (f Flags) AppendWords(b []byte, sep byte) []byte {
	return appendWords(b, uint64(f), flagWords[:], sep)
}

// words lists the words of the bits set, bit i naming table[i].
func words(bits uint64, table []string) []string {
	var w []string
	for i, word := range table {
		if bits&(1<<i) != 0 {
			w = append(w, word)
		}
	}
	return w
}

// appendWords appends the words of the bits set, separated by sep.
func appendWords(b []byte, bits uint64, table []string, sep byte) []byte {
	first := true
	for i, word := range table {
		if bits&(1<<i) == 0 {
			continue
		}
		if !first {
			b = append(b, sep)
		}
		first = false
		b = append(b, word...)
	}
	return b
}

// Breath is one breath's mechanics, from its inspiration start to the next
// inspiration start. Field names follow the per-breath output contract.
type Breath struct {
	Seq    int64   // breath number since the device started
	TStart float64 // stream time of the inspiration start, s
	TEnd   float64 // stream time of the next inspiration start, s
	// At is the wall-clock time of TStart, from the stream's clock (set by
	// the device loop, not by the segmenter); zero when it is not known.
	At time.Time

	Ti, Te float64 // inspiratory (including any pause) and expiratory time, s
	RR     float64 // rate, 1/min
	IE     float64 // expiratory/inspiratory time ratio

	VTi, VTe float64 // inspired and expired volume, mL
	Leak     float64 // (vti − vte)/vti, %

	PPeak, PPlat, PEEP, PMean float64 // cmH2O; PPlat NaN without a pause
	DP                        float64 // driving pressure pplat − peep, cmH2O
	Cstat, Cdyn               float64 // mL/cmH2O
	Rinsp                     float64 // (ppeak − pplat)/end-inspiratory flow, cmH2O·s/L; constant flow only

	FitR, FitC, FitP0, FitR2 float64 // Paw = R·V' + V/C + P0 over the breath
	Tau                      float64 // fit_r·fit_c, s

	MP    float64 // mechanical power, J/min (simplified formula)
	SI    float64 // stress index
	E2Pct float64 // volume-dependent share of elastance, 100·E2·VT/(E1 + E2·VT), %
	// PauseDecay is the pressure fall over the end-inspiratory pause,
	// cmH2O; NaN without a pause.
	PauseDecay float64
	PEEPi      float64 // intrinsic PEEP from the equation of motion at end expiration, cmH2O
	VTPBW      float64 // vti per kg of predicted body weight, mL/kg
	EEF        float64 // end-expiratory flow, L/min
	// IneffectiveEfforts counts the efforts in this breath's expiration
	// that no breath followed (a number, for the field registry).
	IneffectiveEfforts float64
	// EffortAt are the stream times of the first ineffective efforts'
	// deepest pressure, s (for pictures; not an output field).
	EffortAt [3]float64

	Flags      Flags
	Asynchrony Asynchrony // patient–ventilator asynchronies in and just before the breath
}

// Values appends the numeric fields in output order (see Fields).
func (b *Breath) Values(dst []float64) []float64 {
	return append(dst, b.TStart, b.TEnd, b.Ti, b.Te, b.RR, b.IE, b.VTi, b.VTe, b.Leak,
		b.PPeak, b.PPlat, b.PEEP, b.PMean, b.DP, b.Cstat, b.Cdyn, b.Rinsp,
		b.FitR, b.FitC, b.FitP0, b.FitR2, b.Tau, b.MP, b.SI, b.E2Pct, b.PauseDecay, b.PEEPi, b.VTPBW, b.EEF, b.IneffectiveEfforts)
}

// Trusted returns a numeric field by its contract name, NaN when the
// breath's flags disown it (see Untrusted), and false for an unknown name.
func (b *Breath) Trusted(name string) (float64, bool) {
	v, ok := b.Field(name)
	if ok && b.Untrusted(FieldIndex(name)) {
		v = nan
	}
	return v, ok
}

// TrustedValues appends the numeric fields in output order (see Fields), with
// NaN for each value that the breath's flags say is not the lung's (see
// Untrusted): what rolling statistics, rules and summaries take.
func (b *Breath) TrustedValues(dst []float64) []float64 {
	k := len(dst)
	dst = b.Values(dst)
	for i, f := range untrustedBy {
		if b.Flags&f != 0 {
			dst[k+i] = nan
		}
	}
	return dst
}

// Untrusted reports whether the breath's flags say that the value of
// the field at position i is not the lung's.
func (b *Breath) Untrusted(i int) bool { return b.Flags&untrustedBy[i] != 0 }

// Field returns a numeric field by its contract name, and false for an
// unknown name.
func (b *Breath) Field(name string) (float64, bool) {
	i := FieldIndex(name)
	if i < 0 {
		return math.NaN(), false
	}
	var buf [NumFields]float64
	return b.Values(buf[:0])[i], true
}

// Reliable reports whether the fitted mechanics may be read as the lung's.
func (b *Breath) Reliable() bool { return b.Flags&(FlagFitUnreliable|FlagActiveEffort) == 0 }
