package mechanics

import "math"

// Channel alignment. A pure delay between the pressure and the flow
// channel (sensor electronics, filtering, a flow sensor further from the
// airway) makes the two disagree at every fast change: it biases the fitted
// resistance and compliance, the stress index and the effort tests. The
// delay is estimated around each inflation onset, where both channels
// change fastest, as the shift of the flow channel at which the equation of
// motion, Paw = R·V' + E·V + P0, fits the pressure best (least squares
// over the onset's window; our method, built on the equation of motion of
// Bates 2009, ch. 3; common practice, no source for the search itself):
// unlike a cross-correlation of the two channels' changes it is not biased
// by their different shapes in pressure control. The earlier channel is
// then delayed by the median of the recent estimates.
const (
	alignBits  = 9
	alignSize  = 1 << alignBits // raw samples kept: the alignment's and the estimate's history
	maxDelay   = 0.2            // s, the largest delay a configuration may set
	delayPre   = 0.1            // s before an onset in the estimate's window
	delayPost  = 0.2            // s after it
	delayLag   = 0.1            // s, the largest lag the estimate tries
	delayKeep  = 9              // estimates the median is taken over
	delayEvery = 8              // then one onset in this many is estimated
	delayFirst = 3              // estimates before the first alignment
)

// aligner keeps the last raw samples, pairs each flow sample with the
// pressure sample lagP earlier (or each pressure sample with the flow
// sample lagF earlier), and estimates the delay from inflation onsets.
// The time of an aligned sample is the later channel's.
type aligner struct {
	rt, rp, rf [alignSize]float64
	raw        int64 // raw samples since the last reset
	lagP, lagF int   // samples by which pressure / flow are delayed
	fixed      bool
	want       float64 // fixed: the delay to apply, s
	circuit    float64 // the circuit's compliance, L/cmH2O: its gas is not the lung's

	onsets   int64 // onsets seen
	onsetRaw int64 // raw index of the latest onset, −1 for none
	estAt    int64 // the raw count at which to estimate it
	est      [delayKeep]float64
	nEst     int
	delay    float64 // median of the estimates, s; NaN before the first
	pending  float64 // the latest onset's estimate, s, until its breath is known passive; NaN for none
	pendDt   float64 // its sample interval, s
	pendP    int     // lags waiting to be applied at a quiet moment
	pendF    int
}

func (a *aligner) init(delay float64, fixed bool, circuit float64) {
	a.fixed, a.want, a.circuit = fixed, delay, circuit/1000
	a.delay, a.pending = nan, nan
	if fixed {
		a.delay = delay
	}
	a.onsetRaw = -1
}

// reset forgets the history: after a gap the channels restart.
func (a *aligner) reset() {
	a.raw, a.onsetRaw, a.pending = 0, -1, nan
}

// add stores a raw sample and returns the aligned pressure and flow for
// time t; ok is false while the history is shorter than the lag.
func (a *aligner) add(t, paw, flow float64) (float64, float64, bool) {
	r := a.raw & (alignSize - 1)
	a.rt[r], a.rp[r], a.rf[r] = t, paw, flow
	a.raw++
	if a.raw == 2 && a.fixed && a.want != 0 {
		a.setLag(a.want / (t - a.rt[0]))
		a.lagP, a.lagF = a.pendP, a.pendF
	}
	if a.raw == a.estAt && a.onsetRaw >= 0 {
		a.estimate()
	}
	if a.lagP|a.lagF == 0 {
		return paw, flow, true
	}
	if a.raw <= int64(a.lagP+a.lagF) {
		return 0, 0, false
	}
	return a.rp[(a.raw-1-int64(a.lagP))&(alignSize-1)], a.rf[(a.raw-1-int64(a.lagF))&(alignSize-1)], true
}

// span is d seconds in samples at the history's sample interval, at least 1.
func (a *aligner) span(d float64) int64 {
	n := min(a.raw, alignSize) - 1
	if n < 1 {
		return 1
	}
	last := (a.raw - 1) & (alignSize - 1)
	first := (a.raw - 1 - n) & (alignSize - 1)
	dt := (a.rt[last] - a.rt[first]) / float64(n)
	if !(dt > 0) {
		return 1
	}
	return max(1, int64(math.Round(d/dt)))
}

// onset notes that an inflation started at the breath buffer's first
// sample, n samples before the latest. Once the median has its onsets,
// one in delayEvery is estimated: a delay does not change from breath to
// breath, and each estimate costs a fit per lag tried.
func (a *aligner) onset(n int) {
	a.onsets++
	if a.nEst >= delayKeep && a.onsets%delayEvery != 0 {
		return
	}
	a.onsetRaw = a.raw - int64(n)
	a.estAt = a.onsetRaw + 1 + a.span(delayPost) + a.span(delayLag)
	if a.raw >= a.estAt { // already past: estimate now
		a.estimate()
	}
}

// estimate finds the flow shift around the latest onset at which the
// equation of motion leaves the least residual, refined by a parabola
// through its neighbours, and keeps it.
func (a *aligner) estimate() {
	o := a.onsetRaw
	a.onsetRaw = -1
	pre, post, maxLag := a.span(delayPre), a.span(delayPost), a.span(delayLag)
	if o-pre-maxLag-1 < max(0, a.raw-alignSize) || o+post+maxLag > a.raw-1 {
		return
	}
	m := func(i int64) int64 { return i & (alignSize - 1) }
	dt := (a.rt[m(o+post)] - a.rt[m(o-pre)]) / float64(pre+post)
	best, bestS := int64(0), math.Inf(1)
	var ss [3]float64 // residuals at best−1, best, best+1
	prev := math.NaN()
	for lag := -maxLag; lag <= maxLag; lag++ {
		r := eomResidual(&a.rp, &a.rf, o-pre, o+post, lag, dt, a.circuit)
		if r < bestS {
			best, bestS = lag, r
			ss[0], ss[1], ss[2] = prev, r, math.NaN()
		} else if lag == best+1 {
			ss[2] = r
		}
		prev = r
	}
	if best == -maxLag || best == maxLag || math.IsInf(bestS, 1) {
		return
	}
	frac := 0.0
	if den := ss[0] - 2*ss[1] + ss[2]; den > 0 {
		frac = 0.5 * (ss[0] - ss[2]) / den
	}
	a.pending, a.pendDt = (float64(best)+frac)*dt, dt
}

// accept keeps the pending estimate of the breath just finished, when it
// was passive: the patient's muscles break the equation of motion.
func (a *aligner) accept(passive bool) {
	e, dt := a.pending, a.pendDt
	a.pending = nan
	if math.IsNaN(e) || !passive {
		return
	}
	a.est[a.nEst%delayKeep] = e
	a.nEst++
	if a.fixed || a.nEst < delayFirst {
		return
	}
	n := min(a.nEst, delayKeep)
	var x [delayKeep]float64
	copy(x[:], a.est[:n])
	sortSmall(x[:n])
	a.delay = x[n/2]
	// a skew under a sample and a half is left alone: at onsets the gas's
	// inertia and the sensors' filters move the estimate by about a sample
	// (the effort tests allow for one); beyond, the channels are aligned
	want := a.delay / dt
	if math.Abs(want) < 1.5 {
		want = 0
	}
	if cur := float64(a.lagP - a.lagF); math.Abs(want-cur) > 0.8 {
		a.setLag(want)
	}
}

// eomResidual is the residual sum of squares of Paw = R·V' + E·V + P0
// over raw samples [lo, hi] with the flow taken lag samples later, V its
// trapezoid integral from lo, dt the sample interval; with a circuit of
// compliance cc (L/cmH2O) its gas, cc·ΔPaw and cc·Paw', is taken off the
// volume and the flow; +Inf when the fit is singular.
func eomResidual(p, f *[alignSize]float64, lo, hi, lag int64, dt, cc float64) float64 {
	const k = alignSize - 1
	var a eomSums
	var v float64
	f0, p0 := f[(lo+lag)&k]/60, p[lo&k]
	prev := f0
	for i := lo; i <= hi; i++ {
		q := f[(i+lag)&k] / 60 // L/s
		v += (prev + q) / 2 * dt
		prev = q
		y := p[i&k] - p0
		x1, x2 := q-f0, v-cc*y
		if cc > 0 {
			x1 -= cc * (p[(i+1)&k] - p[(i-1)&k]) / (2 * dt)
		}
		a.add(x1, x2, x2*x2, y)
	}
	a.centre(float64(hi - lo + 1))
	if _, _, ssr, ok := a.linear(); ok {
		return ssr
	}
	return math.Inf(1)
}

// setLag sets the pending lags for a delay of d samples of flow behind
// pressure.
func (a *aligner) setLag(d float64) {
	n := int(math.Round(d))
	n = max(-int(a.span(maxDelay)), min(int(a.span(maxDelay)), n))
	a.pendP, a.pendF = max(n, 0), max(-n, 0)
}

// settle applies pending lags: called where the channels change slowly.
func (a *aligner) settle() {
	a.lagP, a.lagF = a.pendP, a.pendF
}

// Channels is what a segmenter has measured of its two channels.
type Channels struct {
	// Delay is how far the flow channel lags the pressure channel: the
	// median of the recent estimates (or the fixed setting), s; NaN before
	// the first.
	Delay float64
	// Aligned is the shift the channels are aligned by, s (0 while the
	// delay is under a sample and a half).
	Aligned float64
	Fixed   bool    // the delay is the configured one, not estimated
	Onsets  int     // the recent onsets Delay is the median of
	PawSD   float64 // pressure noise σ at end expiration, cmH2O; NaN before the first breath
	FlowSD  float64 // flow noise σ, L/min
}

// Channels reports the channels' delay, alignment and noise.
func (s *Segmenter) Channels() Channels {
	a := &s.align
	c := Channels{Delay: a.delay, Fixed: a.fixed, Onsets: min(a.nEst, delayKeep), PawSD: s.sigP, FlowSD: s.sigF}
	if n := min(a.raw, alignSize) - 1; n > 0 {
		dt := (a.rt[(a.raw-1)&(alignSize-1)] - a.rt[(a.raw-1-n)&(alignSize-1)]) / float64(n)
		c.Aligned = float64(a.lagP-a.lagF) * dt
	}
	return c
}
