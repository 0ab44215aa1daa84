package mechanics

import "math"

var nan = math.NaN()

// compute fills b from the buffer's samples [0, j); sample j is the next
// breath's start.
func (s *Segmenter) compute(b *Breath, j int) {
	t := s.t
	e := s.expStart // first expiratory sample
	*b = Breath{TStart: t[0], TEnd: t[j], Flags: 0}
	b.Ti, b.Te = t[e]-t[0], t[j]-t[e]
	b.RR = 60 / (b.TEnd - b.TStart)
	b.IE = b.Te / b.Ti
	s.measureNoise(e, j)
	eefNoise := s.volumes(b, e, j)
	lo, hi, level := s.pressures(b, e)
	s.circuitAndLeak(b)
	peepTotal := s.effort(b, e, j, eefNoise)
	s.derived(b, e, j, peepTotal, lo, hi, level)
}

// volumes sets the inspired and expired volumes, the mean pressure, PEEP
// and the end-expiratory flow (flagging an incomplete exhalation), and
// returns the noise left in that flow's mean.
func (s *Segmenter) volumes(b *Breath, e, j int) (eefNoise float64) {
	t, paw, flow := s.t, s.paw, s.flow
	// Volumes, mL: the trapezoid rule inside each phase; at the three
	// switches (start, start of expiration, next start) the flow jumps at an
	// unknown moment within the sample interval, so each side gets half an
	// interval of its own flow — unbiased when breaths are not aligned with
	// the sampling.
	var vin, vex, pint float64
	dt := t[1] - t[0]
	vin += flow[0] * dt / 2 // the half interval before the first sample
	vin += (flow[0] + flow[1]) / 2 * dt
	for i := 1; i < e-1; i++ {
		vin += (flow[i] + flow[i+1]) / 2 * (t[i+1] - t[i])
	}
	if i := e - 1; i >= 1 {
		dt := t[i+1] - t[i]
		vin += flow[i] * dt / 2
		vex -= flow[i+1] * dt / 2
	}
	for i := max(e, 1); i < j-1; i++ {
		vex -= (flow[i] + flow[i+1]) / 2 * (t[i+1] - t[i])
	}
	if i := j - 1; i >= e {
		vex -= flow[i] * (t[i+1] - t[i]) / 2
	}
	for i := 0; i < j; i++ {
		pint += paw[i] * (t[i+1] - t[i])
	}
	b.VTi, b.VTe = vin/60*1000, vex/60*1000
	b.PMean = pint / (b.TEnd - b.TStart)
	b.PEEP = s.endExpiratoryPressure(e, j)
	// end-expiratory flow: the mean over the last 0.1 s (at least 2
	// samples) before the next start, and the noise left in that mean
	ee := max(j-2, e)
	for ee > e && t[j]-t[ee-1] <= 0.1+1e-9 {
		ee--
	}
	b.EEF = mean(flow, ee, j)
	eefNoise = 2.5 * s.noiseF() / math.Sqrt(float64(j-ee))
	if b.EEF < -max(s.cfg.EEFLimit, eefNoise) {
		b.Flags |= FlagIncompleteExhalation
	}
	return eefNoise
}

// pressures sets the peak and plateau pressures and the pause's decay, and
// returns the part of the inflation whose flow is flat and its level (hi
// < 0 when the flow is not constant).
func (s *Segmenter) pressures(b *Breath, e int) (lo, hi int, level float64) {
	t, paw := s.t, s.paw
	// inspiratory flow: constant or not, the peak pressure
	flowEnd := s.inspEnd
	if flowEnd < 0 || flowEnd > e {
		flowEnd = e
	}
	lo, hi, level = s.flatFlow(flowEnd)
	b.PPeak = smoothedMax(paw, 0, e)
	if hi >= 0 {
		// the pressure where constant flow stopped — half a sample interval
		// after its last flat sample, on average — from a line through the
		// end of the flat part: no noise picked up by a maximum, no lag by
		// the sampling, and nothing of the flow's fall (a valve closing over
		// some milliseconds lowers the resistive part as it closes)
		at := t[hi] + (t[hi+1]-t[hi])/2
		if p := lineAt(t, paw, max(lo, hi-max(3, flowEnd*3/10)), hi, at); !math.IsNaN(p) {
			b.PPeak = p
		}
	} else {
		b.Flags |= FlagVariableFlow
	}
	var settled bool
	b.PPlat, b.PauseDecay, settled = s.plateau(flowEnd, e)
	if math.IsNaN(b.PPlat) {
		b.Flags |= FlagNoPlateau
	} else if !settled {
		b.Flags |= FlagPlateauUnsettled
	}
	return lo, hi, level
}

// circuitAndLeak takes the circuit's compressed gas off the volumes and
// sets the leak.
func (s *Segmenter) circuitAndLeak(b *Breath) {
	c := &s.cfg
	// the circuit's compressed gas: Ccirc·(end-inspiratory pressure −
	// PEEP) went into the circuit, not the lung, and comes back out of it
	// (Bartel, Bazik & Powner, Crit Care Med 1985;13:851)
	if cc := c.CircuitCompliance; cc > 0 {
		pEnd := b.PPlat
		if math.IsNaN(pEnd) {
			pEnd = b.PPeak
		}
		b.VTi -= cc * (pEnd - s.pBase) // from the pressure before the inflation
		b.VTe -= cc * (pEnd - b.PEEP)
	}
	b.Leak = nan
	if b.VTi > 0 {
		b.Leak = (b.VTi - b.VTe) / b.VTi * 100
		if b.Leak > c.LeakLimit {
			b.Flags |= FlagLeak
		}
	}
}

// effort fits the equation of motion, looks for the patient's effort,
// judges the fit, and sets intrinsic PEEP; it returns total PEEP.
func (s *Segmenter) effort(b *Breath, e, j int, eefNoise float64) (peepTotal float64) {
	c := &s.cfg
	s.fit(b, j, e)
	start := s.patientStart(e)
	if s.nextDip || start {
		b.Flags |= FlagActiveEffort
	}
	s.nextDip = s.triggerDip(e, j)
	s.asynchrony(b, e, j, start || s.nextPull)
	s.nextPull = s.pulledIn(j)
	s.lastPEEP = b.PEEP
	if b.FitR2 < c.FitR2Min || math.IsNaN(b.FitR2) {
		b.Flags |= FlagFitUnreliable
	}
	if b.Flags&FlagActiveEffort != 0 {
		b.Flags |= FlagFitUnreliable // a fit under effort is not the lung's
	}

	// intrinsic PEEP: at the last expiratory sample the alveolar pressure
	// exceeds the airway pressure by R·|V'| (the equation of motion; Pepe
	// & Marini, Am Rev Respir Dis 1982;126:166 for its meaning)
	r := b.FitR
	if b.Flags&FlagFitUnreliable != 0 {
		r = nan
	}
	b.PEEPi = max(0, -b.EEF) / 60 * r
	peepTotal = b.PEEP
	if b.PEEPi >= c.PEEPiMin && -b.EEF > eefNoise {
		b.Flags |= FlagIntrinsicPEEP
		peepTotal += b.PEEPi
	}
	return peepTotal
}

// derived sets the values computed from the others: driving pressure,
// the compliances, inspiratory resistance, mechanical power, the stress
// index and the volume per kg of predicted body weight.
func (s *Segmenter) derived(b *Breath, e, j int, peepTotal float64, lo, hi int, level float64) {
	b.DP, b.Cstat, b.Rinsp = nan, nan, nan
	if !math.IsNaN(b.PPlat) {
		b.DP = b.PPlat - peepTotal
		if b.DP > 0.5 {
			b.Cstat = b.VTi / b.DP
		}
		if hi >= 0 && level > 0 {
			b.Rinsp = (b.PPeak - b.PPlat) / (s.endFlow(lo, hi) / 60)
		}
	}
	b.Cdyn = nan
	if b.PPeak-b.PEEP > 0.5 {
		b.Cdyn = b.VTi / (b.PPeak - b.PEEP)
	}

	// mechanical power, Gattinoni's simplified formula: measured driving
	// pressure, else the fitted one when the fit is reliable
	dp := b.DP
	if math.IsNaN(dp) && b.Reliable() && b.FitC > 0 {
		dp = b.VTi / b.FitC
	}
	b.MP = MechanicalPower(b.RR, b.VTi, b.PPeak, dp)

	b.SI = nan
	if hi >= 0 && b.Reliable() {
		var r2, se float64
		b.SI, r2, se = s.stressIndexOf(lo, hi, level)
		// a slow oscillation bends the ramp: on the simulator a cardiac
		// ripple of 6 % of the ramp's rise moved the index by up to 0.45,
		// so one over 1.25 % leaves it unable to tell 1 from 0.9 (our
		// choice, from the simulator; no source)
		rippled := s.ripple(e, j) > 0.0125*(s.paw[hi]-s.paw[lo])
		// a pressure that relaxes in the pause (pendelluft, stress
		// relaxation) bends the ramp as a change of compliance would
		relaxes := b.PauseDecay > max(s.cfg.PauseDecayLimit, 3*s.noiseP())
		if math.IsNaN(b.SI) || r2 < siR2Min || siUndecided(b.SI, se) || rippled || relaxes {
			b.Flags |= FlagSIUnreliable
		}
	}
	b.VTPBW = nan
	if s.pbw > 0 {
		b.VTPBW = b.VTi / s.pbw
	}
}

// siR2Min is the lowest R² of a stress-index fit that is not flagged
// si_unreliable (our choice: a power law through a few hundred millisecond
// ramp with sensor noise explains well over 98 %; common practice, no
// source).
const siR2Min = 0.98

// siUndecided reports a stress index outside 0.90–1.10 that is within
// 2.5 standard errors of it: the breath cannot tell which side it is on
// (the band from Ranieri et al., Anesthesiology 2000;93:1320; the 2.5
// standard errors our choice, common practice, no source).
func siUndecided(si, se float64) bool {
	if math.IsNaN(se) {
		return true
	}
	return (si < 0.9 && si > 0.9-2.5*se) || (si > 1.1 && si < 1.1+2.5*se)
}

// stressIndexOf is the stress index of the flat-flow segment [lo, hi] at
// flow level: time from the flow's half-rise, over the segment without its
// first tenth of the inflation (where the pressure still takes its
// resistive step), NaN when under 8 samples or 0.2 s remain.
func (s *Segmenter) stressIndexOf(lo, hi int, level float64) (si, r2, se float64) {
	t := s.t
	h := 0
	for h < lo && s.flow[h] < level/2 {
		h++
	}
	var origin float64
	if h == 0 {
		origin = t[0] - (t[1]-t[0])/2 // the flow rose within the interval before the first sample
	} else {
		f0, f1 := s.flow[h-1], s.flow[h]
		origin = t[h-1] + (level/2-f0)/(f1-f0)*(t[h]-t[h-1])
	}
	// to a sixteenth of the sample interval from the breath's start, so
	// that a steady ventilator's breaths give the same times and the fit
	// reuses its logarithms (however large the stream time)
	q := (t[1] - t[0]) / 16
	origin = t[0] + math.Round((origin-t[0])/q)*q
	from := origin + (t[hi]-origin)/10
	for lo < hi && t[lo] < from {
		lo++
	}
	if hi-lo < 8 || t[hi]-t[lo] < 0.2 {
		return nan, nan, nan
	}
	return s.stressIndex(lo, hi+1, origin)
}

// flatFlow finds the constant-flow part of the inspiratory flow [0, end):
// when the flow over its middle 60 % varies by under a tenth of its mean
// (standard deviation), the first and last samples within ±10 % of that
// level, and the level (L/min); hi is −1 when the flow is not constant.
func (s *Segmenter) flatFlow(end int) (lo, hi int, level float64) {
	n := end
	if n < 5 {
		return -1, -1, nan
	}
	a, z := n/5, n*4/5
	var sum, sum2 float64
	for i := a; i < z; i++ {
		sum += s.flow[i]
		sum2 += s.flow[i] * s.flow[i]
	}
	m := float64(z - a)
	mean := sum / m
	sd := math.Sqrt(math.Max(0, sum2/m-mean*mean))
	if !(mean > s.cfg.StartFlow && sd < 0.1*mean) {
		return -1, -1, nan
	}
	band := 0.1 * mean
	lo, hi = 0, end-1
	for lo < a && math.Abs(s.flow[lo]-mean) > band {
		lo++
	}
	for hi > z && math.Abs(s.flow[hi]-mean) > band {
		hi--
	}
	return lo, hi, mean
}

// endFlow is the mean flow over the last fifth of the flat segment, L/min.
func (s *Segmenter) endFlow(lo, hi int) float64 {
	var sum float64
	k := 0
	for i := hi - (hi-lo)/5; i <= hi; i++ {
		sum += s.flow[i]
		k++
	}
	return sum / float64(k)
}

// plateau finds the end-inspiratory pause after inspiratory flow ends at
// from (|flow| under PauseFlow for MinPause, before e) and returns the
// plateau pressure at its end, pause_decay and whether the plateau had
// settled. NaN without a pause.
//
// On occlusion the pressure falls fast by the airway's resistive part
// (and, with flow measured at the ventilator, as the circuit's gas moves
// on into the lung), then slowly as stress relaxes and gas moves between
// regions of unequal time constants; a plateau taken while it still falls
// lies above the static one (Bates, Rossi & Milic-Emili, J Appl Physiol
// 1985;58:1840, from memory). The first 50 ms (at least 3 samples) are the
// fast part; the rest is cut in thirds: the plateau is the last third's
// mean, pause_decay the first third's mean less it. If the slow fall is
// exponential, the second third's fall d2 and the first's d1 give what is
// still to come after the end, d2·q/(1 − q), q = d2/d1 (a geometric
// series; arithmetic): above PauseDecayLimit the plateau is not static.
func (s *Segmenter) plateau(from, e int) (pplat, decay float64, settled bool) {
	c := &s.cfg
	i := from
	for i < e && math.Abs(s.flow[i]) > c.PauseFlow {
		i++ // the turn from inspiratory flow to the pause
	}
	start := i
	for i < e && math.Abs(s.flow[i]) <= c.PauseFlow {
		i++
	}
	end := i - 1 // drop the last sample: the expiratory valve is opening
	if end-start < 4 || s.t[end]-s.t[start] < c.MinPause {
		return nan, nan, false
	}
	a := start + 3
	for a < end && s.t[a]-s.t[start] < 0.05 {
		a++
	}
	third := (end - a) / 3
	if third < 2 {
		// too short to see the slow fall's shape: the last samples, and the
		// fall since the fast part
		a = min(start+3, end-3)
		pplat = mean(s.paw, end-3, end)
		decay = mean(s.paw, a, a+3) - pplat
		return pplat, decay, decay <= max(c.PauseDecayLimit, 3*s.noiseP())
	}
	pa, pb := mean(s.paw, a, a+third), mean(s.paw, a+third, a+2*third)
	pplat = mean(s.paw, end-third, end)
	decay = pa - pplat
	d1, d2 := pa-pb, pb-pplat
	if d2 <= 2.5*s.noiseP()*math.Sqrt(2/float64(third)) {
		return pplat, decay, true // no fall left that the noise does not explain
	}
	if d1 <= 0 || d2 >= 0.9*d1 {
		return pplat, decay, false // not slowing down: no end in sight
	}
	q := d2 / d1
	return pplat, decay, d2*q/(1-q) <= c.PauseDecayLimit
}

// mean is the mean of x over [lo, hi).
func mean(x []float64, lo, hi int) float64 {
	var sum float64
	for i := lo; i < hi; i++ {
		sum += x[i]
	}
	return sum / float64(hi-lo)
}

// measureNoise updates the pressure and flow noise from the last half
// second (at most half) of expiration [e, j): the mean absolute second
// difference, which a slow signal hardly moves, over its expectation for
// white noise, √6·√(2/π)·σ; averaged over breaths.
func (s *Segmenter) measureNoise(e, j int) {
	lo := j - 1
	for lo > e+(j-e)/2 && s.t[j-1]-s.t[lo-1] <= 0.5 {
		lo--
	}
	if j-lo < 8 {
		return
	}
	var dp, df float64
	for i := lo + 1; i < j-1; i++ {
		dp += math.Abs(s.paw[i-1] - 2*s.paw[i] + s.paw[i+1])
		df += math.Abs(s.flow[i-1] - 2*s.flow[i] + s.flow[i+1])
	}
	const k = 1.9544100476116797 // √6·√(2/π)
	n := float64(j - lo - 2)
	sp, sf := dp/n/k, df/n/k
	if math.IsNaN(s.sigP) {
		s.sigP, s.sigF = sp, sf
		return
	}
	s.sigP += (sp - s.sigP) / 8
	s.sigF += (sf - s.sigF) / 8
}

// residualVar is the variance of y about its least-squares parabola over
// every step-th sample of [lo, hi] (a parabola follows the end of an
// exponential decay over a second; an oscillation of a heartbeat's period
// it cannot).
func residualVar(t, y []float64, lo, hi, step int) float64 {
	n := float64((hi-lo)/step + 1)
	if n < 5 {
		return 0
	}
	mt := (t[lo] + t[hi]) / 2
	var s1, s2, s3, s4, sy, s1y, s2y, syy float64
	for i := lo; i <= hi; i += step {
		d := t[i] - mt
		d2 := d * d
		s1 += d
		s2 += d2
		s3 += d2 * d
		s4 += d2 * d2
		sy += y[i]
		s1y += d * y[i]
		s2y += d2 * y[i]
		syy += y[i] * y[i]
	}
	// normal equations of y = c0 + c1·d + c2·d², by Cramer's rule
	det := n*(s2*s4-s3*s3) - s1*(s1*s4-s3*s2) + s2*(s1*s3-s2*s2)
	if det <= 0 {
		return 0
	}
	c0 := (sy*(s2*s4-s3*s3) - s1*(s1y*s4-s3*s2y) + s2*(s1y*s3-s2*s2y)) / det
	c1 := (n*(s1y*s4-s3*s2y) - sy*(s1*s4-s3*s2) + s2*(s1*s2y-s1y*s2)) / det
	c2 := (n*(s2*s2y-s1y*s3) - s1*(s1*s2y-s1y*s2) + sy*(s1*s3-s2*s2)) / det
	return max(0, (syy-c0*sy-c1*s1y-c2*s2y)/n)
}

// ripple is the slow oscillation (a heartbeat's, a valve's) at the end of
// the expiration [e, j), in pressure terms: over its last second (at most
// half), the RMS about a parabola that the noise does not explain, of the
// pressure, and of the flow through the recent resistance, beyond what
// the noise gives; as an amplitude (√2·RMS), cmH2O.
func (s *Segmenter) ripple(e, j int) float64 {
	lo := j - 1
	for lo > e+(j-e)/2 && s.t[j-1]-s.t[lo-1] <= 1 {
		lo--
	}
	sp, sf := s.noiseP(), s.noiseF()
	step := max(1, (j-lo)/50) // about 50 samples are plenty for a slow oscillation
	// the noise's own variance, and three standard errors of its estimate
	// over these points, are not ripple
	k := 1 + 3*math.Sqrt(2/float64((j-1-lo)/step+1))
	rp := max(0, residualVar(s.t, s.paw, lo, j-1, step)-k*sp*sp)
	rf := max(0, residualVar(s.t, s.flow, lo, j-1, step)-k*sf*sf) * (s.medR / 60) * (s.medR / 60)
	return math.Sqrt2 * math.Sqrt(rp+rf)
}

// patientStart reports that the patient drew flow in during the first
// 0.15 s of the breath, before the ventilator raised the pressure (see
// drawn; the base is the previous breath's PEEP, so not for the first).
func (s *Segmenter) patientStart(e int) bool {
	if math.IsNaN(s.lastPEEP) {
		return false
	}
	hi := 0
	for hi+1 < e && s.t[hi]-s.t[0] <= 0.15 {
		hi++
	}
	return s.drawn(0, hi, s.lastPEEP)
}

// triggerDip reports whether, in the 0.3 s before the next start, the
// airway pressure fell abruptly, by TriggerDip or more (and past the
// noise) within 0.1 s, while the flow moved inward by StartFlow or more
// (and past the noise) over the same span — the patient pulling on the circuit (Thille et al., Intensive Care
// Med 2006;32:1515: a drop of at least 0.5 cmH2O with expiratory flow
// falling toward zero marks an effort). Pressure and flow are 3-sample
// means. A ventilator's own pressure wiggles move pressure and flow the
// same way and do not qualify.
func (s *Segmenter) triggerDip(e, j int) bool {
	tEnd := s.t[j]
	from := j // the window: the last 0.3 s and 0.1 s before it, 3-sample means
	for from > e+1 && tEnd-s.t[from-1] <= 0.4+1e-9 && j-from < len(s.scrP) {
		from--
	}
	ps, fs := s.scrP[:j-from], s.scrF[:j-from]
	fLo, fHi := math.Inf(1), math.Inf(-1)
	for i := from; i < j; i++ {
		ps[i-from] = (s.paw[i-1] + s.paw[i] + s.paw[i+1]) / 3
		fs[i-from] = (s.flow[i-1] + s.flow[i] + s.flow[i+1]) / 3
		fLo, fHi = min(fLo, fs[i-from]), max(fHi, fs[i-from])
	}
	dip := max(s.cfg.TriggerDip, 2*s.noiseP())
	rise := max(s.cfg.StartFlow, 3*s.noiseF())
	if fHi-fLo < rise {
		return false // the flow never moved inward by as much
	}
	for b := j - 1; b > from && tEnd-s.t[b] <= 0.3+1e-9; b-- {
		pb, fb := ps[b-from]+dip, fs[b-from]-rise
		for a := b - 1; a >= from && s.t[b]-s.t[a] <= 0.1+1e-9; a-- {
			if ps[a-from] >= pb && fs[a-from] <= fb {
				return true
			}
		}
	}
	return false
}

// MechanicalPower is Gattinoni's simplified formula for volume control,
// 0.098·RR·VT·(Ppeak − ½·ΔP), in J/min with rr in 1/min, vt in mL and
// pressures in cmH2O (Gattinoni et al., Intensive Care Med 2016;42:1567).
// NaN when dp is NaN.
func MechanicalPower(rr, vtML, ppeak, dp float64) float64 {
	return 0.098 * rr * vtML / 1000 * (ppeak - dp/2)
}

// MechanicalPowerFull is Gattinoni's full formula for constant flow
// without a pause: 0.098·RR·{VT²·[½·E + RR·(1+I:E)/(60·I:E)·R] + VT·PEEP},
// with VT in L, E in cmH2O/L and R in cmH2O·s/L; ie is I:E as the
// inspiratory/expiratory ratio (0.5 for 1:2). J/min.
func MechanicalPowerFull(rr, vtL, elastance, resistance, ie, peep float64) float64 {
	return 0.098 * rr * (vtL*vtL*(elastance/2+rr*(1+ie)/(60*ie)*resistance) + vtL*peep)
}

// endExpiratoryPressure is the mean pressure over the last 0.2 s (at most
// a quarter) of expiration.
func (s *Segmenter) endExpiratoryPressure(e, j int) float64 {
	w := math.Min(0.2, (s.t[j]-s.t[e])/4)
	var sum float64
	n := 0
	for i := j - 1; i >= e && s.t[j]-s.t[i] <= w+1e-9; i-- {
		sum += s.paw[i]
		n++
	}
	if n == 0 {
		return s.paw[j-1]
	}
	return sum / float64(n)
}

// smoothedMax is the largest 3-sample moving average of x over [lo, hi)
// (2 samples at each end).
func smoothedMax(x []float64, lo, hi int) float64 {
	if hi-lo < 3 {
		best := math.Inf(-1)
		for i := lo; i < hi; i++ {
			a, z := max(i-1, lo), min(i+1, hi-1)
			var sum float64
			for k := a; k <= z; k++ {
				sum += x[k]
			}
			best = max(best, sum/float64(z-a+1))
		}
		return best
	}
	best := max((x[lo]+x[lo+1])/2, (x[hi-2]+x[hi-1])/2)
	x = x[lo:hi]
	for i := 1; i+1 < len(x); i++ {
		best = max(best, (x[i-1]+x[i]+x[i+1])/3)
	}
	return best
}

// lineAt fits a straight line to y over samples [lo, hi] and returns its
// value at time at; NaN with fewer than 3 samples.
func lineAt(t, y []float64, lo, hi int, at float64) float64 {
	mt, my, slope, ok := lineFit(t, y, max(lo, 0), hi)
	if !ok {
		return nan
	}
	return my + slope*(at-mt)
}

// lineFit is the least-squares line through (t, y) over [lo, hi]: the
// means and the slope; ok is false with fewer than 3 samples.
func lineFit(t, y []float64, lo, hi int) (mt, my, slope float64, ok bool) {
	n := hi - lo + 1
	if n < 3 {
		return 0, 0, 0, false
	}
	for i := lo; i <= hi; i++ {
		mt += t[i]
		my += y[i]
	}
	mt, my = mt/float64(n), my/float64(n)
	var stt, sty float64
	for i := lo; i <= hi; i++ {
		stt += (t[i] - mt) * (t[i] - mt)
		sty += (t[i] - mt) * (y[i] - my)
	}
	if stt == 0 {
		return 0, 0, 0, false
	}
	return mt, my, sty / stt, true
}
