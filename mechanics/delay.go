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
	wake       int64 // the raw count at which add has more to do: set a fixed lag, estimate
	raw        int64 // raw samples since the last reset
	lagP, lagF int   // samples by which pressure / flow are delayed
	ring       *[alignSize]rawSample
	scratch    *alignScratch
	fixed      bool
	want       float64 // fixed: the delay to apply, s
	circuit    float64 // the circuit's compliance, L/cmH2O: its gas is not the lung's

	onsets   int64 // onsets seen
	onsetRaw int64 // raw index of the latest onset, −1 for none
	est      [delayKeep]float64
	nEst     int
	delay    float64 // median of the estimates, s; NaN before the first
	pending  float64 // the latest onset's estimate, s, until its breath is known passive; NaN for none
	pendDt   float64 // its sample interval, s
	pendP    int     // lags waiting to be applied at a quiet moment
	pendF    int
}

func (a *aligner) init(delay float64, fixed bool, circuit float64) {
	a.ring, a.scratch = new([alignSize]rawSample), new(alignScratch)
	a.fixed, a.want, a.circuit = fixed, delay, circuit/1000
	a.delay, a.pending = nan, nan
	if fixed {
		a.delay = delay
	}
	a.reset()
}

// reset forgets the history: after a gap the channels restart.
func (a *aligner) reset() {
	a.raw, a.onsetRaw, a.pending, a.wake = 0, -1, nan, -1
	if a.fixed && a.want != 0 {
		a.wake = 2 // the lag once the sample interval is known
	}
}

// Segmenter.Add stores each raw sample in ring, counts it in raw, calls
// wakeUp when raw reaches wake and, when a lag is set, takes the pair from
// lagged.

// wakeUp does what the sample count was waiting for.
func (a *aligner) wakeUp(t float64) {
	a.wake = -1
	if a.raw == 2 && a.fixed {
		a.setLag(a.want / (t - a.ring[0].t))
		a.lagP, a.lagF = a.pendP, a.pendF
		return
	}
	if a.onsetRaw >= 0 {
		a.estimate()
	}
}

// lagged is the latest sample's pressure and flow at the current lags; ok
// is false while the history is shorter than the lag.
func (a *aligner) lagged() (float64, float64, bool) {
	if a.raw <= int64(a.lagP+a.lagF) {
		return 0, 0, false
	}
	return a.ring[(a.raw-1-int64(a.lagP))&(alignSize-1)].p, a.ring[(a.raw-1-int64(a.lagF))&(alignSize-1)].f, true
}

// span is d seconds in samples at the history's sample interval, at least 1.
func (a *aligner) span(d float64) int64 {
	n := min(a.raw, alignSize) - 1
	if n < 1 {
		return 1
	}
	last := (a.raw - 1) & (alignSize - 1)
	first := (a.raw - 1 - n) & (alignSize - 1)
	dt := (a.ring[last].t - a.ring[first].t) / float64(n)
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
	a.wake = a.onsetRaw + 1 + a.span(delayPost) + a.span(delayLag)
	if a.raw >= a.wake { // already past: estimate now
		a.wake = -1
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
	dt := (a.ring[m(o+post)].t - a.ring[m(o-pre)].t) / float64(pre+post)
	sc := a.scratch
	for i := range int(pre + post + 1) {
		sc.t[i], sc.p[i] = float64(i)*dt, a.ring[m(o-pre+int64(i))].p
	}
	// once the median stands, around it only: a delay does not jump
	from, to := -maxLag, maxLag
	if a.nEst >= delayKeep {
		c := int64(math.Round(a.delay / dt))
		from, to = max(-maxLag, c-3), min(maxLag, c+3)
	}
	best, bestS := int64(0), math.Inf(1)
	var ss [3]float64 // residuals at best−1, best, best+1
	prev := math.NaN()
	for lag := from; lag <= to; lag++ {
		r := a.residual(sc, o-pre, o+post, lag)
		if r < bestS {
			best, bestS = lag, r
			ss[0], ss[1], ss[2] = prev, r, math.NaN()
		} else if lag == best+1 {
			ss[2] = r
		}
		prev = r
	}
	if best == from || best == to || math.IsInf(bestS, 1) {
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

// residual is the residual sum of squares of Paw = R·V' + E·V + P0 over
// raw samples [lo, hi] with the flow taken lag samples later (see
// eomSumsOf; sc holds the samples as slices, its times and pressures
// already filled), +Inf when the fit is singular.
func (a *aligner) residual(sc *alignScratch, lo, hi, lag int64) float64 {
	n := int(hi - lo + 1)
	for i := range n {
		sc.f[i] = a.ring[(lo+int64(i)+lag)&(alignSize-1)].f
	}
	sums, _ := eomSumsOf(sc.t[:n], sc.p[:n], sc.f[:n], a.circuit, 0)
	if _, _, ssr, ok := sums.linear(); ok {
		return ssr
	}
	return math.Inf(1)
}

// rawSample is a sample as it came: time s, pressure cmH2O, flow L/min.
type rawSample struct{ t, p, f float64 }

// alignScratch is an estimate's window as slices, allocated once.
type alignScratch struct {
	t, p, f [alignSize]float64
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
		dt := (a.ring[(a.raw-1)&(alignSize-1)].t - a.ring[(a.raw-1-n)&(alignSize-1)].t) / float64(n)
		c.Aligned = float64(a.lagP-a.lagF) * dt
	}
	return c
}
