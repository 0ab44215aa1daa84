package mechanics

import (
	"errors"
	"fmt"
	"math"
)

// Config tunes breath detection and the per-breath metrics. The zero value
// of a field means its default (see Defaults).
type Config struct {
	StartFlow  float64 // an inflation may start when flow rises above this, L/min; default 5
	EndFlow    float64 // inspiratory flow has ended below this, L/min; default 3
	PauseFlow  float64 // |flow| below this after inspiration is a pause, L/min; default 3
	ExpFlow    float64 // expiration may start when flow falls below −ExpFlow, L/min; default 3
	MinInsp    float64 // shortest inspiration, s; default 0.15
	MinExp     float64 // shortest expiration before the next start, s; default 0.2
	MinPause   float64 // shortest pause that gives a plateau, s; default 0.1
	MaxBreath  float64 // longer breaths are dropped, s; default 20
	OpenPaw    float64 // airway pressure below this with flow under StartFlow …, cmH2O; default 1.5
	OpenTime   float64 // … for this long is an open circuit: the breath is dropped, s; default 1
	FitR2Min   float64 // a fit below this R² is unreliable; default 0.95
	LeakLimit  float64 // flag a leak above this, %; default 15
	EEFLimit   float64 // flag incomplete exhalation when end-expiratory flow is below −EEFLimit, L/min; default 5
	TriggerDip float64 // a pressure drop this deep while flow turns inward is the patient's effort, cmH2O; default 0.5

	// An inflation is a breath only when it carries at least MinVT mL
	// (default 40), raises the airway pressure by at least MinRise cmH2O
	// (default 2) and its flow reaches 4·StartFlow, and all three are at
	// least RelMin (default 0.25) of the recent breaths' median volume,
	// pressure swing and peak flow: expiratory flow humps, bias flow and
	// noise are not breaths.
	MinVT   float64
	MinRise float64
	RelMin  float64

	// PauseDecayLimit: a plateau whose slow fall would still go on by more
	// than this after the pause is plateau_unsettled, cmH2O; default 0.5
	PauseDecayLimit float64
	PEEPiMin        float64 // intrinsic PEEP from this is present: intrinsic_peep, and dp against total PEEP, cmH2O; default 0.5

	// CircuitCompliance is the breathing circuit's compliance, mL/cmH2O
	// (adult circuits about 1–2): with flow measured at the ventilator,
	// the gas compressed in the circuit is removed from the volumes and
	// the fits. Default 0: flow is measured at the airway.
	CircuitCompliance float64

	// FlowDelay is how far the flow channel lags the pressure channel, s
	// (negative: it leads). It is estimated from the inflation onsets and
	// the channels are aligned by it, unless FlowDelayFixed says to use
	// FlowDelay as given (0: no alignment).
	FlowDelay      float64
	FlowDelayFixed bool

	Sex      string  // male or female, for predicted body weight; "" for none
	HeightCm float64 // cm, with Sex

	Asynchrony AsynchronyConfig // the patient–ventilator asynchrony detectors
}

// Defaults fills the unset fields.
func (c *Config) Defaults() {
	def(&c.StartFlow, 5)
	def(&c.EndFlow, 3)
	def(&c.PauseFlow, 3)
	def(&c.ExpFlow, 3)
	def(&c.MinInsp, 0.15)
	def(&c.MinExp, 0.2)
	def(&c.MinPause, 0.1)
	def(&c.MaxBreath, 20)
	def(&c.OpenPaw, 1.5)
	def(&c.OpenTime, 1)
	def(&c.FitR2Min, 0.95)
	def(&c.LeakLimit, 15)
	def(&c.EEFLimit, 5)
	def(&c.TriggerDip, 0.5)
	def(&c.MinVT, 40)
	def(&c.MinRise, 2)
	def(&c.RelMin, 0.25)
	def(&c.PauseDecayLimit, 0.5)
	def(&c.PEEPiMin, 0.5)
	c.Asynchrony.Defaults()
}

// def sets *p to v when it is unset (0).
func def(p *float64, v float64) {
	if *p == 0 {
		*p = v
	}
}

// Validate reports the first unusable setting.
func (c *Config) Validate() error {
	for _, v := range []float64{c.StartFlow, c.EndFlow, c.PauseFlow, c.ExpFlow, c.MinInsp, c.MinExp,
		c.MinPause, c.MaxBreath, c.OpenTime, c.FitR2Min, c.LeakLimit, c.EEFLimit, c.TriggerDip,
		c.MinVT, c.MinRise, c.RelMin, c.PauseDecayLimit, c.PEEPiMin} {
		if math.IsNaN(v) || v < 0 {
			return errors.New("detection thresholds must be positive numbers")
		}
	}
	if c.EndFlow > c.StartFlow {
		return fmt.Errorf("end_flow %g L/min must not exceed start_flow %g", c.EndFlow, c.StartFlow)
	}
	if c.MaxBreath > 120 {
		return fmt.Errorf("max_breath %g s: at most 120", c.MaxBreath)
	}
	if c.RelMin > 0.9 {
		return fmt.Errorf("rel_min %g: at most 0.9 of the recent breaths", c.RelMin)
	}
	if !(c.CircuitCompliance >= 0 && c.CircuitCompliance <= 10) {
		return fmt.Errorf("circuit compliance %g mL/cmH2O: 0 (flow measured at the airway) to 10", c.CircuitCompliance)
	}
	if math.IsNaN(c.FlowDelay) || math.Abs(c.FlowDelay) > maxDelay {
		return fmt.Errorf("flow delay %g s: at most ±%g s", c.FlowDelay, maxDelay)
	}
	if c.Sex != "" || c.HeightCm != 0 {
		if _, err := PredictedBodyWeight(c.Sex, c.HeightCm); err != nil {
			return err
		}
	}
	return c.Asynchrony.Validate()
}

// Drops counts breaths in progress that were dropped, by cause.
type Drops struct {
	Gap      int64 // a gap in the stream
	Open     int64 // the circuit was open (pressure near zero)
	TooLong  int64 // longer than MaxBreath, or than the buffer holds
	Restarts int64 // detection restarted without a breath (stream start mid-breath)
}

// segState is where the segmenter is in the breath cycle.
type segState uint8

const (
	stSync segState = iota // wait for a sample that is not inspiration
	stWait                 // no breath in progress: wait for an inflation
	stInsp                 // a breath's inspiration: flow, then perhaps a pause
	stExp                  // expiration: wait for the next inflation
)

// Segmenter finds breaths in a stream of samples and computes each one's
// metrics. It keeps the current breath's samples in a buffer allocated once
// and reused: memory is constant and the per-sample path does not allocate.
// It is not safe for concurrent use.
//
// A breath starts where an inflation starts. Flow above StartFlow opens a
// candidate; it becomes a breath only once it has carried MinVT and raised
// the pressure by MinRise (and RelMin of the recent breaths), and is
// dropped when the flow falls back first — so a flow hump in expiration,
// bias flow or noise stays inside the breath it belongs to. The start is
// the onset of the steep rise of flow, or, when the patient's pull on the
// circuit (pressure falling as flow turns inward) came first, where the
// flow turned inward. Expiration starts where flow turns outward while the
// pressure falls from its inspiratory level (or a quarter of the inspired
// volume has left): flow that dips below zero while the ventilator still
// holds the pressure is inspiration.
type Segmenter struct {
	cfg   Config
	pbw   float64 // kg, 0 without a patient
	state segState

	t, paw, flow []float64 // samples since the breath (or the wait) began
	n            int
	inspEnd      int // index of the first sample after inspiratory flow, −1 while it flows
	expStart     int // index of the first expiratory sample
	expLow       int // index where the pressure was released, when expiration began without outward flow; −1 otherwise
	relAt        int // index since which the pressure has been released in inspiration, −1 for none
	openSince    float64
	open         bool
	deadline     float64 // t[0] + MaxBreath in a breath, else +Inf
	inspMin      float64 // t[0] + MinInsp in a breath

	// the inflation being confirmed (cand ≥ 0) and the current breath's
	// inspiration
	cand      int      // candidate's first index, −1 for none
	candPrev  segState // the state the candidate came from
	candVol   float64  // volume since the candidate's start, L·min/s·… (flow × s, L/min·s)
	candBase  float64  // airway pressure before the candidate, cmH2O
	candMax   float64  // highest airway pressure since the candidate's start, cmH2O
	candPeak  float64  // highest flow since the candidate's start, L/min
	pBase     float64  // the breath's pressure before its inflation, cmH2O
	pTop      float64  // highest airway pressure of the inspiration, cmH2O
	peakFlow  float64  // highest inspiratory flow of the breath, L/min
	recentVT  ring8    // the last breaths' inspired volumes, mL
	recentSw  ring8    // … and pressure swings ppeak − peep, cmH2O
	recentR   ring8    // … and reliable fitted resistances, cmH2O·s/L
	recentPF  ring8    // … and peak inspiratory flows, L/min
	medVT     float64
	medSw     float64
	medPF     float64
	medR      float64 // the medians of recentVT, recentSw, recentPF and recentR
	sigP      float64
	sigF      float64 // pressure and flow noise (σ), cmH2O and L/min; NaN before the first breath
	seq       int64
	afterDrop bool    // the next breath follows a dropped one
	nextDip   bool    // an effort was seen just before the breath in progress
	nextPull  bool    // … or the patient drew gas in before it (for the asynchrony detectors)
	lastPEEP  float64 // the previous breath's PEEP, cmH2O; NaN at first
	drops     Drops
	out       Breath
	si        siFit     // the stress-index fit's points, kept from breath to breath
	lastSI    float64   // the previous stress index, where its fit starts; NaN for none
	align     aligner   // channel delay: estimate and alignment
	scrP      []float64 // scratch for per-breath tests, 1024 each
	scrF      []float64
	asy       asyState // what the asynchrony detectors keep
}

// NewSegmenter returns a segmenter for samples arriving at about rateHz
// (which sizes its buffer). cfg is completed with its defaults.
func NewSegmenter(cfg Config, rateHz float64) (*Segmenter, error) {
	cfg.Defaults()
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	if rateHz <= 0 || math.IsNaN(rateHz) {
		rateHz = 200
	}
	size := int(math.Min(math.Max(cfg.MaxBreath*rateHz*1.5, 1024), 1<<18))
	s := &Segmenter{cfg: cfg, t: make([]float64, size), paw: make([]float64, size), flow: make([]float64, size),
		si: newSIFit(), openSince: math.NaN(), deadline: math.Inf(1), lastPEEP: math.NaN(), lastSI: math.NaN(),
		cand: -1, sigP: math.NaN(), sigF: math.NaN(), scrP: make([]float64, 1024), scrF: make([]float64, 1024)}
	s.align.init(cfg.FlowDelay, cfg.FlowDelayFixed, cfg.CircuitCompliance)
	s.asy.reset()
	if cfg.Sex != "" {
		s.pbw, _ = PredictedBodyWeight(cfg.Sex, cfg.HeightCm)
	}
	return s, nil
}

// Drops returns the dropped-breath counters.
func (s *Segmenter) Drops() Drops { return s.drops }

// Open reports whether the circuit looks open now: airway pressure under
// OpenPaw without flow for OpenTime.
func (s *Segmenter) Open() bool { return s.open }

// Breaths is the number of breaths completed.
func (s *Segmenter) Breaths() int64 { return s.seq }

// Add takes one sample: time t (s), airway pressure paw (cmH2O), flow
// (L/min, positive into the patient) and whether a gap came before it. It
// returns the breath that this sample completed, or nil. The breath is
// reused by the next call that completes one.
func (s *Segmenter) Add(t, paw, flow float64, gap bool) *Breath {
	if gap {
		s.drop(&s.drops.Gap)
		s.align.reset()
	}
	// the aligner's add, by hand: the call costs more than the three stores
	a := &s.align
	a.ring[a.raw&(alignSize-1)] = rawSample{t, paw, flow}
	a.raw++
	if a.raw == a.wake {
		a.wakeUp(t)
	}
	if a.lagP|a.lagF != 0 {
		var ok bool
		if paw, flow, ok = a.lagged(); !ok {
			return nil
		}
	}
	if s.n == len(s.t) {
		s.drop(&s.drops.TooLong)
	}
	k := s.n
	s.t[k], s.paw[k], s.flow[k] = t, paw, flow
	s.n++
	if paw >= s.cfg.OpenPaw || math.Abs(flow) >= s.cfg.StartFlow {
		s.open = false // the common case, without a call
		s.openSince = nan
	} else if s.checkOpen(t) {
		s.drop(&s.drops.Open)
		return nil
	}
	if t > s.deadline { // a breath in progress for longer than MaxBreath
		if s.open {
			s.drop(&s.drops.Open)
		} else {
			s.drop(&s.drops.TooLong)
		}
		return nil
	}
	if s.cand >= 0 {
		return s.candidate(k, paw, flow, s.dv(k))
	}
	c := &s.cfg
	switch s.state {
	case stSync:
		if flow <= 0 {
			s.state = stWait
		}
		s.keepLast(1)
	case stWait:
		if flow > c.StartFlow {
			s.open1(k)
		} else if s.n > 64 {
			s.keepLast(16)
		}
	case stInsp:
		s.inspiration(k, paw, flow)
	case stExp:
		if flow > c.StartFlow && t-s.t[s.expStart] >= c.MinExp {
			s.open1(k)
		}
	}
	return nil
}

// dv is the volume that flowed from sample k−1 to k, L/min·s.
func (s *Segmenter) dv(k int) float64 {
	if k == 0 {
		return 0
	}
	return (s.flow[k] + s.flow[k-1]) / 2 * (s.t[k] - s.t[k-1])
}

// open1 opens a candidate inflation whose flow passed StartFlow at k.
func (s *Segmenter) open1(k int) {
	lo := 0
	if s.state == stExp {
		lo = max(s.expStart, s.expLow) + 1
	}
	j := s.riseStart(k, lo)
	if j < 0 {
		s.drops.Restarts++
		s.state = stSync
		return
	}
	s.cand, s.candPrev = j, s.state
	s.candVol = 0
	for i := j; i < k; i++ {
		s.candVol += (s.flow[i] + s.flow[i+1]) / 2 * (s.t[i+1] - s.t[i])
	}
	s.candBase = s.paw[j-1]
	if j >= 3 {
		s.candBase = (s.paw[j-1] + s.paw[j-2] + s.paw[j-3]) / 3
	}
	s.candMax, s.candPeak = s.paw[j], s.flow[j]
	for i := j + 1; i <= k; i++ {
		s.candMax, s.candPeak = max(s.candMax, s.paw[i]), max(s.candPeak, s.flow[i])
	}
}

// candidate follows an inflation until it is a breath or is given up.
func (s *Segmenter) candidate(k int, paw, flow, dv float64) *Breath {
	c := &s.cfg
	s.candVol += dv
	s.candMax = max(s.candMax, paw)
	if k >= 2 && (flow+s.flow[k-1]+s.flow[k-2])/3 < c.EndFlow {
		s.cand = -1 // the flow fell back: a hump, not a breath
		return nil
	}
	s.candPeak = max(s.candPeak, flow)
	vol := s.candVol / 60 * 1000 // mL
	rise := s.candMax - s.candBase
	if vol < c.MinVT || rise < c.MinRise || s.candPeak < 4*c.StartFlow {
		return nil
	}
	if vol < c.RelMin*s.medVT || rise < c.RelMin*s.medSw || s.candPeak < c.RelMin*s.medPF {
		return nil
	}
	j := s.onset(s.cand, k)
	s.cand = -1
	if s.candPrev == stWait {
		s.begin(j)
		return nil
	}
	return s.finish(j)
}

// onset refines the start of a confirmed inflation whose flow first rose
// above StartFlow/5 at c: the foot of the last rise to half its peak flow
// so far (going back, where the flow stops falling or is down to a tenth
// of the rise), or, when the patient drew flow in during the 0.2 s before
// that rise (see drawn; a trigger's delay is shorter, a slow inflow that
// the ventilator's own pressure drives is not drawn), where the flow
// turned inward before c: the breath starts where the patient began to
// inhale.
func (s *Segmenter) onset(c, k int) int {
	// the flow as the mean of three samples, so that a fast flow sensor's
	// ringing neither ends nor starts a rise
	f := func(i int) float64 {
		return (s.flow[max(i-1, c)] + s.flow[i] + s.flow[min(i+1, k)]) / 3
	}
	peak := f(c)
	for i := c + 1; i <= k; i++ {
		peak = max(peak, f(i))
	}
	m := k // the first sample of the last run at or above half the peak
	for m > c && f(m-1) >= peak/2 {
		m--
	}
	half := m
	// back down the rise to its foot: while the flow keeps falling, stays
	// a tenth of the way up from the lowest flow before the rise, and
	// above zero flow
	low := s.flow[c-1] // at most StartFlow/5: where the flow left zero
	for i := c; i < m; i++ {
		low = min(low, f(i))
	}
	foot := low + 0.1*(peak-low)
	for m > c && f(m-1) < f(m) && f(m-1) > foot && s.flow[m-1] > s.cfg.StartFlow/5 {
		m--
	}
	// the patient's pull shows before the ventilator raises the pressure:
	// from 0.2 s before the foot up to the steep rise (drawn stops where the
	// pressure rises)
	if m > c && s.drawn(max(c, s.before(m, 0.2)), half+1, s.candBase) {
		if s.state == stExp && s.expLow >= 0 {
			return m // the flow never turned: it stayed inward since the release
		}
		for c > 1 && s.flow[c-1] > 0 && (s.state != stExp || c-1 > s.expStart) {
			c-- // back to where the flow turned inward
		}
		return c
	}
	return m
}

// before is the first sample index at most d seconds before sample i.
func (s *Segmenter) before(i int, d float64) int {
	j := i
	for j > 0 && s.t[i]-s.t[j-1] <= d {
		j--
	}
	return j
}

// drawn reports whether the patient drew flow in during samples [lo, hi),
// before the ventilator raised the airway pressure above base (the
// pressure before the inflation). Three signs count, each against the
// pressure noise (3-sample means of pressure, margin 1.5 times its σ, 2.6
// times the mean's):
//   - a trigger dip: inward flow above StartFlow/2 while the pressure is
//     below base, for at least 2 samples and 10 ms (the patient pulls on
//     the circuit: Thille et al., Intensive Care Med 2006;32:1515);
//   - a pull: see pullSums;
//   - unsupported flow: inward flow above StartFlow (and three times the
//     flow noise) while the pressure has not risen above base and stays
//     below base plus 0.8 of the recent breaths' resistance times the
//     flow, for at least 2 samples and 10 ms. A passive lung only fills
//     when the airway pressure exceeds the alveolar pressure, itself at
//     or above PEEP, by R·V'; more flow than that means the patient's
//     muscles drew it in (the equation of motion with Pmus; Bates 2009,
//     ch. 3). Two samples: a skew of one sample between the channels,
//     left after their alignment, is not an effort.
func (s *Segmenter) drawn(lo, hi int, base float64) bool {
	r := s.medR * 0.8
	margin := max(0.2, 1.5*s.noiseP())
	inflow := max(s.cfg.StartFlow, 3*s.noiseF())
	dip, flat := -1, -1 // where each run of the condition began
	var pull pullSums
	for i := max(lo, 1); i < hi && i+1 < s.n; i++ {
		p := (s.paw[i-1] + s.paw[i] + s.paw[i+1]) / 3
		f := s.flow[i]
		if f > s.cfg.StartFlow/2 && base-p > margin {
			if dip < 0 {
				dip = i
			}
			if i >= dip+1 && s.t[i]-s.t[dip] >= 0.01-1e-9 {
				return true
			}
		} else {
			dip = -1
		}
		if f > inflow && p-base < margin && base+r*f/60-p > margin {
			if flat < 0 {
				flat = i
			}
			if i > flat && s.t[i]-s.t[flat] >= 0.01-1e-9 {
				return true
			}
		} else {
			flat = -1
		}
		if p-base > margin {
			break // the ventilator is raising the pressure: the rest is its
		}
		if f > s.cfg.StartFlow/5 {
			pull.add(s.t[i], s.paw[i], f)
		}
	}
	return pull.pulled(base, s.noiseP())
}

// pullSums gathers the samples of inward flow before the pressure rises,
// for the third sign of drawn: a patient's pull lowers the pressure as the
// flow it draws grows (through the circuit's resistance), where a valve
// that pushes gas raises both together.
type pullSums struct {
	n, t0, t1             float64
	sp, sf, spp, sff, spf float64
}

func (a *pullSums) add(t, p, f float64) {
	if a.n == 0 {
		a.t0 = t
	}
	a.n++
	a.t1 = t
	a.sp += p
	a.sf += f
	a.spp += p * p
	a.sff += f * f
	a.spf += p * f
}

// pulled reports at least 3 samples over 20 ms whose mean pressure is
// below base by 3 of its standard errors (and 0.1 cmH2O), falling as the
// flow rises (correlation under −0.3; our thresholds, common practice, no
// source).
func (a *pullSums) pulled(base, sigma float64) bool {
	if a.n < 3 || a.t1-a.t0 < 0.02-1e-9 {
		return false
	}
	mp, mf := a.sp/a.n, a.sf/a.n
	if base-mp <= max(0.1, 3*sigma/math.Sqrt(a.n)) {
		return false
	}
	vp, vf := a.spp/a.n-mp*mp, a.sff/a.n-mf*mf
	if vp <= 0 || vf <= 0 {
		return false
	}
	return (a.spf/a.n-mp*mf)/math.Sqrt(vp*vf) < -0.3
}

// inspiration follows a breath's inspiration to its end: expiration is
// confirmed at k when flow is outward and either the pressure has fallen
// below the middle of its swing or a quarter of the inspired volume has
// gone out; it starts where the ventilator let go of the pressure (see
// valveOpening).
func (s *Segmenter) inspiration(k int, paw, flow float64) {
	c := &s.cfg
	s.pTop, s.peakFlow = max(s.pTop, paw), max(s.peakFlow, flow)
	switch {
	case flow > c.StartFlow:
		s.inspEnd = -1 // flow resumed: still inspiration
	case s.inspEnd < 0 && flow < c.EndFlow && s.t[k] >= s.inspMin:
		s.inspEnd = k
	}
	if s.released(k, paw) {
		return
	}
	if flow >= -c.ExpFlow || s.t[k] < s.inspMin {
		return
	}
	if falling := paw < (s.pTop+s.pBase)/2; !falling && !s.quarterOut(k) {
		return
	}
	e := s.valveOpening(k)
	if s.inspEnd < 0 || s.inspEnd > e {
		s.inspEnd = e
	}
	s.expStart, s.state = e, stExp
	s.align.settle()
}

// released reports, and starts expiration, when the ventilator has let go
// of the pressure for 0.1 s although no gas flows out: the airway pressure
// has stayed within 30 % of the swing above the breath's base (the swing
// at least MinRise) while the patient, still pulling, holds the flow at or
// above −ExpFlow — the first cycle of a double trigger, or an effort that
// outlasts the ventilator's inspiration. Expiration starts after the last
// sample still in the top quarter of the swing. A passive lung pushes gas
// out as soon as the pressure falls and never gets here.
func (s *Segmenter) released(k int, paw float64) bool {
	swing := s.pTop - s.pBase
	if s.t[k] < s.inspMin || swing < s.cfg.MinRise || paw >= s.pBase+0.3*swing {
		s.relAt = -1
		return false
	}
	if s.relAt < 0 {
		s.relAt = k
	}
	if s.t[k]-s.t[s.relAt] < 0.1-1e-9 {
		return false
	}
	e := s.relAt
	for e > 1 && s.paw[e-1] < s.pTop-0.25*swing {
		e--
	}
	if s.inspEnd < 0 || s.inspEnd > e {
		s.inspEnd = e
	}
	s.expStart, s.expLow, s.state = e, s.relAt, stExp
	s.align.settle()
	return true
}

// quarterOut reports whether the run of outward flow that ends at k has
// carried out a quarter of the volume inspired before it (volumes from the
// buffer: this is asked only while outward flow meets a held pressure).
func (s *Segmenter) quarterOut(k int) bool {
	r := k
	for r > 0 && s.flow[r-1] < 0 {
		r--
	}
	var in, out float64
	for i := 1; i <= k; i++ {
		if i <= r {
			in += s.dv(i)
		} else {
			out -= s.dv(i)
		}
	}
	return out >= in/4
}

// valveOpening finds the first expiratory sample for an expiration
// confirmed at k: the sample of the steepest pressure fall with outward
// flow in the last 0.3 s — where the ventilator let go of the pressure —
// walked back over the samples of that same fall; without such a fall
// (at least 1 cmH2O in a sample), the start of the run of outward flow
// that ends at k.
func (s *Segmenter) valveOpening(k int) int {
	c := &s.cfg
	best, drop := -1, 1.0
	for i := k; i > 1 && s.t[k]-s.t[i] <= 0.3 && s.t[i-1] >= s.inspMin; i-- {
		if d := s.paw[i-1] - s.paw[i]; d >= drop && s.flow[i] < -c.ExpFlow {
			best, drop = i, d
		}
	}
	if best > 0 {
		for best > 1 && s.paw[best-2]-s.paw[best-1] >= drop/2 && s.flow[best-1] < -c.ExpFlow {
			best--
		}
		// outward flow that began at most 20 ms before the pressure fell
		// is the circuit's gas leaving as the valve opens
		r := best
		for r > 1 && s.flow[r-1] < -c.ExpFlow {
			r--
		}
		if s.t[best]-s.t[r] <= 0.02+1e-9 {
			best = r
		}
		return best
	}
	tol := max(0.5, 2*s.noiseF())
	e := k
	for e > 1 && s.flow[e-1] < -tol {
		e--
	}
	return e
}

// checkOpen tracks time with pressure below OpenPaw and flow under
// StartFlow, and reports an open circuit once it lasts OpenTime.
func (s *Segmenter) checkOpen(t float64) bool {
	if math.IsNaN(s.openSince) || s.openSince > t {
		s.openSince = t
	}
	if !s.open && t-s.openSince >= s.cfg.OpenTime {
		s.open = true
		return true
	}
	return false
}

// riseStart walks back from sample k, where flow passed StartFlow, to the
// first sample of the rise: the one after the last sample at or below a
// fifth of StartFlow, not before lo. It returns −1 when the rise began
// before the buffer (the stream started in the middle of a breath).
func (s *Segmenter) riseStart(k, lo int) int {
	zero := s.cfg.StartFlow / 5
	j := k
	for j > lo && s.flow[j-1] > zero {
		j--
	}
	if j == 0 {
		return -1
	}
	return j
}

// begin starts a breath at buffer index j.
func (s *Segmenter) begin(j int) {
	s.shift(j)
	s.state, s.inspEnd, s.expStart, s.expLow, s.relAt = stInsp, -1, -1, -1, -1
	s.deadline, s.inspMin = s.t[0]+s.cfg.MaxBreath, s.t[0]+s.cfg.MinInsp
	s.pBase = s.candBase
	s.pTop, s.peakFlow = s.paw[0], s.flow[0]
	for i := 1; i < s.n; i++ {
		s.pTop, s.peakFlow = max(s.pTop, s.paw[i]), max(s.peakFlow, s.flow[i])
	}
	s.align.onset(s.n)
}

// finish computes the breath that ends at index j (the next start), starts
// the next one there, and returns the finished breath.
func (s *Segmenter) finish(j int) *Breath {
	b := &s.out
	s.seq++
	s.compute(b, j)
	b.Seq = s.seq
	if s.afterDrop {
		b.Flags |= FlagGap
		s.afterDrop = false
	}
	s.align.accept(b.Reliable())
	s.recentVT.add(b.VTi)
	s.recentSw.add(b.PPeak - b.PEEP)
	s.recentPF.add(s.peakFlow)
	s.medVT, s.medSw, s.medPF = s.recentVT.median(), s.recentSw.median(), s.recentPF.median()
	if b.Reliable() {
		s.recentR.add(b.FitR)
		s.medR = s.recentR.median()
	}
	s.begin(j)
	return b
}

// drop abandons the breath in progress.
func (s *Segmenter) drop(counter *int64) {
	if s.state >= stInsp {
		*counter++
		s.afterDrop = true
	}
	s.state, s.n, s.nextDip, s.nextPull, s.lastPEEP, s.cand = stSync, 0, false, false, math.NaN(), -1
	s.deadline = math.Inf(1)
	s.recentVT, s.recentSw, s.recentR, s.recentPF = ring8{}, ring8{}, ring8{}, ring8{}
	s.medVT, s.medSw, s.medPF, s.medR = 0, 0, 0, 0
	s.asy.reset()
}

// shift moves samples [j, n) to the front of the buffer.
func (s *Segmenter) shift(j int) {
	copy(s.t, s.t[j:s.n])
	copy(s.paw, s.paw[j:s.n])
	copy(s.flow, s.flow[j:s.n])
	s.n -= j
	if s.cand >= 0 {
		s.cand -= j
	}
}

// keepLast keeps the last m samples.
func (s *Segmenter) keepLast(m int) {
	if s.n > m {
		s.shift(s.n - m)
	}
}

// noiseP and noiseF are the noise estimates; before the first breath has
// measured them, a ventilator's usual (0.2 cmH2O, 0.5 L/min; our choice),
// so that the first breath's tests are not sharper than the rest.
func (s *Segmenter) noiseP() float64 {
	if math.IsNaN(s.sigP) {
		return 0.2
	}
	return s.sigP
}

func (s *Segmenter) noiseF() float64 {
	if math.IsNaN(s.sigF) {
		return 0.5
	}
	return s.sigF
}

// ring8 keeps the last eight values of a per-breath quantity.
type ring8 struct {
	v [8]float64
	n int
}

func (r *ring8) add(x float64) {
	if math.IsNaN(x) {
		return
	}
	r.v[r.n%len(r.v)] = x
	r.n++
}

// median of the values kept; 0 for none.
func (r *ring8) median() float64 {
	m := min(r.n, len(r.v))
	if m == 0 {
		return 0
	}
	x := r.v
	if m < len(x) {
		sortSmall(x[:m])
	} else {
		sort8(&x)
	}
	if m%2 == 1 {
		return x[m/2]
	}
	return (x[m/2-1] + x[m/2]) / 2
}

// sort8 sorts eight values by Batcher's odd–even merge network (19
// compare-exchanges, no branches to mispredict).
func sort8(x *[8]float64) {
	ce := func(i, j int) { x[i], x[j] = min(x[i], x[j]), max(x[i], x[j]) }
	ce(0, 1)
	ce(2, 3)
	ce(4, 5)
	ce(6, 7)
	ce(0, 2)
	ce(1, 3)
	ce(4, 6)
	ce(5, 7)
	ce(1, 2)
	ce(5, 6)
	ce(0, 4)
	ce(1, 5)
	ce(2, 6)
	ce(3, 7)
	ce(2, 4)
	ce(3, 5)
	ce(1, 2)
	ce(3, 4)
	ce(5, 6)
}
