package lungsim

import "math"

// The lungs and ventilators that are not the ideal single compartment:
// the state is integrated by the classical fourth-order Runge–Kutta method
// in substeps of at most 0.5 ms, phase changes and the kinks of the valve
// ramps taken at their exact times.
//
// The model, all pressures in cmH2O, volumes in L, flows in L/s:
//
//	Paw − Pn = R·Q + K2·Q·|Q|                          central airway (Rohrer, Pflügers Arch 1915)
//	Pn = PEEP + V1/C + E2·V1² + Pve − Pmus + Pcard      the first compartment, at the central node
//	Q2 = (Pn − (PEEP + V2/C2 − Pmus + Pcard))/R2        a second compartment through its own resistance (Otis et al., J Appl Physiol 1956;8:427)
//	Pve' = Eve·V1' − Pve·Eve/Rve                         viscoelastic tissue (Bates, Lung Mechanics, 2009)
//	V1' = Q − Q2, V2' = Q2
//
// In volume control the ventilator sets the flow at its outlet; with a
// circuit compliance Ccirc the airway pressure is then a state, Ccirc·Paw'
// = Qvent − Q. In pressure control and support it sets the airway
// pressure; in expiration the exhalation valve sets Paw = Ptarget −
// ValveR·Q, Ptarget falling to PEEP over ValveTime. The flow the
// ventilator measures is Q + Ccirc·Paw' with a circuit, else Q.

// maxSubstepExt bounds the Runge–Kutta substep, s.
const maxSubstepExt = 0.0005

// lungState is the extended model's state.
type lungState struct {
	v1, v2 float64 // compartment volumes above their relaxed volume at PEEP, L
	pve    float64 // viscoelastic pressure, cmH2O
	pao    float64 // airway pressure, a state only with a circuit in flow-set phases, cmH2O
}

func (x lungState) add(d lungState, h float64) lungState {
	return lungState{x.v1 + d.v1*h, x.v2 + d.v2*h, x.pve + d.pve*h, x.pao + d.pao*h}
}

// extFlows are the airway pressure and flows at one moment.
type extFlows struct {
	pao float64 // airway pressure, cmH2O
	q   float64 // flow into the lung, L/s
	qv  float64 // flow at the ventilator (with the circuit's), L/s
	pn  float64 // pressure at the central node (alveolar, compartment 1), cmH2O
}

// rates returns the state's derivatives at time t, and the pressures and
// flows then.
func (s *Sim) rates(t float64, x lungState) (lungState, extFlows) {
	set := &s.set
	pm := s.pmus(t)
	pc := 0.0
	if set.CardiacP > 0 {
		pc = set.CardiacP * math.Sin(2*math.Pi*set.CardiacRate/60*t)
	}
	e1 := 1 / s.cl
	pel := e1 * x.v1
	if x.v1 > 0 {
		pel += set.E2 * x.v1 * x.v1
	}
	pn := set.PEEP + pel + x.pve - pm + pc
	var q2 float64
	if set.C2 > 0 {
		q2 = (pn - (set.PEEP + x.v2/(set.C2/1000) - pm + pc)) / set.R2
	}
	var f extFlows
	var d lungState
	cc := set.CircuitC / 1000
	switch {
	case s.phase == phaseInsp && set.Mode == ModeVC, s.phase == phasePause:
		qv := 0.0
		if s.phase == phaseInsp {
			qv = s.ventFlow(t)
		}
		if cc > 0 {
			f.pao = x.pao
			f.q = solveFlow(x.pao-pn, set.R, set.K2)
			d.pao = (qv - f.q) / cc
		} else {
			f.q = qv
			f.pao = pn + set.R*qv + set.K2*qv*math.Abs(qv)
		}
		f.qv = qv
	case s.phase == phaseInsp:
		f.pao = set.PEEP + set.PInsp*s.riseFrac(t)
		f.q = solveFlow(f.pao-pn, set.R, set.K2)
		f.qv = f.q
		if cc > 0 && set.Rise > 0 && t-s.bStart < set.Rise {
			f.qv += cc * set.PInsp / set.Rise
		}
	default:
		target, slope := s.expTarget(t)
		f.q = solveFlow(target-pn, set.R+set.ValveR, set.K2)
		f.pao = target - set.ValveR*f.q
		f.qv = f.q + cc*slope
	}
	f.pn = pn
	d.v1, d.v2 = f.q-q2, q2
	if set.ViscoC > 0 {
		eve := 1000 / set.ViscoC
		d.pve = eve*d.v1 - x.pve*eve/set.ViscoR
	}
	return d, f
}

// solveFlow solves R·Q + K2·Q·|Q| = dp for Q.
func solveFlow(dp, r, k2 float64) float64 {
	if k2 == 0 {
		return dp / r
	}
	return math.Copysign((-r+math.Sqrt(r*r+4*k2*math.Abs(dp)))/(2*k2), dp)
}

// ventFlow is the volume-control flow at t: the breath's flow pattern,
// rising and falling over ValveTime, L/s.
func (s *Sim) ventFlow(t float64) float64 {
	tau := t - s.bStart
	f := s.flow0 + s.flowSlope*tau
	if vt := s.set.ValveTime; vt > 0 {
		f *= max(0, min(1, tau/vt, (s.flowEnd-t)/vt))
	}
	return f
}

// expTarget is the pressure the exhalation valve aims at t, falling from
// the end-inspiratory pressure to PEEP over ValveTime, and its slope.
func (s *Sim) expTarget(t float64) (float64, float64) {
	set := &s.set
	vt := set.ValveTime
	if s.circuitRamp() > vt {
		vt = s.circuitRamp()
	}
	if vt <= 0 || t-s.expStart >= vt {
		return set.PEEP, 0
	}
	slope := (set.PEEP - s.pEnd) / vt
	return s.pEnd + slope*(t-s.expStart), slope
}

// circuitRamp is the shortest valve time with a circuit: the gas in the
// circuit cannot leave in no time and be measured, s.
func (s *Sim) circuitRamp() float64 {
	if s.set.CircuitC > 0 {
		return 0.01
	}
	return 0
}

// stepExt advances the extended state from ts to te by one Runge–Kutta step.
func (s *Sim) stepExt(ts, te float64) {
	h := te - ts
	k1, _ := s.rates(ts, s.x)
	k2, _ := s.rates(ts+h/2, s.x.add(k1, h/2))
	k3, _ := s.rates(ts+h/2, s.x.add(k2, h/2))
	k4, _ := s.rates(te, s.x.add(k3, h))
	var d lungState
	d.v1 = (k1.v1 + 2*k2.v1 + 2*k3.v1 + k4.v1) / 6
	d.v2 = (k1.v2 + 2*k2.v2 + 2*k3.v2 + k4.v2) / 6
	d.pve = (k1.pve + 2*k2.pve + 2*k3.pve + k4.pve) / 6
	d.pao = (k1.pao + 2*k2.pao + 2*k3.pao + k4.pao) / 6
	s.x = s.x.add(d, h)
	_, f := s.rates(te, s.x)
	s.x.pao = f.pao // algebraic outside flow-set phases with a circuit
	s.v = s.x.v1 + s.x.v2
	if s.inBr {
		aq := math.Abs(f.q)
		s.sumQ2 += f.q * f.q * h
		s.sumQ3 += aq * aq * aq * h
	}
}

// kink is the next time after ts at which the extended model's inputs
// bend (valve ramps, the end of the pressure rise), or +Inf.
func (s *Sim) kink(ts float64) float64 {
	set := &s.set
	k := math.Inf(1)
	at := func(x float64) {
		if x > ts+1e-12 && x < k {
			k = x
		}
	}
	switch s.phase {
	case phaseInsp:
		if set.Mode == ModeVC && set.ValveTime > 0 {
			at(s.bStart + set.ValveTime)
			at(s.flowEnd - set.ValveTime)
		}
		if set.Mode != ModeVC && set.Rise > 0 {
			at(s.bStart + set.Rise)
		}
	case phaseExp:
		at(s.expStart + max(set.ValveTime, s.circuitRamp()))
	}
	return k
}

// staticRecoil is the pressure above PEEP at which the lung holds total
// volume v (L) at rest: the compartments at one pressure, no
// viscoelastic stress.
func (set *Settings) staticRecoil(v float64) float64 {
	e1 := 1000 / set.C
	if set.C2 <= 0 {
		if v <= 0 {
			return e1 * v
		}
		return e1*v + set.E2*v*v
	}
	e2c := 1000 / set.C2 // V2 = P/E2c
	// E1·V1 + E2·V1² = (v − V1)·e2c
	b := e1 + e2c
	var v1 float64
	if set.E2 == 0 || v <= 0 {
		v1 = v * e2c / b
	} else {
		v1 = (-b + math.Sqrt(b*b+4*set.E2*v*e2c)) / (2 * set.E2)
	}
	return (v - v1) * e2c
}

// equivalentR is the resistance of the single compartment that matches the
// lung's impedance at the breath's rate (Re Z(jω), ω = 2π·rr/60; for a
// linear lung of parallel and viscoelastic parts this is circuit theory),
// with the flow-dependent part as its least-squares equivalent over the
// breath, K2·Σ|Q|³/ΣQ², cmH2O·s/L.
func (s *Sim) equivalentR(rr float64) float64 {
	set := &s.set
	r := set.R
	if s.sumQ2 > 0 {
		r += set.K2 * s.sumQ3 / s.sumQ2
	}
	if set.C2 == 0 && set.ViscoC == 0 {
		return r
	}
	w := complex(0, 2*math.Pi*rr/60)
	z1 := complex(1000/set.C, 0) / w
	if set.ViscoC > 0 {
		z1 += 1 / (w/complex(1000/set.ViscoC, 0) + complex(1/set.ViscoR, 0))
	}
	z := z1
	if set.C2 > 0 {
		z2 := complex(set.R2, 0) + complex(1000/set.C2, 0)/w
		z = 1 / (1/z1 + 1/z2)
	}
	return r + real(z)
}
