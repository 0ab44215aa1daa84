package mechanics

import (
	"errors"
	"math"
	"slices"
)

// WindowConfig sizes the rolling window and the baseline the pressure-rise
// attribution compares with. Zero fields take their defaults.
type WindowConfig struct {
	Breaths  int     // at most this many breaths; default 20
	Span     float64 // and none older than this, s; default 300
	Baseline float64 // the baseline is the Baseline seconds before the window; default 1800
	RiseMin  float64 // a peak pressure rise below this is not attributed, cmH2O; default 3
	// The slopes are fitted over the breaths of the last SlopeSpan seconds
	// (default 900) and given only when those span at least SlopeMin
	// seconds (default 600): a slope per hour from a minute of breaths is
	// noise.
	SlopeSpan, SlopeMin float64
}

// Defaults fills the unset fields.
func (c *WindowConfig) Defaults() {
	if c.Breaths == 0 {
		c.Breaths = 20
	}
	if c.Span == 0 {
		c.Span = 300
	}
	if c.Baseline == 0 {
		c.Baseline = 1800
	}
	if c.RiseMin == 0 {
		c.RiseMin = 3
	}
	if c.SlopeSpan == 0 {
		c.SlopeSpan = 900
	}
	if c.SlopeMin == 0 {
		c.SlopeMin = 600
	}
}

// Validate reports an unusable setting.
func (c *WindowConfig) Validate() error {
	if c.Breaths < 2 || c.Breaths > 1000 {
		return errors.New("window breaths must be 2…1000")
	}
	if c.Span <= 0 || c.Baseline <= 0 || c.Span+c.Baseline > 6*3600 || c.RiseMin < 0 {
		return errors.New("window span and baseline must be positive, together at most 6 h")
	}
	if c.SlopeMin <= 0 || c.SlopeSpan < c.SlopeMin || c.SlopeSpan > 6*3600 {
		return errors.New("window slope span must be positive, at least its minimum, at most 6 h")
	}
	return nil
}

// Stat summarises one field over the window; Median, Q1 and Q3 are NaN
// when N is 0.
type Stat struct {
	Median, Q1, Q3 float64
	N              int
}

// IQR is the interquartile range Q3 − Q1.
func (s Stat) IQR() float64 { return s.Q3 - s.Q1 }

// Rise causes.
const (
	RiseNone      = "none"      // the peak pressure did not rise by RiseMin, or no baseline yet
	RiseResistive = "resistive" // mostly the resistive part (peak − plateau): airway
	RiseElastic   = "elastic"   // mostly the elastic part (plateau − PEEP): lung or chest wall, or volume
	RiseBoth      = "both"
)

// Attribution says which part of the peak pressure rose against the
// baseline: the resistive part (R × end-inspiratory flow: peak − plateau)
// or the elastic part (VT/C: plateau − PEEP). With pauses it uses the
// measured parts; without, the fitted R and C (reliable breaths only).
type Attribution struct {
	Cause           string  // RiseNone, RiseResistive, RiseElastic or RiseBoth
	Method          string  // "plateau", "fit", or "" without enough breaths
	PeakRise        float64 // current minus baseline median peak pressure, cmH2O
	ResistiveRise   float64 // cmH2O
	ElasticRise     float64 // cmH2O
	BaselineBreaths int
}

// Trend is the rolling summary after a breath.
type Trend struct {
	At     float64 // stream time of the latest breath's end, s
	N      int     // breaths in the window
	Span   float64 // stream time the window covers, s
	stats  []Stat  // one per field (see Fields), computed when first asked
	done   uint64  // bit i: stats[i] computed
	w      *Window
	CSlope float64 // compliance slope, mL/cmH2O per hour (cstat, or fit_c without plateaus)
	// CChange is the window's median compliance against the baseline's, in
	// % (negative: falling); cstat when both have plateaus, else fit_c of
	// reliable breaths. NaN without enough breaths.
	CChange float64
	// NetFlow is the median over the window of each breath's net flow,
	// (vti − vte)/duration, in L/min: with no leak it is the flow sensor's
	// offset drift (volume is re-zeroed at every breath, so the drift does
	// not accumulate); with a leak it includes the leak.
	NetFlow float64
	DPSlope float64 // driving pressure slope, cmH2O per hour
	Rise    Attribution
	// Asynchrony tallies the window's breaths; Period the last complete
	// fixed 10-minute period (PeriodLength), with HasPeriod false before
	// one has ended; Current the period in progress.
	Asynchrony      Tally
	Period, Current Tally
	HasPeriod       bool
}

// Stat returns the statistics of a field by name.
func (t *Trend) Stat(name string) (Stat, bool) {
	i := FieldIndex(name)
	if i < 0 {
		return Stat{}, false
	}
	return t.StatAt(i), true
}

// StatAt returns the statistics of the field at position i, computing them on the first
// call after the breath: rules and sinks that need a few fields do not pay
// for all of them.
func (t *Trend) StatAt(i int) Stat {
	if t.done&(1<<i) == 0 {
		t.stats[i] = t.w.stat(t.w.idx, i)
		t.done |= 1 << i
	}
	return t.stats[i]
}

// part is what the baseline keeps of each breath.
type part struct {
	t             float64
	peak, res, el float64 // measured: peak, peak − plateau, plateau − PEEP
	cstat, fitC   float64 // compliance measured and fitted (reliable breaths only)
	fitRes, fitEl float64 // fitted: peak − PEEP − VT/C, VT/C
	dp            float64
}

// Window keeps the last breaths and the baseline history in rings
// allocated once; Add does not allocate.
type Window struct {
	cfg     WindowConfig
	ring    [][]float64 // the last Breaths breaths' values (output order)
	flags   []Flags
	asy     []Asynchrony // the breaths' asynchronies, beside ring
	periods Periods
	head, n int
	hist    []part // ring of breath parts for the baseline
	hHead   int
	hN      int
	scratch []float64
	idx     []int
	parts   []part      // the window's breaths' parts
	cur     sortedParts // the window's parts, sorted
	// baseVals are the baseline's values of each part, for its medians
	baseVals [nPartFields][]float64
	trend    Trend
	base     baseline // cached: the baseline moves slowly
	last     float64  // the latest breath's end, s
	stale    bool     // trend not computed since the latest Add
}

// baseline holds the baseline window's medians, recomputed every five
// minutes of stream time (a sixth of its default length).
type baseline struct {
	at                       float64 // stream time of the computation; NaN before
	peak, res, el, fres, fel float64
	cstat, fitC              float64
	nCstat, nFit             int
	nPeak, nRes, nFres       int
}

// NewWindow returns a window; cfg is completed with its defaults.
func NewWindow(cfg WindowConfig) (*Window, error) {
	cfg.Defaults()
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	w := &Window{cfg: cfg, ring: make([][]float64, cfg.Breaths), flags: make([]Flags, cfg.Breaths),
		asy: make([]Asynchrony, cfg.Breaths)}
	for i := range w.ring {
		w.ring[i] = make([]float64, 0, NumFields)
	}
	// at up to 60 breaths a minute over baseline and window
	hcap := int(max(cfg.Baseline+cfg.Span, cfg.SlopeSpan)/60*60) + cfg.Breaths
	w.hist = make([]part, hcap)
	w.scratch = make([]float64, 0, max(hcap, cfg.Breaths))
	w.trend.stats = make([]Stat, NumFields)
	w.trend.w = w
	w.idx = make([]int, 0, cfg.Breaths)
	w.parts = make([]part, 0, cfg.Breaths)
	w.cur.members = make([]part, 0, cfg.Breaths)
	for k := range w.baseVals {
		w.baseVals[k] = make([]float64, 0, hcap)
	}
	for k := range w.cur.sorted {
		w.cur.sorted[k] = make([]float64, 0, cfg.Breaths+1)
	}
	w.base.at = nan
	return w, nil
}

// Add takes a breath. It only stores it; Trend computes the summary. The
// values the breath's flags disown (Untrusted) are left out of every
// statistic.
func (w *Window) Add(b *Breath) {
	w.ring[w.head] = b.TrustedValues(w.ring[w.head][:0])
	w.flags[w.head] = b.Flags
	w.asy[w.head] = b.Asynchrony
	w.periods.Add(b)
	w.head = (w.head + 1) % len(w.ring)
	w.n = min(w.n+1, len(w.ring))
	w.remember(b)
	w.last, w.stale = b.TEnd, true
}

// Trend returns the rolling summary after the latest breath, valid until
// the next Add. It is computed on the first call after an Add.
func (w *Window) Trend() *Trend {
	tr := &w.trend
	if !w.stale {
		return tr
	}
	w.stale = false
	tr.At = w.last
	w.idx = w.inWindow(w.last - w.cfg.Span)
	idx := w.idx
	tr.N = len(idx)
	tr.Span = 0
	if tr.N > 0 {
		tr.Span = w.last - w.ring[idx[0]][0]
	}
	tr.done = 0 // the field statistics follow on demand, over w.idx
	tr.NetFlow = w.netFlow(idx)
	tr.CSlope, tr.DPSlope = w.slopes()
	tr.Rise = w.attribute(w.last, idx)
	tr.Asynchrony = w.tally(idx)
	tr.Current, tr.Period, tr.HasPeriod = w.periods.Current, w.periods.Last, w.periods.HasLast
	return tr
}

// tally counts the asynchronies of the window's breaths.
func (w *Window) tally(idx []int) Tally {
	var a Tally
	for _, slot := range idx {
		v := w.ring[slot]
		a.count(v[0], v[1], w.asy[slot], v[iIE])
	}
	return a
}

// inWindow lists the ring slots of breaths that started after from, oldest
// first, in a slice the window reuses.
func (w *Window) inWindow(from float64) []int {
	idx := w.idx[:0]
	for k := w.n; k >= 1; k-- {
		slot := (w.head - k + len(w.ring)) % len(w.ring)
		if w.ring[slot][0] >= from {
			idx = append(idx, slot)
		}
	}
	return idx
}

func (w *Window) stat(idx []int, f int) Stat {
	x := w.scratch[:0]
	for _, slot := range idx {
		if v := w.ring[slot][f]; !math.IsNaN(v) {
			x = append(x, v)
		}
	}
	return summarize(x)
}

// summarize sorts x in place and returns its median and quartiles (linear
// interpolation between order statistics).
func summarize(x []float64) Stat {
	if len(x) == 0 {
		return Stat{Median: nan, Q1: nan, Q3: nan}
	}
	sortSmall(x)
	return Stat{Median: quantile(x, 0.5), Q1: quantile(x, 0.25), Q3: quantile(x, 0.75), N: len(x)}
}

func quantile(sorted []float64, q float64) float64 {
	pos := q * float64(len(sorted)-1)
	i := int(pos)
	if i+1 >= len(sorted) {
		return sorted[len(sorted)-1]
	}
	return sorted[i] + (pos-float64(i))*(sorted[i+1]-sorted[i])
}

// netFlow is the median of (vti − vte)/(t_end − t_start) over the
// window, L/min.
func (w *Window) netFlow(idx []int) float64 {
	x := w.scratch[:0]
	for _, slot := range idx {
		v := w.ring[slot]
		if d := v[1] - v[0]; d > 0 && !math.IsNaN(v[iVTi]) && !math.IsNaN(v[iVTe]) {
			x = append(x, (v[iVTi]-v[iVTe])/d*0.06)
		}
	}
	return summarize(x).Median
}

// fitLine accumulates a least-squares line of y against t (t taken from
// an origin near the data, for precision) in one pass.
type fitLine struct {
	n, st, sy, stt, sty float64
	first, last         float64
}

func (f *fitLine) add(t, y float64) {
	if math.IsNaN(y) {
		return
	}
	if f.n == 0 {
		f.first, f.last = t, t
	}
	f.first, f.last = min(f.first, t), max(f.last, t)
	f.n++
	f.st += t
	f.sy += y
	f.stt += t * t
	f.sty += t * y
}

// perHour is the slope per hour: NaN with fewer than three values or when
// they span less than minSpan seconds.
func (f *fitLine) perHour(minSpan float64) float64 {
	if f.n < 3 || f.last-f.first < minSpan {
		return nan
	}
	den := f.n*f.stt - f.st*f.st
	if den <= 0 {
		return nan
	}
	return (f.n*f.sty - f.st*f.sy) / den * 3600
}

// slopes fits the compliance (cstat when at least three breaths of the
// slope's span have one, else the reliable breaths' fit_c) and driving
// pressure slopes over the breaths of the last SlopeSpan seconds, in one
// pass from the newest back.
func (w *Window) slopes() (compliance, dp float64) {
	from := w.last - w.cfg.SlopeSpan
	var cs, fc, d fitLine
	for k := 1; k <= w.hN; k++ {
		p := &w.hist[(w.hHead-k+len(w.hist))%len(w.hist)]
		if p.t < from {
			break // the ring is in time order
		}
		t := p.t - w.last // an origin at the window's end: small numbers
		cs.add(t, p.cstat)
		fc.add(t, p.fitC)
		d.add(t, p.dp)
	}
	compliance = fc.perHour(w.cfg.SlopeMin)
	if cs.n >= 3 {
		compliance = cs.perHour(w.cfg.SlopeMin)
	}
	return compliance, d.perHour(w.cfg.SlopeMin)
}

func (w *Window) remember(b *Breath) {
	w.hist[w.hHead] = partOf(w.ring[(w.head-1+len(w.ring))%len(w.ring)], b.Flags)
	w.hHead = (w.hHead + 1) % len(w.hist)
	w.hN = min(w.hN+1, len(w.hist))
}

// baseMedians takes the median of each part over the breaths that
// started in [from, to), in one pass over the history.
func (w *Window) baseMedians(from, to float64, med *[nPartFields]float64, n *[nPartFields]int) {
	x := &w.baseVals
	for k := range x {
		x[k] = x[k][:0]
	}
	for i := 1; i <= w.hN; i++ {
		p := &w.hist[(w.hHead-i+len(w.hist))%len(w.hist)]
		if p.t < from {
			break // older ones follow
		}
		if p.t >= to {
			continue
		}
		for k, get := range partFields {
			if v := get(*p); !math.IsNaN(v) {
				x[k] = append(x[k], v)
			}
		}
	}
	for k := range x {
		med[k], n[k] = medianOf(x[k]), len(x[k])
	}
}

func partPeak(p part) float64  { return p.peak }
func partRes(p part) float64   { return p.res }
func partEl(p part) float64    { return p.el }
func partFres(p part) float64  { return p.fitRes }
func partFel(p part) float64   { return p.fitEl }
func partCstat(p part) float64 { return p.cstat }
func partFitC(p part) float64  { return p.fitC }

// windowParts gathers the parts of the window's breaths (the slots of
// idx, which are the latest entries of the history), oldest first.
func (w *Window) windowParts(idx []int) []part {
	parts := w.parts[:0]
	for k := min(w.n, w.hN); k >= 1; k-- {
		p := w.hist[(w.hHead-k+len(w.hist))%len(w.hist)]
		if len(parts) < len(idx) && p.t == w.ring[idx[len(parts)]][0] {
			parts = append(parts, p)
		}
	}
	return parts
}

var (
	iPeak, iPlat, iPEEP = FieldIndex("ppeak"), FieldIndex("pplat"), FieldIndex("peep")
	iVTi, iFitC, iCstat = FieldIndex("vti"), FieldIndex("fit_c"), FieldIndex("cstat")
	iVTe, iDP           = FieldIndex("vte"), FieldIndex("dp")
	iIE                 = FieldIndex("ineffective_efforts")
)

// partOf derives a breath's parts from its stored values.
func partOf(v []float64, f Flags) part {
	p := part{t: v[0], peak: v[iPeak], res: v[iPeak] - v[iPlat], el: v[iPlat] - v[iPEEP], fitRes: nan, fitEl: nan,
		cstat: v[iCstat], fitC: nan, dp: v[iDP]}
	if f&(FlagFitUnreliable|FlagActiveEffort) == 0 && v[iFitC] > 0 {
		p.fitEl = v[iVTi] / v[iFitC]
		p.fitRes = v[iPeak] - v[iPEEP] - p.fitEl
		p.fitC = v[iFitC]
	}
	return p
}

// attribute compares the window's medians with the baseline's: the
// breaths of the Baseline seconds before the window.
func (w *Window) attribute(now float64, idx []int) Attribution {
	w.refreshBaseline(now)
	b := &w.base
	cur := &w.cur
	cur.update(w.windowParts(idx))
	w.trend.CChange = nan
	if c, n := cur.median(pkCstat); n >= 3 && b.nCstat >= 3 {
		w.trend.CChange = (c - b.cstat) / b.cstat * 100
	} else if c, n := cur.median(pkFitC); n >= 3 && b.nFit >= 3 {
		w.trend.CChange = (c - b.fitC) / b.fitC * 100
	}
	curPeak, nc := cur.median(pkPeak)
	a := Attribution{Cause: RiseNone, PeakRise: nan, ResistiveRise: nan, ElasticRise: nan, BaselineBreaths: b.nPeak}
	if b.nPeak < 3 || nc < 3 {
		return a
	}
	a.PeakRise = curPeak - b.peak
	if !w.splitRise(&a) || a.PeakRise < w.cfg.RiseMin {
		return a
	}
	a.Cause = riseCause(a.ResistiveRise, a.ElasticRise)
	return a
}

// refreshBaseline recomputes the baseline's medians every 5 minutes of
// stream time (and after time went back).
func (w *Window) refreshBaseline(now float64) {
	b := &w.base
	if !math.IsNaN(b.at) && now-b.at < 300 && now >= b.at {
		return
	}
	winFrom := now - w.cfg.Span
	b.at = now
	var med [nPartFields]float64
	var n [nPartFields]int
	w.baseMedians(winFrom-w.cfg.Baseline, winFrom, &med, &n)
	b.peak, b.nPeak = med[pkPeak], n[pkPeak]
	b.res, b.nRes = med[pkRes], n[pkRes]
	b.el = med[pkEl]
	b.fres, b.nFres = med[pkFres], n[pkFres]
	b.fel = med[pkFel]
	b.cstat, b.nCstat = med[pkCstat], n[pkCstat]
	b.fitC, b.nFit = med[pkFitC], n[pkFitC]
}

// splitRise sets the resistive and elastic parts of the rise from the
// plateau's numbers, else from the fit's; false when neither has three
// breaths in the window and in the baseline.
func (w *Window) splitRise(a *Attribution) bool {
	b, cur := &w.base, &w.cur
	a.Method = "plateau"
	rc, n := cur.median(pkRes)
	ec, _ := cur.median(pkEl)
	rb, eb := b.res, b.el
	if b.nRes < 3 || n < 3 {
		a.Method = "fit"
		rc, n = cur.median(pkFres)
		ec, _ = cur.median(pkFel)
		rb, eb = b.fres, b.fel
		if b.nFres < 3 || n < 3 {
			a.Method = ""
			return false
		}
	}
	a.ResistiveRise, a.ElasticRise = rc-rb, ec-eb
	return true
}

// riseCause names the larger part of a rise: 70 % or more of it.
func riseCause(resistive, elastic float64) string {
	r, e := math.Max(resistive, 0), math.Max(elastic, 0)
	switch share := r / (r + e); {
	case r+e == 0:
		return RiseNone
	case share >= 0.7:
		return RiseResistive
	case share <= 0.3:
		return RiseElastic
	default:
		return RiseBoth
	}
}

// sortSmall sorts x: by insertion for a window's few values (no call per
// comparison), else by slices.Sort.
func sortSmall(x []float64) {
	if len(x) > 32 {
		slices.Sort(x)
		return
	}
	for i := 1; i < len(x); i++ {
		v := x[i]
		j := i
		for ; j > 0 && x[j-1] > v; j-- {
			x[j] = x[j-1]
		}
		x[j] = v
	}
}

// medianOf is the median of x (NaN when empty), as summarize gives it,
// found by selection rather than a sort (Hoare's FIND, CACM 1961;4:321):
// x is reordered.
func medianOf(x []float64) float64 {
	n := len(x)
	if n <= 32 {
		if n == 0 {
			return nan
		}
		sortSmall(x)
		return quantile(x, 0.5)
	}
	hi := selectKth(x, n/2)
	if n%2 == 1 {
		return hi
	}
	return (slices.Max(x[:n/2]) + hi) / 2 // the lower middle is the largest below
}

// selectKth reorders x so that x[k] is the value a sort would put there,
// with none larger before it and none smaller after it, and returns it.
func selectKth(x []float64, k int) float64 {
	lo, hi := 0, len(x)-1
	for hi > lo {
		// the median of three as the pivot, then Hoare's partition
		mid := lo + (hi-lo)/2
		if x[mid] < x[lo] {
			x[mid], x[lo] = x[lo], x[mid]
		}
		if x[hi] < x[lo] {
			x[hi], x[lo] = x[lo], x[hi]
		}
		if x[hi] < x[mid] {
			x[hi], x[mid] = x[mid], x[hi]
		}
		p := x[mid]
		i, j := lo, hi
		for i <= j {
			for x[i] < p {
				i++
			}
			for x[j] > p {
				j--
			}
			if i <= j {
				x[i], x[j] = x[j], x[i]
				i++
				j--
			}
		}
		switch {
		case k <= j:
			hi = j
		case k >= i:
			lo = i
		default:
			return x[k]
		}
	}
	return x[k]
}

// The parts the attribution takes medians of, by index into partFields.
const (
	pkPeak = iota
	pkRes
	pkEl
	pkFres
	pkFel
	pkCstat
	pkFitC
	nPartFields
)

var partFields = [nPartFields]func(p part) float64{partPeak, partRes, partEl, partFres, partFel, partCstat, partFitC}

// sortedParts keeps each part's values over the window's breaths sorted.
// When the window has moved by one breath — one in, at most one out, the
// usual case — it moves each sorted list by that breath instead of
// sorting again.
type sortedParts struct {
	members []part                 // the window's breaths as last updated, oldest first
	sorted  [nPartFields][]float64 // each part's values over members, NaN left out, ascending
}

func (sp *sortedParts) update(parts []part) {
	m := sp.members
	switch {
	case len(parts) == len(m) && sameStarts(parts, m):
	case len(m) > 0 && len(parts) == len(m) && sameStarts(parts[:len(m)-1], m[1:]):
		sp.move(&m[0], false)
		sp.move(&parts[len(parts)-1], true)
	case len(parts) == len(m)+1 && sameStarts(parts[:len(m)], m):
		sp.move(&parts[len(parts)-1], true)
	default:
		for k, get := range partFields {
			x := sp.sorted[k][:0]
			for _, p := range parts {
				if v := get(p); !math.IsNaN(v) {
					x = append(x, v)
				}
			}
			sortSmall(x)
			sp.sorted[k] = x
		}
	}
	sp.members = append(sp.members[:0], parts...)
}

// move inserts p's values into the sorted lists, or removes them.
func (sp *sortedParts) move(p *part, in bool) {
	for k, get := range partFields {
		v := get(*p)
		if math.IsNaN(v) {
			continue
		}
		x := sp.sorted[k]
		if in { // one step of an insertion sort
			x = append(x, v)
			i := len(x) - 1
			for ; i > 0 && x[i-1] > v; i-- {
				x[i] = x[i-1]
			}
			x[i] = v
		} else if i := slices.Index(x, v); i >= 0 {
			x = x[:i+copy(x[i:], x[i+1:])]
		}
		sp.sorted[k] = x
	}
}

// median is the median of part k over the window, and the count.
func (sp *sortedParts) median(k int) (float64, int) {
	x := sp.sorted[k]
	if len(x) == 0 {
		return nan, 0
	}
	return quantile(x, 0.5), len(x)
}

func sameStarts(a, b []part) bool {
	for i := range a {
		if a[i].t != b[i].t {
			return false
		}
	}
	return true
}
