package mechanics

import "math"

// siPoints is about the most samples the stress-index fit uses.
const siPoints = 48

// stressIndex fits Paw = a·t^b + c over samples [lo, hi] of a
// constant-flow inflation, t from origin (the flow's half-rise), and
// returns b (Ranieri et al., Anesthesiology 2000;93:1320), the fit's R²
// and the standard error of b. For each b the fit is linear in a and c; b minimises the residual
// over [0.2, 5]: by Newton's method from the previous breath's exponent,
// else by Brent's method to 0.002, with t^b as exp(b·ln t) from logarithms
// taken once; above 2·siPoints samples, every k-th so that about siPoints
// remain.
func (s *Segmenter) stressIndex(lo, hi int, origin float64) (b, r2, se float64) {
	if hi-lo < 6 || s.t[lo] <= origin {
		return nan, nan, nan
	}
	step := max(1, (hi-lo)/siPoints)
	si := &s.si
	m := 0
	same := true // the same times from the origin as the last breath's
	for i := lo; i < hi; i += step {
		d := s.t[i] - origin
		same = same && m < len(si.d) && math.Abs(d-si.d[m]) <= 1e-9*d
		si.py[m] = s.paw[i]
		m++
	}
	if !same || m != len(si.d) {
		// new times: their logarithms, and no exponentials to start from
		si.d, si.lt, si.xs = si.d[:m], si.lt[:m], si.xs[:m]
		si.lmax = 0
		for k, i := 0, lo; i < hi; k, i = k+1, i+step {
			si.d[k] = s.t[i] - origin
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
	b, _, ok := si.newton(py, s.lastSI)
	mom := &si.mom
	if !ok {
		b = siBrent(si.lt, py, syy)
		for k, l := range si.lt {
			si.xs[k] = math.Exp(b * l)
		}
		si.at, si.series, mom = b, 0, nil
	}
	s.lastSI = b
	r2, se = siQuality(si.lt, si.xs, py, syy, mom)
	return b, r2, se
}

// siMoments are the sums over the points of x = t^b, j = x·ln t and the
// centred pressure y: Σx, Σj, Σx², Σxy, Σj², Σjx.
type siMoments struct{ sx, sj, sxx, sxy, sjj, sjx float64 }

// siQuality is the fit's R² and the standard error of its exponent, from
// the points' x = t^b (xs, at the exponent found or within 1e-3 of it) and
// centred pressures py, with their moments (mom, from Newton's last step;
// nil: taken here): the residual variance over the information the
// points carry about b, Σ(∂P/∂b)² less the part a and c explain (the
// usual linearised least-squares error; common practice, no source).
func siQuality(lt, xs, py []float64, syy float64, mom *siMoments) (r2, se float64) {
	n := float64(len(xs))
	if mom == nil {
		var m siMoments
		for k, x := range xs {
			l, y := lt[k], py[k]
			m.sx += x
			m.sj += x * l
			m.sxx += x * x
			m.sxy += x * y
			m.sjj += x * l * x * l
			m.sjx += x * l * x
		}
		mom = &m
	}
	mx := mom.sx / n
	sxx := mom.sxx - mom.sx*mom.sx/n
	sxy := mom.sxy // the pressures are centred
	sjj := mom.sjj - mom.sj*mom.sj/n
	sjx := mom.sjx - mom.sj*mom.sx/n
	if sxx <= 0 || n < 4 {
		return nan, nan
	}
	a := sxy / sxx
	sse := max(0, syy-sxy*sxy/sxx)
	info := a * a * (sjj - sjx*sjx/sxx) // Σ(∂P/∂b)², a and c taken out
	if sse == 0 {
		return 1, 0 // an exact power law
	}
	if info <= 0 {
		return 1 - sse/syy, nan
	}
	// residuals that follow one another (a cardiac oscillation, a
	// valve's ringing) carry less information than as many independent
	// ones: the error grows by √((1+ρ)/(1−ρ)), ρ their lag-one
	// correlation (the usual correction for AR(1) errors; common
	// practice, no source)
	var rr, prev float64
	for k, x := range xs {
		r := py[k] - a*(x-mx)
		if k > 0 {
			rr += r * prev
		}
		prev = r
	}
	rho := max(0, min(0.95, rr/sse))
	return 1 - sse/syy, math.Sqrt(sse / (n - 3) / info * (1 + rho) / (1 - rho))
}

// siSSE is the residual sum of squares of the best a, c for exponent b:
// syy − sxy²/sxx, x = t^b.
func siSSE(lt, py []float64, syy, b float64) float64 {
	n := float64(len(lt))
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

// siFit keeps what one breath's stress-index fit leaves for the next: at a
// steady rate and inspiratory time the sample times from the breath's
// start repeat, and so do their logarithms, and the exponentials of the
// last Newton step are the next breath's starting point.
type siFit struct {
	d, lt, xs, py []float64 // time from the start (s), its log, e^(at·lt), pressure
	at            float64   // the exponent xs holds, NaN for none
	lmax          float64   // the largest |lt|
	series        int       // steps taken by the series since xs were exact
	mom           siMoments // the moments at the exponent xs hold, from Newton's last step
}

func newSIFit() siFit {
	const n = 2*siPoints + 2
	return siFit{d: make([]float64, 0, n), lt: make([]float64, 0, n), xs: make([]float64, 0, n),
		py: make([]float64, n), at: nan}
}

// siBrent finds the stress-index exponent by Brent's method over [0.2, 5]
// on the residual of the best a, c for exponent b: syy − sxy²/sxx.
func siBrent(lt, py []float64, syy float64) float64 {
	sse := func(b float64) float64 { return siSSE(lt, py, syy, b) }
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
func (f *siFit) newton(py []float64, b0 float64) (b, explained float64, ok bool) {
	lt, xs := f.lt, f.xs
	b = b0
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
			return nan, nan, false
		}
		explained = p * p / q // at the last exponent: within 1e-3 of b
		f.mom = siMoments{sx: sx, sj: slx, sxx: sxx, sxy: p, sjj: sllxx, sjx: slxx}
		g1 := (2*p*sp*q - p*p*q1) / (q * q)
		g2 := (2*sp*sp+2*p*spp)/q - 4*p*sp*q1/(q*q) - p*p*q2/(q*q) + 2*p*p*q1*q1/(q*q*q)
		if !(g2 < 0) {
			if b != b0 || math.IsNaN(b0) {
				return nan, nan, false
			}
			b, b0 = 1, nan // far from the previous exponent: once more from 1
			continue
		}
		step := max(-0.25, min(0.25, -g1/g2)) // damped far away
		b += step
		if b < 0.2 || b > 5 || math.IsNaN(b) {
			return nan, nan, false
		}
		if math.Abs(step) < 1e-3 {
			// Newton's error squares at each step: one this small
			// leaves about its square, under 1e-6
			return b, explained, true
		}
	}
	return nan, nan, false
}
