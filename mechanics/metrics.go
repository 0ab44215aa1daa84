package mechanics

import "math"

var nan = math.NaN()

// siPoints is about the most samples the stress-index fit uses.
const siPoints = 48

// compute fills b from the buffer's samples [0, j); sample j is the next
// breath's start.
func (s *Segmenter) compute(b *Breath, j int) {
	c := &s.cfg
	t, paw, flow := s.t, s.paw, s.flow
	e := s.expStart // first expiratory sample
	*b = Breath{TStart: t[0], TEnd: t[j], Flags: 0}
	b.Ti, b.Te = t[e]-t[0], t[j]-t[e]
	b.RR = 60 / (b.TEnd - b.TStart)
	b.IE = b.Te / b.Ti

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
	b.Leak = nan
	if b.VTi > 0 {
		b.Leak = (b.VTi - b.VTe) / b.VTi * 100
		if b.Leak > c.LeakLimit {
			b.Flags |= FlagLeak
		}
	}
	b.PMean = pint / (b.TEnd - b.TStart)
	b.PEEP = s.endExpiratoryPressure(e, j)
	b.EEF = (flow[j-1] + flow[max(j-2, e)]) / 2
	if b.EEF < -c.EEFLimit {
		b.Flags |= FlagIncompleteExhalation
	}

	// inspiratory flow: constant or not, its end value, and the peak
	flowEnd := s.inspEnd
	if flowEnd < 0 || flowEnd > e {
		flowEnd = e
	}
	constant, endFlow := s.constantFlow(0, flowEnd)
	b.PPeak = smoothedMax(paw, 0, e)
	if constant {
		// the pressure where constant flow stopped — half a sample interval
		// after its last sample, on average — from a line through the end of
		// the ramp: no noise picked up by a maximum, no lag by the sampling
		end := flowEnd - 1
		at := t[end] + (t[end+1]-t[end])/2
		if p := lineAt(t, paw, end-max(3, flowEnd*3/10), end, at); !math.IsNaN(p) {
			b.PPeak = p
		}
	} else {
		b.Flags |= FlagVariableFlow
	}

	b.PPlat = s.plateau(flowEnd, e)
	b.DP, b.Cstat, b.Rinsp = nan, nan, nan
	if math.IsNaN(b.PPlat) {
		b.Flags |= FlagNoPlateau
	} else {
		b.DP = b.PPlat - b.PEEP
		if b.DP > 0.5 {
			b.Cstat = b.VTi / b.DP
		}
		if constant && endFlow > 0 {
			b.Rinsp = (b.PPeak - b.PPlat) / (endFlow / 60)
		}
	}
	b.Cdyn = nan
	if b.PPeak-b.PEEP > 0.5 {
		b.Cdyn = b.VTi / (b.PPeak - b.PEEP)
	}

	s.fit(b, j)
	if s.nextDip || s.patientStart(e) {
		b.Flags |= FlagActiveEffort
	}
	s.nextDip = s.triggerDip(e, j)
	s.lastPEEP = b.PEEP
	if b.FitR2 < c.FitR2Min || math.IsNaN(b.FitR2) {
		b.Flags |= FlagFitUnreliable | FlagActiveEffort
	}
	if b.Flags&FlagActiveEffort != 0 {
		b.Flags |= FlagFitUnreliable // a fit under effort is not the lung's
	}

	// mechanical power, Gattinoni's simplified formula: measured driving
	// pressure, else the fitted one when the fit is reliable
	dp := b.DP
	if math.IsNaN(dp) && b.Reliable() && b.FitC > 0 {
		dp = b.VTi / b.FitC
	}
	b.MP = MechanicalPower(b.RR, b.VTi, b.PPeak, dp)

	b.SI = nan
	if constant && b.Reliable() {
		b.SI = s.stressIndex(flowEnd)
	}
	b.VTPBW = nan
	if s.pbw > 0 {
		b.VTPBW = b.VTi / s.pbw
	}
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

// constantFlow says whether inspiratory flow over [0, end) was constant:
// over its middle 60 % the standard deviation is under a tenth of the mean.
// It also returns the mean flow over the last fifth (L/min).
func (s *Segmenter) constantFlow(lo, end int) (bool, float64) {
	n := end - lo
	if n < 5 {
		return false, nan
	}
	a, z := lo+n/5, lo+n*4/5
	var sum, sum2 float64
	for i := a; i < z; i++ {
		sum += s.flow[i]
		sum2 += s.flow[i] * s.flow[i]
	}
	m := float64(z - a)
	mean := sum / m
	sd := math.Sqrt(math.Max(0, sum2/m-mean*mean))
	var last float64
	k := 0
	for i := lo + n*4/5; i < end; i++ {
		last += s.flow[i]
		k++
	}
	return mean > s.cfg.StartFlow && sd < 0.1*mean, last / float64(k)
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

// plateau is the mean pressure over the second half of the end-inspiratory
// pause [from, e), or NaN when there is no pause of MinPause with |flow|
// under PauseFlow, or its pressure has not settled (it still moves by more
// than 1 cmH2O over the averaging window).
func (s *Segmenter) plateau(from, e int) float64 {
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
	if end-start < 2 || s.t[end]-s.t[start] < c.MinPause {
		return nan
	}
	lo := start + (end-start)/2
	_, mean, slope, ok := lineFit(s.t, s.paw, lo, end-1)
	if !ok || math.Abs(slope*(s.t[end-1]-s.t[lo])) > 1 {
		return nan // not settled: it still moves by more than 1 cmH2O across the window
	}
	return mean
}

// triggerDip reports whether, in the 0.3 s before the next start,
// pressure dipped TriggerDip or more below its level just before while
// flow turned inward — the patient pulling on the circuit (Thille et al.,
// Intensive Care Med 2006;32:1515: a drop of at least 0.5 cmH2O with
// expiratory flow falling toward zero marks an effort). Both are smoothed
// over 3 samples so that noise alone does not qualify.
func (s *Segmenter) triggerDip(e, j int) bool {
	tEnd := s.t[j]
	from := j // the first sample of the last 0.6 s
	for from > e && tEnd-s.t[from-1] <= 0.6 {
		from--
	}
	var ref float64
	n := 0
	for i := from; i < j; i++ {
		if d := tEnd - s.t[i]; d > 0.3 && d <= 0.6 {
			ref += s.paw[i]
			n++
		}
	}
	if n == 0 {
		return false
	}
	ref /= float64(n)
	for i := max(e+1, from); i+1 < j; i++ {
		if tEnd-s.t[i] > 0.3 {
			continue
		}
		p := (s.paw[i-1] + s.paw[i] + s.paw[i+1]) / 3
		f := (s.flow[i-1] + s.flow[i] + s.flow[i+1]) / 3
		if ref-p >= s.cfg.TriggerDip && f > s.cfg.StartFlow/5 {
			return true
		}
	}
	return false
}

// patientStart reports inspiratory flow of at least StartFlow/2 while
// the airway pressure is still within 0.2 cmH2O of the previous PEEP, in
// the first 0.15 s of the breath. A passive lung only fills when the
// airway pressure rises above the alveolar pressure, itself at or above
// PEEP (by R·V' — at R 10 cmH2O·s/L, 0.2 cmH2O drives 1.2 L/min); more flow
// than that without the rise means the patient's muscles drew it in (the
// equation of motion with Pmus; Bates 2009, ch. 3).
func (s *Segmenter) patientStart(e int) bool {
	if math.IsNaN(s.lastPEEP) {
		return false
	}
	for i := 0; i+1 < e && s.t[i]-s.t[0] <= 0.15; i++ {
		p := (s.paw[i] + s.paw[i+1]) / 2
		if s.flow[i] > s.cfg.StartFlow/2 && p < s.lastPEEP+0.2 {
			return true
		}
	}
	return false
}

// fit solves Paw = R·V' + E·V + P0 by least squares over the breath's
// samples [0, j), with V' in L/s and V in L integrated by the trapezoid
// rule from the breath's start, and fills fit_r, fit_c, fit_p0, fit_r2 and
// tau. One pass takes the sums about a reference point (the first
// sample's flow and pressure, volume 0), which keeps them as accurate as
// centred ones for a breath's few hundred samples; the centred sums
// follow from them.
func (s *Segmenter) fit(b *Breath, j int) {
	b.FitR, b.FitC, b.FitP0, b.FitR2, b.Tau = nan, nan, nan, nan, nan
	if j < 8 {
		return
	}
	t, paw, flow := s.t[:j], s.paw[:j], s.flow[:j]
	f0, p0 := flow[0]*(1.0/60), paw[0]
	var m1, m2, my, s11, s12, s22, s1y, s2y, syy, v float64
	prevF, prevT := flow[0], t[0]
	const perMin = 1.0 / 60 // L/min to L/s, multiplied: no division per sample
	for i := range t {
		v += (prevF + flow[i]) * (perMin / 2) * (t[i] - prevT)
		prevF, prevT = flow[i], t[i]
		x1, x2, y := flow[i]*perMin-f0, v, paw[i]-p0
		m1 += x1
		m2 += x2
		my += y
		s11 += x1 * x1
		s12 += x1 * x2
		s22 += x2 * x2
		s1y += x1 * y
		s2y += x2 * y
		syy += y * y
	}
	n := float64(j)
	m1, m2, my = m1/n, m2/n, my/n
	s11 -= n * m1 * m1
	s12 -= n * m1 * m2
	s22 -= n * m2 * m2
	s1y -= n * m1 * my
	s2y -= n * m2 * my
	syy -= n * my * my
	det := s11*s22 - s12*s12
	if det <= 0 || syy <= 0 {
		return
	}
	r := (s1y*s22 - s2y*s12) / det
	el := (s2y*s11 - s1y*s12) / det
	ssr := syy - r*s1y - el*s2y // residual sum of squares
	b.FitR2 = 1 - ssr/syy
	b.FitR = r
	b.FitP0 = (my + p0) - r*(m1+f0) - el*m2
	if el > 0 {
		b.FitC = 1000 / el
		b.Tau = r / el
	}
}

// stressIndex fits Paw = a·t^b + c, t from the start of inspiration, over
// the constant-flow part of inflation (from a tenth of it to its last
// sample before the flow ends) and returns b (Ranieri et al.,
// Anesthesiology 2000;93:1320). For each b the fit is linear in a and c;
// b minimises the residual over [0.2, 5]: by Newton's method from the
// previous breath's exponent, else by Brent's method to 0.002, with t^b as
// exp(b·ln t) from logarithms taken once; above 2·siPoints samples, every
// k-th so that about siPoints remain.
func (s *Segmenter) stressIndex(flowEnd int) float64 {
	lo, hi := flowEnd/10+1, flowEnd-1
	if hi-lo < 6 {
		return nan
	}
	step := max(1, (hi-lo)/siPoints)
	si := &s.si
	m := 0
	same := true // the same times from the start as the last breath's
	for i := lo; i < hi; i += step {
		d := s.t[i] - s.t[0]
		same = same && m < len(si.d) && math.Abs(d-si.d[m]) <= 1e-9*d
		si.py[m] = s.paw[i]
		m++
	}
	if !same || m != len(si.d) {
		// new times: their logarithms, and no exponentials to start from
		si.d, si.lt, si.xs = si.d[:m], si.lt[:m], si.xs[:m]
		si.lmax = 0
		for k, i := 0, lo; i < hi; k, i = k+1, i+step {
			si.d[k] = s.t[i] - s.t[0]
			si.lt[k] = math.Log(si.d[k])
			si.lmax = max(si.lmax, math.Abs(si.lt[k]))
		}
		si.at = nan
	}
	py := si.py[:m]
	var my float64
	for _, p := range py {
		my += p
	}
	my /= float64(m)
	var syy float64
	for k := range py {
		py[k] -= my
		syy += py[k] * py[k]
	}
	b, ok := si.newton(py, s.lastSI)
	if !ok {
		b = siBrent(si.lt, py, syy)
	}
	s.lastSI = b
	return b
}

// siFit keeps what one breath's stress-index fit leaves for the next: at a
// steady rate and inspiratory time the sample times from the breath's
// start repeat, and so do their logarithms, and the exponentials of the
// last Newton step are the next breath's starting point.
type siFit struct {
	d, lt, xs, py []float64 // time from the start (s), its log, e^(at·lt), pressure
	at            float64   // the exponent xs holds, NaN for none
	lmax          float64   // the largest |lt|
	series        int       // steps taken by the series since xs were exact
}

func newSIFit() siFit {
	const n = 2*siPoints + 2
	return siFit{d: make([]float64, 0, n), lt: make([]float64, 0, n), xs: make([]float64, 0, n),
		py: make([]float64, n), at: nan}
}

// siBrent finds the stress-index exponent by Brent's method over [0.2, 5]
// on the residual of the best a, c for exponent b: syy − sxy²/sxx.
func siBrent(lt, py []float64, syy float64) float64 {
	n := float64(len(lt))
	sse := func(b float64) float64 {
		var sx, sxx, sxy float64
		for k, l := range lt {
			x := math.Exp(b * l)
			sx += x
			sxx += x * x
			sxy += x * py[k]
		}
		sxx -= sx * sx / n
		if sxx <= 0 {
			return math.Inf(1)
		}
		return syy - sxy*sxy/sxx
	}
	b, _ := minimize(sse, 0.2, 5, 2e-3)
	return b
}

// newton finds the stress-index exponent by Newton's method from b0
// (the previous breath's, NaN for none), on the explained sum of squares
// g(b) = P²/Q, P = Σ x·y, Q = Σ x² − (Σ x)²/n, x = e^(b·l), y centred —
// the residual is syy − g, so its minimum is g's maximum. Each step takes
// one exponential per point, against a dozen for Brent's method over the
// whole range, and a small step none: the next e^(b·l) is the last
// times a short series — also from one breath to the next, whose times
// from the start are the same (f keeps them). Where g is not concave at b0 it starts again from 1; ok is
// false when a step fails (g not concave, out of [0.2, 5], no convergence
// in 12 steps), and the caller falls back to Brent.
func (f *siFit) newton(py []float64, b0 float64) (float64, bool) {
	lt, xs := f.lt, f.xs
	b := b0
	if math.IsNaN(b) || b < 0.3 || b > 4.5 {
		b = 1
	}
	n := float64(len(lt))
	for range 12 {
		if step := b - f.at; math.Abs(step)*f.lmax <= 0.12 && f.series < 32 {
			// near the exponent xs hold, e^(b·l) from them by a series:
			// |step·l| ≤ 0.12 leaves its remainder under 1e-10, and after
			// 32 such steps they are taken afresh
			for k, l := range lt {
				d := step * l
				xs[k] *= 1 + d*(1+d*(1.0/2+d*(1.0/6+d*(1.0/24+d*(1.0/120+d*(1.0/720))))))
			}
			f.series++
		} else {
			for k, l := range lt {
				xs[k] = math.Exp(b * l)
			}
			f.series = 0
		}
		f.at = b
		var sx, slx, sllx, sxx, slxx, sllxx, p, sp, spp float64
		for k, x := range xs {
			l, y := lt[k], py[k]
			lx, xx, xy := l*x, x*x, x*y
			sx += x
			slx += lx
			sllx += l * lx
			sxx += xx
			slxx += l * xx
			sllxx += l * l * xx
			p += xy
			sp += l * xy
			spp += l * l * xy
		}
		q := sxx - sx*sx/n
		q1 := 2*slxx - 2*sx*slx/n
		q2 := 4*sllxx - 2*(slx*slx+sx*sllx)/n
		if q <= 0 {
			return nan, false
		}
		g1 := (2*p*sp*q - p*p*q1) / (q * q)
		g2 := (2*sp*sp+2*p*spp)/q - 4*p*sp*q1/(q*q) - p*p*q2/(q*q) + 2*p*p*q1*q1/(q*q*q)
		if !(g2 < 0) {
			if b != b0 || math.IsNaN(b0) {
				return nan, false
			}
			b, b0 = 1, nan // far from the previous exponent: once more from 1
			continue
		}
		step := max(-0.25, min(0.25, -g1/g2)) // damped far away
		b += step
		if b < 0.2 || b > 5 || math.IsNaN(b) {
			return nan, false
		}
		if math.Abs(step) < 1e-3 {
			// Newton's error squares at each step: one this small
			// leaves about its square, under 1e-6
			return b, true
		}
	}
	return nan, false
}

// minimize finds a minimum of f on [a, b] to within about tol by Brent's
// method (Brent, Algorithms for Minimization without Derivatives, 1973,
// ch. 5): parabolic steps where they behave, golden-section steps where
// they do not. It returns the point and the number of evaluations.
func minimize(f func(float64) float64, a, b, tol float64) (float64, int) {
	const c = 0.3819660112501051 // (3 − √5)/2
	x := a + c*(b-a)
	w, v := x, x
	fx := f(x)
	fw, fv := fx, fx
	evals := 1
	var d, e float64
	for evals < 100 {
		m := (a + b) / 2
		tol1 := 1e-10*math.Abs(x) + tol/3
		tol2 := 2 * tol1
		if math.Abs(x-m) <= tol2-(b-a)/2 {
			break
		}
		parabolic := false
		if math.Abs(e) > tol1 {
			r := (x - w) * (fx - fv)
			q := (x - v) * (fx - fw)
			p := (x-v)*q - (x-w)*r
			q = 2 * (q - r)
			if q > 0 {
				p = -p
			} else {
				q = -q
			}
			if math.Abs(p) < math.Abs(q*e/2) && p > q*(a-x) && p < q*(b-x) {
				e, d = d, p/q
				parabolic = true
				if u := x + d; u-a < tol2 || b-u < tol2 {
					d = math.Copysign(tol1, m-x)
				}
			}
		}
		if !parabolic {
			if x < m {
				e = b - x
			} else {
				e = a - x
			}
			d = c * e
		}
		u := x + d
		if math.Abs(d) < tol1 {
			u = x + math.Copysign(tol1, d)
		}
		fu := f(u)
		evals++
		if fu <= fx {
			if u < x {
				b = x
			} else {
				a = x
			}
			v, fv, w, fw, x, fx = w, fw, x, fx, u, fu
			continue
		}
		if u < x {
			a = u
		} else {
			b = u
		}
		if fu <= fw || w == x {
			v, fv, w, fw = w, fw, u, fu
		} else if fu <= fv || v == x || v == w {
			v, fv = u, fu
		}
	}
	return x, evals
}
