package mechanics

// eomSums are the least-squares sums of the equation of motion
// Paw = R·V' + E1·V + E2·V² + P0 over a run of samples, centred.
type eomSums struct {
	n                                                           float64
	m1, m2, m3, my, s11, s12, s13, s22, s23, s33, s1y, s2y, s3y float64
	syy                                                         float64
}

// eomSumsOf takes the sums over samples t (s), paw (cmH2O) and flow
// (L/min), with V' in L/s and V in L integrated by the trapezoid rule
// from the first sample; with a circuit compliance cc (L/cmH2O) the gas
// compressed in the circuit, cc·(Paw − Paw(0)), is taken off V. It
// returns the linear sums over all the samples, and, when quad > 0, all
// the sums (those of V² too, for E2) over the first quad samples. Each
// sum is taken about a reference point (the first sample's flow and
// pressure, volume 0), which keeps them as accurate as centred ones over a
// breath's few hundred samples; the centred sums follow from them. The
// linear loop keeps its sums in locals (in a struct they would live in
// memory): it runs over every sample of every breath.
func eomSumsOf(t, paw, flow []float64, cc float64, quad int) (lin, all eomSums) {
	const perMin = 1.0 / 60 // L/min to L/s, multiplied: no division per sample
	f0, p0 := flow[0]*perMin, paw[0]
	var m1, m2, my, s11, s12, s22, s1y, s2y, syy, v float64
	prevF, prevT := flow[0], t[0]
	for i := range t {
		v += (prevF + flow[i]) * (perMin / 2) * (t[i] - prevT)
		prevF, prevT = flow[i], t[i]
		y := paw[i] - p0
		x1, x2 := flow[i]*perMin-f0, v-cc*y
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
	lin = eomSums{n: float64(len(t)), m1: m1, m2: m2, my: my, s11: s11, s12: s12, s22: s22, s1y: s1y, s2y: s2y, syy: syy}
	if quad = min(quad, len(t)); quad > 0 {
		// the first quad samples again, with every sum: fewer samples (an
		// inspiration), so that the spilled registers cost less
		var a eomSums
		v, prevF, prevT = 0, flow[0], t[0]
		for i := range quad {
			v += (prevF + flow[i]) * (perMin / 2) * (t[i] - prevT)
			prevF, prevT = flow[i], t[i]
			y := paw[i] - p0
			x1, x2 := flow[i]*perMin-f0, v-cc*y
			x3 := x2 * x2
			a.m1 += x1
			a.m2 += x2
			a.m3 += x3
			a.my += y
			a.s11 += x1 * x1
			a.s12 += x1 * x2
			a.s13 += x1 * x3
			a.s22 += x2 * x2
			a.s23 += x2 * x3
			a.s33 += x3 * x3
			a.s1y += x1 * y
			a.s2y += x2 * y
			a.s3y += x3 * y
			a.syy += y * y
		}
		a.n = float64(quad)
		all = a
		all.centre(f0, p0)
	}
	lin.centre(f0, p0)
	return lin, all
}

// centre turns the sums into centred ones and the means into means, the
// means of flow and pressure back about zero (for P0) from the reference
// point f0 (L/s), p0 (cmH2O).
func (a *eomSums) centre(f0, p0 float64) {
	n := a.n
	a.m1, a.m2, a.m3, a.my = a.m1/n, a.m2/n, a.m3/n, a.my/n
	a.s11 -= n * a.m1 * a.m1
	a.s12 -= n * a.m1 * a.m2
	a.s13 -= n * a.m1 * a.m3
	a.s22 -= n * a.m2 * a.m2
	a.s23 -= n * a.m2 * a.m3
	a.s33 -= n * a.m3 * a.m3
	a.s1y -= n * a.m1 * a.my
	a.s2y -= n * a.m2 * a.my
	a.s3y -= n * a.m3 * a.my
	a.syy -= n * a.my * a.my
	a.m1 += f0
	a.my += p0
}

// linear solves the centred sums for Paw = R·V' + E·V + P0: R, E, and the
// residual sum of squares; ok is false when it is singular.
func (a *eomSums) linear() (r, e, ssr float64, ok bool) {
	det := a.s11*a.s22 - a.s12*a.s12
	if det <= 0 || a.syy <= 0 {
		return 0, 0, 0, false
	}
	r = (a.s1y*a.s22 - a.s2y*a.s12) / det
	e = (a.s2y*a.s11 - a.s1y*a.s12) / det
	return r, e, a.syy - r*a.s1y - e*a.s2y, true
}

// quadratic solves the centred sums for E1 and E2 of Paw = R·V' + E1·V +
// E2·V² + P0 by Cramer's rule; ok is false when it is singular.
func (a *eomSums) quadratic() (e1, e2 float64, ok bool) {
	d := a.s11*(a.s22*a.s33-a.s23*a.s23) - a.s12*(a.s12*a.s33-a.s23*a.s13) + a.s13*(a.s12*a.s23-a.s22*a.s13)
	if d <= 0 {
		return 0, 0, false
	}
	e1 = (a.s11*(a.s2y*a.s33-a.s23*a.s3y) - a.s1y*(a.s12*a.s33-a.s23*a.s13) + a.s13*(a.s12*a.s3y-a.s2y*a.s13)) / d
	e2 = (a.s11*(a.s22*a.s3y-a.s2y*a.s23) - a.s12*(a.s12*a.s3y-a.s2y*a.s13) + a.s1y*(a.s12*a.s23-a.s22*a.s13)) / d
	return e1, e2, true
}

// fit solves, by least squares, the single-compartment equation of motion
// Paw = R·V' + E·V + P0 over the breath's samples [0, j) (fit_r, fit_c,
// fit_p0, fit_r2, tau), and the same with a volume-dependent elastance,
// Paw = R·V' + E1·V + E2·V² + P0, over its inspiration [0, e) (e2_pct =
// 100·E2·VT/(E1 + E2·VT); Kano et al., J Appl Physiol 1994;77:1185: the
// elastance the lung shows as it fills), with the circuit's gas taken off
// the volume (see eomSumsOf).
func (s *Segmenter) fit(b *Breath, j, e int) {
	b.FitR, b.FitC, b.FitP0, b.FitR2, b.Tau, b.E2Pct = nan, nan, nan, nan, nan, nan
	if j < 8 {
		return
	}
	a, in := eomSumsOf(s.t[:j], s.paw[:j], s.flow[:j], s.cfg.CircuitCompliance/1000, e)
	r, el, ssr, ok := a.linear()
	if !ok {
		return
	}
	b.FitR2 = 1 - ssr/a.syy
	b.FitR = r
	b.FitP0 = a.my - r*a.m1 - el*a.m2
	if el > 0 {
		b.FitC = 1000 / el
		b.Tau = r / el
	}
	if e1, e2, ok := in.quadratic(); e >= 8 && ok {
		vt := b.VTi / 1000
		if den := e1 + e2*vt; den > 0 {
			b.E2Pct = 100 * e2 * vt / den
		}
	}
}
