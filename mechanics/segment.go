package mechanics

import (
	"errors"
	"fmt"
	"math"
)

// Config tunes breath detection and the per-breath metrics. The zero value
// of a field means its default (see Defaults).
type Config struct {
	StartFlow  float64 // inspiration starts when flow rises above this, L/min; default 5
	EndFlow    float64 // inspiratory flow has ended below this, L/min; default 3
	PauseFlow  float64 // |flow| below this after inspiration is a pause, L/min; default 3
	ExpFlow    float64 // expiration starts when flow falls below −ExpFlow, L/min; default 3
	MinInsp    float64 // shortest inspiration, s; default 0.15
	MinExp     float64 // shortest expiration before the next start, s; default 0.2
	MinPause   float64 // shortest pause that gives a plateau, s; default 0.1
	MaxBreath  float64 // longer breaths are dropped, s; default 20
	OpenPaw    float64 // airway pressure below this with flow under StartFlow …, cmH2O; default 1.5
	OpenTime   float64 // … for this long is an open circuit: the breath is dropped, s; default 1
	FitR2Min   float64 // a fit below this R² is unreliable; default 0.95
	LeakLimit  float64 // flag a leak above this, %; default 15
	EEFLimit   float64 // flag incomplete exhalation when end-expiratory flow is below −EEFLimit, L/min; default 5
	TriggerDip float64 // a pressure drop this deep before a start is the patient's effort, cmH2O; default 0.5
	Sex        string  // male or female, for predicted body weight; "" for none
	HeightCm   float64 // cm, with Sex
}

// Defaults fills the unset fields.
func (c *Config) Defaults() {
	def := func(p *float64, v float64) {
		if *p == 0 {
			*p = v
		}
	}
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
}

// Validate reports the first unusable setting.
func (c *Config) Validate() error {
	for _, v := range []float64{c.StartFlow, c.EndFlow, c.PauseFlow, c.ExpFlow, c.MinInsp, c.MinExp,
		c.MinPause, c.MaxBreath, c.OpenTime, c.FitR2Min, c.LeakLimit, c.EEFLimit, c.TriggerDip} {
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
	if c.Sex != "" || c.HeightCm != 0 {
		if _, err := PredictedBodyWeight(c.Sex, c.HeightCm); err != nil {
			return err
		}
	}
	return nil
}

// Drops counts breaths in progress that were dropped, by cause.
type Drops struct {
	Gap      int64 // a gap in the stream
	Open     int64 // the circuit was open (pressure near zero)
	TooLong  int64 // longer than MaxBreath, or than the buffer holds
	Restarts int64 // detection restarted without a breath (stream start mid-breath)
}

const (
	stSync     = iota // wait for a sample that is not inspiration
	stWait            // no breath in progress: wait for a start
	stInsp            // inspiratory flow
	stPostInsp        // after inspiratory flow: pause or the turn to expiration
	stExp             // expiration: wait for the next start
)

// Segmenter finds breaths in a stream of samples and computes each one's
// metrics. It keeps the current breath's samples in a buffer allocated once
// and reused: memory is constant and the per-sample path does not allocate.
// It is not safe for concurrent use.
type Segmenter struct {
	cfg   Config
	pbw   float64 // kg, 0 without a patient
	state int

	t, paw, flow []float64 // samples since the breath (or the wait) began
	n            int
	inspEnd      int // index of the first sample after inspiratory flow
	expStart     int // index of the first expiratory sample
	openSince    float64
	open         bool
	deadline     float64 // t[0] + MaxBreath in a breath, else +Inf
	inspMin      float64 // t[0] + MinInsp in a breath

	seq       int64
	afterDrop bool    // the next breath follows a dropped one
	nextDip   bool    // an effort was seen just before the breath in progress
	lastPEEP  float64 // the previous breath's PEEP, cmH2O; NaN at first
	drops     Drops
	out       Breath
	si        siFit   // the stress-index fit's points, kept from breath to breath
	lastSI    float64 // the previous stress index, where its fit starts; NaN for none
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
		si: newSIFit(), openSince: math.NaN(), deadline: math.Inf(1), lastPEEP: math.NaN(), lastSI: math.NaN()}
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
	c := &s.cfg
	switch s.state {
	case stSync:
		if flow <= 0 {
			s.state = stWait
		}
		s.keepLast(1)
	case stWait:
		if flow > c.StartFlow {
			if j := s.riseStart(k, 0); j >= 0 {
				s.begin(j)
			} else {
				s.drops.Restarts++
				s.state = stSync
			}
		} else if s.n > 64 {
			s.keepLast(16)
		}
	case stInsp:
		if flow < c.EndFlow && t >= s.inspMin {
			s.inspEnd, s.state = k, stPostInsp
			if flow < -c.ExpFlow { // straight into expiration, no pause
				s.expStart, s.state = k, stExp
			}
		}
	case stPostInsp:
		switch {
		case flow < -c.ExpFlow:
			s.expStart, s.state = k, stExp
		case flow > c.StartFlow:
			s.state = stInsp // flow resumed: still inspiration
		}
	case stExp:
		if flow > c.StartFlow && t-s.t[s.expStart] >= c.MinExp {
			return s.finish(s.riseStart(k, s.expStart+1))
		}
	}
	return nil
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
	s.state, s.inspEnd, s.expStart = stInsp, -1, -1
	s.deadline, s.inspMin = s.t[0]+s.cfg.MaxBreath, s.t[0]+s.cfg.MinInsp
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
	s.begin(j)
	return b
}

// drop abandons the breath in progress.
func (s *Segmenter) drop(counter *int64) {
	if s.state >= stInsp {
		*counter++
		s.afterDrop = true
	}
	s.state, s.n, s.nextDip, s.lastPEEP = stSync, 0, false, math.NaN()
	s.deadline = math.Inf(1)
}

// shift moves samples [j, n) to the front of the buffer.
func (s *Segmenter) shift(j int) {
	copy(s.t, s.t[j:s.n])
	copy(s.paw, s.paw[j:s.n])
	copy(s.flow, s.flow[j:s.n])
	s.n -= j
}

// keepLast keeps the last m samples.
func (s *Segmenter) keepLast(m int) {
	if s.n > m {
		s.shift(s.n - m)
	}
}
