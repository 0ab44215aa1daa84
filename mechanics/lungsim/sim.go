// Package lungsim is a lung and a ventilator that play a patient: the
// single-compartment equation of motion (integrated exactly) or lungs and
// sensors that are not that simple, on volume control, pressure control or
// pressure support, with effort, leak, noise, drift and a timeline of
// changes. It gives every breath's truth, for the simulator device, the
// demo and the tests. breathd's analysis (package mechanics) never
// imports it.
package lungsim

import (
	"math"
	"math/rand/v2"
	"time"
)

// Truth is what the simulator knows about one breath, for comparing with
// what breathd measures.
type Truth struct {
	Seq    int     // breath number, from 1
	TStart float64 // s
	TEnd   float64 // s, the next breath's start
	Mode   Mode    // vc, pc or ps
	R      float64 // set (central airway) resistance, cmH2O·s/L
	C      float64 // set compliance (of the first compartment), mL/cmH2O
	// REq is the resistance of the single compartment that matches the
	// lung at this breath's rate (R for the ideal lung), cmH2O·s/L.
	REq float64
	// CStatic is the static compliance over the breath, VT over the rise
	// of the lung's static recoil (C for the ideal lung), mL/cmH2O.
	CStatic   float64
	PEEP      float64 // set PEEP, cmH2O
	IPEEP     float64 // intrinsic PEEP at the breath's start (static recoil above PEEP), cmH2O
	VT        float64 // volume into the lung, mL
	Peak      float64 // highest noise-free airway pressure at a sample, cmH2O
	Plateau   float64 // noise-free airway pressure at the end of the pause, cmH2O; NaN without a pause
	DP        float64 // driving pressure VT/CStatic, cmH2O
	RR        float64 // 60/(TEnd − TStart), 1/min
	Ti        float64 // inspiratory time: from TStart to the ventilator's cycling, s
	Active    bool    // muscle effort during the breath
	Triggered bool    // started by the ventilator's trigger (the patient's effort, or not: AutoTrigger)

	// Asynchrony, as the simulator made it happen.
	Missed        int  // efforts that began in this breath's expiration and ended with no breath delivered
	DoubleTrigger bool // triggered by the same effort as the breath before
	AutoTrigger   bool // triggered with no effort under way (the heart's oscillation, say)
	Reverse       bool // a machine-started breath that entrained an effort
	// Short and long cycles are by their definition over Ti (the
	// simulator's short_cycles and long_cycles make them).
}

// SimSample is one sample of the simulated stream.
type SimSample struct {
	T        float64 // s
	Paw      float64 // measured airway pressure: with noise, cmH2O
	Flow     float64 // measured flow: lung flow with leak, drift and noise, L/min
	PawTrue  float64 // airway pressure, without the sensor's dynamics and noise, cmH2O
	FlowTrue float64 // flow into the lung, L/min
	Open     bool    // the circuit is disconnected
}

// phase is where the simulated ventilator is in its cycle.
type phase uint8

const (
	phaseInsp phase = iota
	phasePause
	phaseExp
)

// maxSubstep bounds the integration step inside a sample interval, s.
const maxSubstep = 0.002

// Sim generates a stream from the single-compartment equation of motion
// Paw = R·V' + V/C + PEEP − Pmus (Bates, Lung Mechanics, 2009, ch. 3),
// driven by a ventilator in volume control, pressure control or pressure
// support. Pressure-driven phases are integrated exactly (the exponential
// solution over each substep); flow-driven phases by the midpoint rule,
// exact for constant and linear flow. It is deterministic for a seed and
// does not allocate per sample.
type Sim struct {
	sc    Scenario
	dt    float64 // s
	h     float64 // substep, s
	n     int64   // next sample index
	end   int64   // samples in the scenario
	rng   *rand.Rand
	truth func(Truth)

	v     float64 // lung volume above the relaxed volume at PEEP, L
	set   Settings
	cl    float64 // compliance, L/cmH2O
	decay float64 // exp(−h/τ)
	phase phase
	open  bool

	bStart, flowEnd, pauseEnd, inspEnd, next, expStart float64
	flow0, flowSlope                                   float64 // vc flow F(τ) = flow0 + flowSlope·τ, L/s
	peakFlow                                           float64 // ps: peak inspiratory flow so far, L/s
	triggered                                          bool
	prevVdot                                           float64 // ps expiration: lung flow at the last substep, L/s
	upT, upV                                           float64 // ps: when lung flow last turned inward, and the volume then
	trigAt                                             float64 // ps: when the triggered breath is delivered; 0 none

	effortStart, nextEffort float64
	// the effort under way or last: its strength, its number, whether it
	// triggered a breath, whether it began in expiration, and the breath
	// then in progress; the effort that triggered the last breath
	effP, effT   float64
	effID        int
	effTriggered bool
	effInExp     bool
	effSeq       int
	effOpen      bool
	trigEffort   int
	entrainAt    float64 // when an entrained effort starts; 0 none
	cycleKind    int8    // ps: 0 by flow, 1 short, 2 long
	erng         *rand.Rand

	seq     int
	cur     Truth
	inBr    bool
	vStart  float64
	vMax    float64
	started bool

	// the extended lung (simlung.go)
	ext          bool      // integrate the extended model
	x            lungState // its state
	pEnd         float64   // airway pressure when expiration began, cmH2O
	sumQ2, sumQ3 float64   // ∫Q² and ∫|Q|³ over the breath, for its equivalent resistance

	// the sensor's dynamics
	lagP, lagF     float64   // the low-passed pressure and flow
	alphaP, alphaF float64   // their filter gains per sample
	histP, histF   []float64 // rings of the low-passed samples, for the delays
	histN          int       // samples put into them
}

// NewSim returns a simulator for sc (defaults applied, then validated by
// the caller). truth, if not nil, is called at the end of every complete
// breath.
func NewSim(sc Scenario, truth func(Truth)) *Sim {
	sc.Defaults()
	s := &Sim{sc: sc, truth: truth, dt: 1 / sc.RateHz}
	nsub := math.Ceil(s.dt / maxSubstep)
	s.h = s.dt / nsub
	s.end = int64(math.Round(sc.Duration.Seconds() * sc.RateHz))
	s.rng = rand.New(rand.NewPCG(sc.Seed, sc.Seed^0x9e3779b97f4a7c15))
	s.erng = rand.New(rand.NewPCG(sc.Seed^0x5851f42d4c957f2d, sc.Seed))
	s.nextEffort = 1.0 // the first effort, if any, a second in
	sn := &sc.Sensor
	gain := func(tau float64) float64 {
		if tau <= 0 {
			return 1
		}
		return 1 - math.Exp(-s.dt/tau)
	}
	s.alphaP, s.alphaF = gain(sn.PawLag), gain(sn.FlowLag)
	n := int(math.Ceil(max(sn.PawDelay, sn.FlowDelay)/s.dt)) + 2
	s.histP, s.histF = make([]float64, n), make([]float64, n)
	return s
}

// sense passes the airway pressure and the measured flow through the
// sensor: a first-order low-pass per channel (discrete, at the sample
// rate) and a pure delay (linear interpolation between samples).
func (s *Sim) sense(paw, flow float64) (float64, float64) {
	sn := &s.sc.Sensor
	if sn.ideal() {
		return paw, flow
	}
	if s.histN == 0 {
		s.lagP, s.lagF = paw, flow
	}
	s.lagP += (paw - s.lagP) * s.alphaP
	s.lagF += (flow - s.lagF) * s.alphaF
	n := len(s.histP)
	s.histP[s.histN%n], s.histF[s.histN%n] = s.lagP, s.lagF
	s.histN++
	return s.delayed(s.histP, sn.PawDelay), s.delayed(s.histF, sn.FlowDelay)
}

// delayed is the value d seconds before the latest in ring h.
func (s *Sim) delayed(h []float64, d float64) float64 {
	n := len(h)
	back := d / s.dt
	k := int(back)
	frac := back - float64(k)
	at := func(b int) float64 {
		b = min(b, s.histN-1)
		return h[(s.histN-1-b)%n]
	}
	return at(k)*(1-frac) + at(k+1)*frac
}

// RateHz is the sample rate.
func (s *Sim) RateHz() float64 { return s.sc.RateHz }

// Scenario returns the scenario with its defaults.
func (s *Sim) Scenario() Scenario { return s.sc }

// Next fills out with the next sample and reports false at the end.
func (s *Sim) Next(out *SimSample) bool {
	if s.n >= s.end {
		return false
	}
	t := float64(s.n) * s.dt
	s.n++
	open := s.sc.disconnectedAt(seconds(t))
	if !s.started || (s.open && !open) {
		s.started, s.open = true, false
		s.v, s.x = 0, lungState{pao: s.set.PEEP}
		s.startBreath(t, false)
	} else if open && !s.open {
		s.open, s.inBr = true, false // the breath in progress is lost
	}
	if s.open {
		*out = SimSample{T: t, Open: true, Paw: s.noise(s.sc.Sensor.PawNoise), Flow: s.noise(s.sc.Sensor.FlowNoise)}
		return true
	}
	pmus := s.pmus(t)
	paw, vdot := s.airway(t, pmus)
	measured := vdot * 60 // L/min
	if s.ext {
		_, f := s.rates(t, s.x)
		measured = f.qv * 60
	}
	out.T, out.PawTrue, out.FlowTrue, out.Open = t, paw, vdot*60, false
	if paw > 0 {
		measured += s.set.Leak * paw
	}
	pawM, flowM := s.sense(paw, measured)
	out.Paw = pawM + s.noise(s.sc.Sensor.PawNoise)
	out.Flow = flowM + s.sc.Sensor.FlowDrift*t/3600 + s.noise(s.sc.Sensor.FlowNoise)
	if s.inBr {
		s.cur.Peak = math.Max(s.cur.Peak, paw)
		if pmus > 0 {
			s.cur.Active = true
		}
	}
	s.advance(t, t+s.dt)
	return true
}

func seconds(t float64) time.Duration { return time.Duration(t * float64(time.Second)) }

func (s *Sim) noise(sigma float64) float64 {
	if sigma == 0 {
		return 0
	}
	return s.rng.NormFloat64() * sigma
}

// pmus is the muscle pressure at t, cmH2O. Calls come with increasing t.
func (s *Sim) pmus(t float64) float64 {
	set := &s.set
	if set.EffortRate <= 0 && s.entrainAt == 0 && !s.effOpen {
		return 0
	}
	for set.EffortRate > 0 && t >= s.nextEffort {
		s.newEffort(s.nextEffort, true)
		period := 60 / set.EffortRate
		if set.EffortJitter > 0 {
			period *= 1 + set.EffortJitter*(2*s.erng.Float64()-1)
		}
		s.nextEffort = max(s.nextEffort+period, s.effortStart+s.effT+0.5)
	}
	if s.entrainAt > 0 && t >= s.entrainAt {
		s.newEffort(s.entrainAt, false)
		s.entrainAt = 0
	}
	d := t - s.effortStart
	if d >= 0 && d < s.effT {
		return s.effP * math.Sin(math.Pi*d/s.effT)
	}
	if s.effOpen && d >= s.effT {
		s.closeEffort()
	}
	return 0
}

// newEffort begins an effort at t0: a spontaneous one (weak or long by
// the settings' shares) or an entrained one.
func (s *Sim) newEffort(t0 float64, spontaneous bool) {
	set := &s.set
	if s.effOpen {
		s.closeEffort()
	}
	s.effortStart, s.effP, s.effT = t0, set.EffortP, set.EffortTime
	if spontaneous && (set.WeakShare > 0 || set.LongShare > 0) {
		switch u := s.erng.Float64(); {
		case u < set.WeakShare:
			s.effP = set.WeakP
		case u < set.WeakShare+set.LongShare:
			s.effT = set.LongTime
			if set.LongP > 0 {
				s.effP = set.LongP
			}
		}
	}
	s.effID++
	s.effOpen, s.effTriggered = true, false
	s.effInExp, s.effSeq = s.phase == phaseExp && s.inBr, s.seq
}

// closeEffort ends the effort under way: one that began in expiration and
// saw no breath delivered is an ineffective effort of that breath.
func (s *Sim) closeEffort() {
	s.effOpen = false
	if s.effInExp && !s.effTriggered && s.effSeq == s.seq && s.inBr {
		s.cur.Missed++
	}
}

// effortNow reports whether an effort is under way at t.
func (s *Sim) effortNow(t float64) bool {
	d := t - s.effortStart
	return s.effOpen && d >= 0 && d < s.effT
}

// airway returns airway pressure (cmH2O) and lung flow (L/s) at t.
func (s *Sim) airway(t, pmus float64) (paw, vdot float64) {
	if s.ext {
		_, f := s.rates(t, s.x)
		return f.pao, f.q
	}
	set := &s.set
	switch {
	case s.phase == phaseInsp && set.Mode == ModeVC:
		vdot = s.flow0 + s.flowSlope*(t-s.bStart)
		return set.R*vdot + s.v/s.cl + set.PEEP - pmus, vdot
	case s.phase == phasePause:
		return s.v/s.cl + set.PEEP - pmus, 0
	case s.phase == phaseInsp:
		paw = set.PEEP + set.PInsp*s.riseFrac(t)
	default:
		paw = set.PEEP
	}
	return paw, (paw - set.PEEP + pmus - s.v/s.cl) / set.R
}

func (s *Sim) riseFrac(t float64) float64 {
	if s.set.Rise <= 0 {
		return 1
	}
	return math.Min(1, (t-s.bStart)/s.set.Rise)
}

// advance integrates the lung from t0 to t1, taking the phase changes on
// the way.
func (s *Sim) advance(t0, t1 float64) {
	for ts := t0; ts < t1-1e-12; {
		te := math.Min(t1, ts+s.h)
		if b := s.boundary(); b > ts && b < te {
			te = b
		}
		if s.ext {
			te = math.Min(te, ts+maxSubstepExt)
			if k := s.kink(ts); k < te {
				te = k
			}
			s.stepExt(ts, te)
			ts = te
			if s.inBr {
				s.vMax = math.Max(s.vMax, s.v)
			}
			s.transitions(ts)
			continue
		}
		s.step(ts, te)
		ts = te
		if s.inBr {
			s.vMax = math.Max(s.vMax, s.v)
		}
		s.transitions(ts)
	}
}

// boundary is the time of the current phase's timed end, or +Inf.
func (s *Sim) boundary() float64 {
	switch {
	case s.phase == phaseInsp && s.set.Mode == ModeVC:
		return s.flowEnd
	case s.phase == phasePause:
		return s.pauseEnd
	case s.phase == phaseInsp && s.set.Mode == ModePC:
		return s.inspEnd
	case s.phase == phaseExp:
		return s.next
	}
	return math.Inf(1)
}

func (s *Sim) step(ts, te float64) {
	h := te - ts
	mid := ts + h/2
	pmus := s.pmus(mid)
	set := &s.set
	switch {
	case s.phase == phaseInsp && set.Mode == ModeVC:
		s.v += (s.flow0 + s.flowSlope*(mid-s.bStart)) * h
	case s.phase == phasePause:
	default:
		paw, _ := s.airway(mid, pmus)
		veq := s.cl * (paw - set.PEEP + pmus)
		d := s.decay
		if math.Abs(h-s.h) > 1e-12 {
			d = math.Exp(-h / (set.R * s.cl))
		}
		s.v = veq + (s.v-veq)*d
	}
}

// transitions moves to the next phase or breath when its time has come.
func (s *Sim) transitions(ts float64) {
	const eps = 1e-9
	set := &s.set
	switch s.phase {
	case phaseInsp:
		switch set.Mode {
		case ModeVC:
			if ts >= s.flowEnd-eps {
				if s.pauseEnd > s.flowEnd {
					s.phase = phasePause
				} else {
					s.toExp(ts)
				}
			}
		case ModePC:
			if ts >= s.inspEnd-eps {
				s.toExp(ts)
			}
		case ModePS:
			_, vdot := s.airway(ts, s.pmus(ts))
			s.peakFlow = math.Max(s.peakFlow, vdot)
			el := ts - s.bStart
			switch {
			case s.cycleKind != 2 && el >= set.MaxTi-eps, el > 3,
				s.cycleKind == 1 && el >= set.ShortTi-eps,
				s.cycleKind == 2 && el >= set.LongTi-eps,
				s.cycleKind == 0 && el > set.Rise && vdot < set.Cycle*s.peakFlow:
				s.toExp(ts)
			}
		}
	case phasePause:
		if ts >= s.pauseEnd-eps {
			if s.inBr {
				s.cur.Plateau, _ = s.airway(ts, s.pmus(ts))
			}
			s.toExp(ts)
		}
	case phaseExp:
		if ts >= s.next-eps {
			s.startBreath(ts, false)
			return
		}
		if set.Mode != ModePS {
			return
		}
		_, vdot := s.airway(ts, s.pmus(ts))
		if vdot > 0 && s.prevVdot <= 0 {
			s.upT, s.upV = ts, s.v
		}
		s.prevVdot = vdot
		switch {
		case s.trigAt > 0 && ts >= s.trigAt-eps:
			s.startBreath(ts, true)
		case s.trigAt == 0 && ts-s.expStart > 0.2 && vdot*60 > set.Trigger:
			s.trigAt = ts + set.TriggerDelay
		}
	}
}

func (s *Sim) toExp(ts float64) {
	if s.ext {
		_, f := s.rates(ts, s.x)
		s.pEnd = f.pao
	}
	s.phase, s.expStart, s.trigAt, s.prevVdot = phaseExp, ts, 0, -1
	if s.inBr {
		s.cur.Ti = ts - s.cur.TStart
	}
}

// startBreath ends the breath in progress and begins one at ts with the
// settings then in effect.
//
// A triggered breath's truth starts when the lung's flow turned inward
// (the patient began to inhale), before the ventilator responded.
func (s *Sim) startBreath(ts float64, triggered bool) {
	boundary, v0 := ts, s.v
	if triggered {
		boundary, v0 = s.upT, s.upV
	}
	effort := triggered && s.effortNow(ts)
	if effort {
		s.effTriggered = true
	}
	if s.inBr && s.truth != nil {
		c := s.cur
		c.TEnd = boundary
		c.RR = 60 / (boundary - c.TStart)
		c.VT = (s.vMax - s.vStart) * 1000
		c.REq, c.CStatic = c.R, c.C
		if s.ext {
			c.REq = s.equivalentR(c.RR)
			if dp := s.set.staticRecoil(s.vMax) - s.set.staticRecoil(s.vStart); dp > 0 {
				c.CStatic = c.VT / dp
			}
		}
		c.DP = c.VT / c.CStatic
		s.truth(c)
	}
	wasExt := s.ext
	paw := s.set.PEEP // at the first start the lung rests at PEEP
	if s.inBr && !wasExt {
		paw, _ = s.airway(ts, s.pmus(ts))
	}
	s.set = s.sc.settingsAt(seconds(ts))
	set := &s.set
	s.ext = !set.ideal()
	if !s.inBr {
		paw = set.PEEP
	}
	if s.ext && !wasExt {
		s.x = lungState{v1: s.v, pao: paw}
	}
	s.sumQ2, s.sumQ3 = 0, 0
	s.cl = set.C / 1000
	s.decay = math.Exp(-s.h / (set.R * s.cl))
	s.seq++
	s.bStart, s.phase, s.peakFlow, s.triggered = ts, phaseInsp, 0, triggered
	s.next = ts + 60/set.RR
	switch set.Mode {
	case ModeVC:
		tflow := set.Ti - set.Pause
		pause := set.Pause
		if set.PauseEvery > 1 && s.seq%set.PauseEvery != 0 {
			pause = 0
		}
		vt := set.VT / 1000
		s.flow0, s.flowSlope = vt/tflow, 0
		if set.Flow == "decelerating" {
			// from a peak down to a quarter of it: VT = peak·tflow·(1 + 0.25)/2
			s.flow0 = 2 * vt / (tflow * 1.25)
			s.flowSlope = -0.75 * s.flow0 / tflow
		}
		s.flowEnd = ts + tflow
		s.pauseEnd = s.flowEnd + pause
		if set.ValveTime > 0 {
			// the valve's ramps take volume off the pattern: scale it back to VT
			area := 0.0
			const n = 1000
			for i := range n {
				area += s.ventFlow(ts+(float64(i)+0.5)*tflow/n) * tflow / n
			}
			s.flow0 *= vt / area
			s.flowSlope *= vt / area
		}
	case ModePC:
		s.inspEnd = ts + set.Ti
	}
	s.inBr = true
	s.vStart, s.vMax = v0, math.Max(v0, s.v)
	ipeep := v0 / s.cl
	if s.ext {
		ipeep = set.staticRecoil(v0)
	}
	s.cur = Truth{Seq: s.seq, TStart: boundary, Mode: set.Mode, R: set.R, C: set.C, PEEP: set.PEEP,
		IPEEP: ipeep, Peak: math.Inf(-1), Plateau: math.NaN(), Triggered: triggered, Active: triggered}
	s.asynchrony(ts, triggered, effort)
}

// asynchrony labels the breath just begun at ts and draws its cycling
// and any entrained effort (no draws when the settings ask for none, so
// that other scenarios' streams do not change).
func (s *Sim) asynchrony(ts float64, triggered, effort bool) {
	set := &s.set
	c := &s.cur
	switch {
	case triggered && effort:
		c.DoubleTrigger = s.trigEffort == s.effID
		s.trigEffort = s.effID
	case triggered:
		c.AutoTrigger = true
		c.Active = false
		s.trigEffort = 0
	default:
		s.trigEffort = 0
	}
	s.cycleKind = 0
	if set.Mode == ModePS && set.ShortCycles+set.LongCycles > 0 {
		switch u := s.erng.Float64(); {
		case u < set.ShortCycles:
			s.cycleKind = 1
		case u < set.ShortCycles+set.LongCycles:
			s.cycleKind = 2
		}
	}
	if !triggered && set.Mode != ModePS && set.EntrainShare > 0 && s.erng.Float64() < set.EntrainShare {
		s.entrainAt = ts + max(set.EntrainDelay, 1e-6)
		c.Reverse, c.Active = true, true
	}
}
