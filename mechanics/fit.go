package mechanics

// eomSums accumulates the least-squares sums of the equation of motion
// Paw = R·V' + E1·V + E2·V² + P0 over samples, each taken about a
// reference point (the caller subtracts the first sample's flow and
// pressure; volume starts at 0), which keeps them as accurate as centred
// ones over a breath's few hundred samples; the centred sums follow from
// them.
type eomSums struct {
	n                                                           float64
	m1, m2, m3, my, s11, s12, s13, s22, s23, s33, s1y, s2y, s3y float64
	syy                                                         float64
}

// add takes one sample: flow x1 (L/s), volume x2 (L), its square x3,
// pressure y (cmH2O).
func (a *eomSums) add(x1, x2, x3, y float64) {
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

// centre turns the sums of n samples into centred ones and the means
// into means.
func (a *eomSums) centre(n float64) {
	a.n = n
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
}

// linear solves the centred sums for Paw = R·V' + E·V + P0: R, E, and the
// residual and total sums of squares; ok is false when it is singular.
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

// fit solves, by least squares over the breath's samples [0, j), the
// single-compartment equation of motion Paw = R·V' + E·V + P0 (fit_r,
// fit_c, fit_p0, fit_r2, tau) and the same with a volume-dependent
// elastance, Paw = R·V' + E1·V + E2·V² + P0 (e2_pct = 100·E2·VT/(E1 +
// E2·VT); Kano et al., J Appl Physiol 1994;77:1185). V' is in L/s and V
// in L, integrated by the trapezoid rule from the breath's start; with a
// circuit compliance, the gas compressed in the circuit, Ccirc·(Paw −
// Paw(0)), is taken off V.
func (s *Segmenter) fit(b *Breath, j int) {
	b.FitR, b.FitC, b.FitP0, b.FitR2, b.Tau, b.E2Pct = nan, nan, nan, nan, nan, nan
	if j < 8 {
		return
	}
	t, paw, flow := s.t[:j], s.paw[:j], s.flow[:j]
	cc := s.cfg.CircuitCompliance / 1000 // L/cmH2O
	f0, p0 := flow[0]*(1.0/60), paw[0]
	var a eomSums
	var v float64
	prevF, prevT := flow[0], t[0]
	const perMin = 1.0 / 60 // L/min to L/s, multiplied: no division per sample
	for i := range t {
		v += (prevF + flow[i]) * (perMin / 2) * (t[i] - prevT)
		prevF, prevT = flow[i], t[i]
		y := paw[i] - p0
		x2 := v - cc*y
		a.add(flow[i]*perMin-f0, x2, x2*x2, y)
	}
	a.centre(float64(j))
	r, el, ssr, ok := a.linear()
	if !ok {
		return
	}
	b.FitR2 = 1 - ssr/a.syy
	b.FitR = r
	b.FitP0 = (a.my + p0) - r*(a.m1+f0) - el*a.m2
	if el > 0 {
		b.FitC = 1000 / el
		b.Tau = r / el
	}
	if e1, e2, ok := a.quadratic(); ok {
		vt := b.VTi / 1000
		if den := e1 + e2*vt; den > 0 {
			b.E2Pct = 100 * e2 * vt / den
		}
	}
}
