package mechanics

import (
	"errors"
	"fmt"
	"iter"
	"math"
	"strings"
)

// Asynchrony marks the patient–ventilator asynchronies found in and just
// before a breath. The definitions are those tabulated by Thille et al.,
// Intensive Care Med 2006;32:1515, and reverse triggering that of
// Akoumianaki et al., Chest 2013;143:927 (its waveform rule ours).
type Asynchrony uint8

// The asynchronies, by their output word.
const (
	AsyIneffectiveEffort Asynchrony = 1 << iota // efforts in this breath's expiration that no breath followed
	AsyDoubleTrigger                            // the second cycle of a pair one effort triggered
	AsyAutoTrigger                              // a cycle delivered with no effort before it
	AsyShortCycle                               // inspiration under half the recent mean
	AsyLongCycle                                // inspiration over twice the recent mean
	AsyReverseTrigger                           // an effort that began after a machine-started inflation
	NumAsynchronies      = iota
)

var asyWords = [NumAsynchronies]string{"ineffective_effort", "double_trigger", "auto_trigger",
	"short_cycle", "long_cycle", "reverse_trigger"}

var asyMeanings = [NumAsynchronies]string{
	"an effort in expiration: the airway pressure fell by 0.5 cmH2O or more while the expiratory flow moved toward zero, and both came back, with no breath delivered (ineffective_efforts counts them)",
	"this cycle followed a patient-triggered one after an expiratory time under half the recent mean inspiratory time: one effort, two cycles (the second carries the word)",
	"a cycle with no sign of the patient's effort before it that did not come at the interval of the ventilator's own timed cycles",
	"inspiratory time under half the mean of the last 8 breaths",
	"inspiratory time over twice the mean of the last 8 breaths",
	"a cycle the ventilator started on its own during which the patient's effort began: the pressure fell under steady inflow, or the inflow rose again under a steady pressure",
}

// AsynchronyInfo yields each asynchrony's output word and meaning.
func AsynchronyInfo() iter.Seq2[string, string] { return pairs(asyWords[:], asyMeanings[:]) }

// AsynchronyWord is the output word of the asynchrony at bit position i.
func AsynchronyWord(i int) string { return asyWords[i] }

// Words lists the output words.
func (a Asynchrony) Words() []string { return words(uint64(a), asyWords[:]) }

// String joins the words with spaces.
func (a Asynchrony) String() string { return strings.Join(a.Words(), " ") }

// AppendWords appends the words separated by sep, without allocating when
// b has room.
func (a Asynchrony) AppendWords(b []byte, sep byte) []byte {
	return appendWords(b, uint64(a), asyWords[:], sep)
}

// AsynchronyConfig holds the detectors' parameters. The zero value of a
// field means its default.
type AsynchronyConfig struct {
	// EffortDip is the airway pressure fall of an effort, cmH2O; default
	// 0.5 (Thille 2006).
	EffortDip float64 `yaml:"effort_dip"`
	// EffortFlow is how far the flow must move toward the patient with
	// it, L/min; default 2 (our choice, above a flow sensor's noise).
	EffortFlow float64 `yaml:"effort_flow"`
	// DoubleTe: a cycle after a patient-triggered one whose expiratory
	// time is under this share of the mean inspiratory time is a double
	// trigger; default 0.5 (Thille 2006).
	DoubleTe float64 `yaml:"double_te"`
	// ShortTi and LongTi: inspiratory times under ShortTi or over LongTi
	// times the mean of the last 8 breaths; defaults 0.5 and 2 (Thille
	// 2006).
	ShortTi float64 `yaml:"short_ti"`
	LongTi  float64 `yaml:"long_ti"`
}

// Defaults fills the unset fields.
func (c *AsynchronyConfig) Defaults() {
	def(&c.EffortDip, 0.5)
	def(&c.EffortFlow, 4)
	def(&c.DoubleTe, 0.5)
	def(&c.ShortTi, 0.5)
	def(&c.LongTi, 2)
}

// Validate reports the first unusable setting.
func (c *AsynchronyConfig) Validate() error {
	for _, v := range []float64{c.EffortDip, c.EffortFlow, c.DoubleTe, c.ShortTi, c.LongTi} {
		if math.IsNaN(v) || v < 0 {
			return errors.New("asynchrony thresholds must be positive numbers")
		}
	}
	if c.ShortTi >= 1 || c.LongTi <= 1 {
		return fmt.Errorf("asynchrony short_ti %g must be under 1 and long_ti %g over 1 (shares of the mean)", c.ShortTi, c.LongTi)
	}
	return nil
}

// asyState is what the detectors keep from breath to breath.
type asyState struct {
	ti       ring8   // the last breaths' inspiratory times, s
	period   ring8   // … and durations, s
	untrig   float64 // the interval before the last untriggered cycle, s; NaN for none
	n        int     // breaths seen since the last drop (at most 8 counted)
	prevTe   float64 // the previous breath's expiratory time, s; NaN for none
	prevTrig bool
}

func (a *asyState) reset() {
	*a = asyState{prevTe: nan, untrig: nan}
}

// last is the value added last; 0 for none.
func (r *ring8) last() float64 { return r.v[(r.n+len(r.v)-1)%len(r.v)] }

// mean of the values kept; NaN for none.
func (r *ring8) mean() float64 {
	m := min(r.n, len(r.v))
	if m == 0 {
		return nan
	}
	var s float64
	for _, x := range r.v[:m] {
		s += x
	}
	return s / float64(m)
}

// asynchrony sets b's asynchrony words and ineffective efforts, from the
// breath in the buffer [0, j) with expiration from e; trig says whether
// the patient triggered it. It then remembers the breath for the next.
func (s *Segmenter) asynchrony(b *Breath, e, j int, trig bool) {
	c := &s.cfg.Asynchrony
	a := &s.asy
	if n := s.ineffectiveEfforts(e, j, &b.EffortAt); n > 0 {
		b.IneffectiveEfforts = float64(n)
		b.Asynchrony |= AsyIneffectiveEffort
	} else {
		b.IneffectiveEfforts = 0
	}
	meanTi := a.ti.mean()
	settled := a.n >= 4 // four breaths since the start or the last drop (which resets a)
	if settled && a.prevTrig && a.prevTe < c.DoubleTe*meanTi {
		b.Asynchrony |= AsyDoubleTrigger
	}
	if settled && b.Asynchrony&AsyDoubleTrigger == 0 {
		switch {
		case b.Ti < c.ShortTi*meanTi:
			b.Asynchrony |= AsyShortCycle
		case b.Ti > c.LongTi*meanTi:
			b.Asynchrony |= AsyLongCycle
		}
	}
	interval := a.period.last() // since the previous start
	if !trig && settled && b.Asynchrony&AsyDoubleTrigger == 0 {
		// a cycle that nobody triggered: the ventilator's own timed cycle
		// comes at its set interval, the same as its last untriggered one
		// (within 3 %, at least 40 ms); any other was triggered by
		// something other than the patient
		timed := math.IsNaN(a.untrig) || math.Abs(interval-a.untrig) <= max(0.04, 0.03*a.untrig)
		if !timed {
			b.Asynchrony |= AsyAutoTrigger
		} else if s.reverseEffort(e) {
			b.Asynchrony |= AsyReverseTrigger
		}
	}
	if !trig && a.n >= 1 {
		a.untrig = interval
	}
	if b.Asynchrony&(AsyIneffectiveEffort|AsyReverseTrigger) != 0 {
		b.Flags |= FlagActiveEffort
	}
	a.ti.add(b.Ti)
	a.period.add(b.TEnd - b.TStart)
	a.n++
	a.prevTe, a.prevTrig = b.Te, trig
}

// pulledIn reports whether the patient drew gas in before the breath that
// starts at j: in the 0.3 s before it (and 50 ms after, the samples
// there are), the flow rose toward the patient by EffortFlow or more above
// its level 0.3–0.4 s before the start while the airway pressure had not
// risen (3-sample means; a margin of twice the pressure noise, at least
// 0.2 cmH2O). A ventilator that starts a breath raises the pressure as
// the flow rises; a heartbeat moves less gas than that.
func (s *Segmenter) pulledIn(j int) bool {
	lo := s.before(j, 0.4)
	mid := s.before(j, 0.3)
	if mid-lo < 2 || j < 2 {
		return false
	}
	var p0, f0 float64
	for i := lo; i < mid; i++ {
		p0 += s.paw[i]
		f0 += s.flow[i]
	}
	p0 /= float64(mid - lo)
	f0 /= float64(mid - lo)
	margin := max(0.2, 2*s.noiseP())
	for i := max(mid, 2); i < s.n && s.t[i] <= s.t[j]+0.05; i++ {
		if s.paw[i] > p0+margin+s.noiseP() {
			return false // the ventilator raised the pressure first
		}
		// trailing means: what came before the pressure rose
		p := (s.paw[i-2] + s.paw[i-1] + s.paw[i]) / 3
		if p <= p0+margin && (s.flow[i-2]+s.flow[i-1]+s.flow[i])/3-f0 >= s.cfg.Asynchrony.EffortFlow {
			return true
		}
	}
	return false
}

// binWidth is the width of the bins the ineffective-effort scan averages
// over, s: shorter than an effort's fall or recovery (0.2 s and more),
// long enough to average a sensor's noise; the reverse-trigger scan, which
// looks for a rise that lasts, takes bins twice as wide.
const binWidth = 0.05

// bin averages pressure and flow over samples [lo, hi) into bins of about
// width s (wider when they would not fit the scratch buffers) and returns
// them, in the scratch buffers, with the samples per bin w: bin k spans
// [lo + k·w, lo + (k+1)·w).
func (s *Segmenter) bin(lo, hi int, width float64) (ps, fs []float64, w int) {
	if hi-lo < 2 {
		return nil, nil, 1
	}
	dt := (s.t[hi-1] - s.t[lo]) / float64(hi-1-lo)
	w = max(1, int(width/dt+0.5))
	for (hi-lo)/w > len(s.scrP) {
		w++
	}
	nb := (hi - lo) / w
	ps, fs = s.scrP[:nb], s.scrF[:nb]
	for k := range nb {
		var sp, sf float64
		for i := lo + k*w; i < lo+(k+1)*w; i++ {
			sp += s.paw[i]
			sf += s.flow[i]
		}
		ps[k], fs[k] = sp/float64(w), sf/float64(w)
	}
	return ps, fs, w
}

// ineffectiveEfforts counts the efforts in the expiration [e, j) that no
// breath followed, and notes the times of the first ones' deepest
// pressure in at. On 50 ms means of pressure and flow: the airway
// pressure fell by EffortDip or more (and four of its binned noise)
// within 0.4 s while the flow moved toward the patient by EffortFlow or
// more, the two together (see together; Thille 2006: an abrupt pressure
// drop of at least 0.5 cmH2O with a simultaneous fall of expiratory flow
// toward zero); then, from the deepest pressure (within 0.3 s) and within
// 0.8 s, before the last 0.1 s (the next breath's trigger), the pressure
// came back by 0.6 of EffortDip and a quarter of its fall while the flow
// fell back by 0.6 of EffortFlow and a quarter of its rise, never rising
// by half EffortFlow meanwhile — the effort ended. A passive expiration's
// pressure and flow move monotonically toward PEEP and zero and never
// come back; a valve settling on PEEP moves the pressure first and the
// flow after, and wobbles less; a ventilator pushing gas in to hold PEEP
// raises pressure and flow together; the effort that triggers the next
// breath has no end inside this one. The search starts after the
// expiration's strongest outward flow (in its first 40 %, at most 1 s): an
// effort that began in inspiration and fades as the valve opens is not
// one of expiration. The recovery's and the togetherness's shares are our
// choices, set on the test-lung recordings (no false effort) and the
// simulator.
func (s *Segmenter) ineffectiveEfforts(e, j int, at *[3]float64) int {
	c := &s.cfg.Asynchrony
	ps, fs, w := s.bin(e, j, binWidth)
	nb := len(ps)
	if nb < 8 {
		return 0
	}
	dt := s.t[e+w] - s.t[e] // a bin's width, s
	start := 0
	lim := min(int(1/dt), nb*2/5)
	for k := 1; k < lim; k++ {
		if fs[k] < fs[start] {
			start = k
		}
	}
	nbin := float64(w)
	dip := max(c.EffortDip, 4*s.noiseP()/math.Sqrt(nbin))
	fl := max(c.EffortFlow, 4*s.noiseF()/math.Sqrt(nbin))
	left, right, down := int(0.4/dt+0.5), int(0.8/dt+0.5), int(0.3/dt+0.5)
	end := nb - int(0.1/dt+0.5) // not the last 0.1 s: the next breath's trigger
	count := 0
	for i := start + 1; i < end; i++ {
		// the fall: from a bin up to 0.6 s before
		from := -1
		for a := max(start, i-left); a < i && from < 0; a++ {
			if ps[a]-ps[i] >= dip && fs[i]-fs[a] >= fl && together(ps, fs, a, i) {
				from = a
			}
		}
		if from < 0 {
			continue
		}
		// its bottom, and the recovery from there: the pressure comes back
		// while the flow only falls back — a ventilator that pushes gas in
		// to restore PEEP raises both
		bot := i
		for k := i + 1; k < min(end, i+down); k++ {
			if ps[k] < ps[bot] {
				bot = k
			}
		}
		// a quarter of the fall and of the rise at least: the wobble of a
		// valve settling on PEEP after a passive expiration is smaller
		pBack := max(0.6*dip, (ps[from]-ps[bot])/4)
		fBack := max(0.6*fl, (fs[bot]-fs[from])/4)
		fmax := fs[bot]
		for b := bot + 1; b < min(end, bot+right+1); b++ {
			fmax = max(fmax, fs[b])
			if fmax > fs[bot]+fl/2 {
				break
			}
			if ps[b]-ps[bot] >= pBack && fs[bot]-fs[b] >= fBack {
				if count < len(at) {
					at[count] = s.t[e+bot*w+w/2]
				}
				count++
				i = b
				break
			}
		}
	}
	return count
}

// together reports whether pressure and flow moved together from bin a
// to bin i: when the pressure had made half its fall, the flow had made a
// quarter of its rise or more. The end of a passive expiration, where the
// pressure settles on PEEP first and the flow comes to zero after, moves
// them one after the other.
func together(ps, fs []float64, a, i int) bool {
	h := a + 1
	for h < i && ps[h] > (ps[a]+ps[i])/2 {
		h++
	}
	return (fs[h]-fs[a])/(fs[i]-fs[a]) >= 0.25
}

// reverseEffort reports whether the patient's effort began during the
// inflation of a breath the ventilator started, on 0.1 s means of
// pressure and flow (a change that lasts, not a sensor's spike): past
// half the pressure's swing and while gas still flows in (not in a
// pause), within 0.5 s the pressure fell by EffortDip or more while the
// flow did not fall (volume control), or the flow rose by EffortFlow or
// more while the pressure did not rise (pressure control); "did not"
// allows twice the means' noise.
func (s *Segmenter) reverseEffort(e int) bool {
	c := &s.cfg.Asynchrony
	ps, fs, w := s.bin(0, e, 2*binWidth)
	nb := len(ps)
	if nb < 4 {
		return false
	}
	dt := s.t[w] - s.t[0]
	top := ps[0]
	for _, p := range ps {
		top = max(top, p)
	}
	half := (ps[0] + top) / 2
	k0 := 0
	for k0 < nb && ps[k0] < half {
		k0++
	}
	nbin := float64(w)
	dip := max(c.EffortDip, 4*s.noiseP()/math.Sqrt(nbin))
	fl := max(c.EffortFlow, 4*s.noiseF()/math.Sqrt(nbin))
	pn, fn := 2*s.noiseP()/math.Sqrt(nbin), 2*s.noiseF()/math.Sqrt(nbin)
	span := int(0.5/dt + 0.5)
	inflow := s.cfg.StartFlow
	for b := k0 + 1; b < nb; b++ {
		fb, pb := fs[b], ps[b]
		if fb < inflow {
			continue
		}
		for a := max(k0, b-span); a < b; a++ {
			fa, pa := fs[a], ps[a]
			if fa < inflow {
				continue
			}
			if pa-pb >= dip && fb >= fa-fn {
				return true
			}
			if fb-fa >= fl && pb <= pa+pn {
				return true
			}
		}
	}
	return false
}

// PeriodLength is the length of the fixed periods the asynchrony index is
// also given over, s: 10 minutes from the stream's time 0.
const PeriodLength = 600

// Tally counts the asynchronies of a run of breaths for the asynchrony
// index.
type Tally struct {
	// Start and End are the stream time of the first breath's start and
	// the last's end, s; for a fixed period (Periods), the period's.
	Start, End float64
	Cycles     int                  // ventilator cycles: the breaths
	Counts     [NumAsynchronies]int // events by type; ineffective efforts by their number
}

// Add counts one breath.
func (a *Tally) Add(b *Breath) { a.count(b.TStart, b.TEnd, b.Asynchrony, b.IneffectiveEfforts) }

// count counts a breath from [start, end) with asynchronies asy and ie
// ineffective efforts.
func (a *Tally) count(start, end float64, asy Asynchrony, ie float64) {
	if a.Cycles == 0 {
		a.Start = start
	}
	a.End = end
	a.Cycles++
	for i := 1; i < NumAsynchronies; i++ {
		if asy&(1<<i) != 0 {
			a.Counts[i]++
		}
	}
	if ie > 0 {
		a.Counts[0] += int(ie)
	}
}

// Events is the number of asynchrony events: each word of each breath
// once, ineffective efforts by their number.
func (a *Tally) Events() int {
	n := 0
	for _, c := range a.Counts {
		n += c
	}
	return n
}

// MinCycles is the fewest cycles an asynchrony index is given for: over
// fewer, one event moves it by more than 10 points (our choice).
const MinCycles = 10

// Index is the asynchrony index, events / (cycles + ineffective efforts)
// × 100 (Thille et al., Intensive Care Med 2006;32:1515), %; NaN over
// fewer than MinCycles cycles.
func (a *Tally) Index() float64 {
	base := a.Cycles + a.Counts[0]
	if a.Cycles < MinCycles {
		return nan
	}
	return 100 * float64(a.Events()) / float64(base)
}

// Periods tallies breaths by fixed periods of PeriodLength s of stream
// time from 0: the period in progress and the last one that ended before
// it. The zero value is ready.
type Periods struct {
	Current, Last Tally
	HasLast       bool // false until a period has ended
	k             float64
	started       bool
}

// Add counts b in the period its start falls in, and reports whether that
// began a new period after the one in progress (which is then Last).
func (p *Periods) Add(b *Breath) (ended bool) {
	k := math.Floor(b.TStart / PeriodLength)
	if !p.started || k != p.k {
		ended = p.started && k > p.k // stream time that goes back starts afresh
		p.Last, p.HasLast = p.Current, ended
		p.Current, p.k, p.started = Tally{}, k, true
	}
	p.Current.Add(b)
	p.Current.Start, p.Current.End = k*PeriodLength, (k+1)*PeriodLength
	return ended
}
