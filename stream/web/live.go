package web

import (
	"fmt"
	"math"
	"strings"
	"sync"
	"time"

	"breathd/alerts"
	"breathd/mechanics"
	"breathd/stream"
	"breathd/stream/lines"
	"breathd/stream/payload"
)

// The page's data, per device, in bounded rings allocated once.
const (
	waveHz      = stream.WaveHz // the strip's points per second
	waveKeep    = 60 * waveHz   // a minute of them
	breathsKeep = 24 * 60 * 40  // 24 h at up to 40 breaths a minute
	eventsKeep  = 256           // the latest rule transitions
	noWave      = math.MaxInt64 // a cursor before any point
)

// wavePoint is one point of the strip: stream time, airway pressure
// (cmH2O), flow (L/min) and volume since the breath's start (mL).
type wavePoint [4]float64

// trendRow is what the page's trends need of a breath: stream time,
// wall-clock (Unix ms, 0 unknown), then trendFields (NaN: null or
// disowned by a flag).
type trendRow [2 + len(trendFields)]float64

// trendFields are the per-breath fields the page's trends offer.
// asynchrony_index is not a breath's but the window's after it.
var trendFields = [...]string{"rr", "vti", "ppeak", "pplat", "peep", "peepi", "dp", "cstat", "fit_c", "fit_r", "mp", "vt_pbw", "asynchrony_index"}

// Live keeps what the page shows of one device: the waveform at 25 Hz, the
// last 24 h of breaths, the latest breath, the rise attribution, the
// asynchrony index, the rule
// transitions and the raised rules. It is the device loop's sample,
// breath and event sink; the page's streams read it under its lock.
type Live struct {
	mu sync.Mutex

	// the strip
	wave          [waveKeep]wavePoint
	waveN         int64 // points ever made
	bins          stream.Downsample
	vol, prevT    float64
	prevFlow      float64
	lastSampleAt  time.Time
	sinceSampleAt int // samples since lastSampleAt was taken

	breaths    []trendRow // ring
	breathsN   int64
	lastBreath []byte // its payload
	rise       string // why the pressure rose, in words
	asynchrony string // the asynchrony index, in words
	events     [eventsKeep]alerts.Event
	eventsN    int64
	active     []alerts.Active
	activeSeq  int64
}

// NewLive makes a device's live state.
func NewLive() *Live {
	return &Live{breaths: make([]trendRow, breathsKeep), prevT: math.NaN()}
}

// Sample takes one decoded sample (stream.SampleSink): 40 ms means of
// pressure and flow (stream.Downsample), the volume integrated at the full
// rate. It does not
// allocate.
func (l *Live) Sample(s *lines.Sample, _ stream.Timing) {
	l.mu.Lock()
	defer l.mu.Unlock()
	dt := 0.0
	if !math.IsNaN(l.prevT) && !s.Gap {
		dt = s.T - l.prevT
		l.vol += stream.FlowVolume(l.prevFlow, s.Flow, dt)
	}
	l.prevT, l.prevFlow = s.T, s.Flow
	if t, paw, flow, ok := l.bins.Add(s); ok {
		l.wave[l.waveN%waveKeep] = wavePoint{t, paw, flow, l.vol}
		l.waveN++
	}
	if l.sinceSampleAt++; l.sinceSampleAt >= 16 { // the clock is read now and then, not per sample
		l.lastSampleAt, l.sinceSampleAt = time.Now(), 0
	}
}

// Breath takes a breath: its row for the trends, its payload for the
// values, the volume of the strip counted again from its start, and the
// rise attribution of the window after it.
func (l *Live) Breath(dev string, b *mechanics.Breath, w *mechanics.Window) {
	// the values no flag disowns: what the trends show
	var vals [mechanics.NumFields]float64
	v := b.TrustedValues(vals[:0])
	row := trendRow{b.TStart, 0}
	for i, name := range trendFields {
		if k := mechanics.FieldIndex(name); k >= 0 {
			row[i+2] = v[k]
		}
	}
	row[len(row)-1] = math.NaN()
	if !b.At.IsZero() {
		row[1] = float64(b.At.UnixMilli())
	}
	rise, asy := "", ""
	if w != nil {
		tr := w.Trend()
		if r := tr.Rise; r.Cause != mechanics.RiseNone {
			rise = fmt.Sprintf("peak pressure up %.1f cmH2O against the 30 min before: %s (resistive part %+.1f, elastic part %+.1f cmH2O, by %s)",
				r.PeakRise, r.Cause, r.ResistiveRise, r.ElasticRise, r.Method)
		}
		row[len(row)-1] = tr.Asynchrony.Index()
		asy = asynchronyText(tr)
	}
	p := payload.Breath(dev, "", b)
	l.mu.Lock()
	defer l.mu.Unlock()
	l.breaths[l.breathsN%breathsKeep] = row
	l.breathsN++
	l.lastBreath, l.rise, l.asynchrony = p, rise, asy
	// the strip's volume: from this breath's start, which the breath's
	// detection comes after
	first := l.waveN
	for first > max(0, l.waveN-waveKeep) && l.wave[(first-1)%waveKeep][0] >= b.TStart {
		first--
	}
	if first < l.waveN {
		v0 := l.wave[first%waveKeep][3]
		for k := first; k < l.waveN; k++ {
			l.wave[k%waveKeep][3] -= v0
		}
		l.vol -= v0
	}
}

// Event takes a rule transition and the raised rules after it.
func (l *Live) Event(ev *alerts.Event, active []alerts.Active) {
	l.mu.Lock()
	defer l.mu.Unlock()
	l.events[l.eventsN%eventsKeep] = *ev
	l.eventsN++
	l.active = append(l.active[:0], active...)
	l.activeSeq++
}

// asynchronyText is the window's asynchrony index and counts, and the
// last complete 10-minute period's index, in words.
func asynchronyText(tr *mechanics.Trend) string {
	a := &tr.Asynchrony
	idx := a.Index()
	if math.IsNaN(idx) {
		return ""
	}
	var b strings.Builder
	fmt.Fprintf(&b, "%.1f %% over the last %d breaths", idx, a.Cycles)
	sep := " ("
	for i, n := range a.Counts {
		if n > 0 {
			fmt.Fprintf(&b, "%s%s %d", sep, strings.ReplaceAll(mechanics.AsynchronyWord(i), "_", " "), n)
			sep = ", "
		}
	}
	if sep == ", " {
		b.WriteString(")")
	}
	if p := tr.Period.Index(); tr.HasPeriod && !math.IsNaN(p) {
		fmt.Fprintf(&b, "; %.1f %% in the 10 minutes to %.0f s", p, tr.Period.End)
	}
	return b.String()
}
