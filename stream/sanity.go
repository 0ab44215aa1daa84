package stream

import (
	"fmt"
	"math"
	"slices"

	"breathd/mechanics"
	"breathd/stream/lines"
)

// sanity watches a stream for the signs of a format read wrongly — a unit
// or a sign that the file does not say — and names the likely cause and
// the flag that fixes it. The thresholds are plain arithmetic on what a
// ventilated adult's or child's breathing looks like (pressures of some
// cmH2O to tens, flows of tens of L/min, tidal volumes of tens to hundreds
// of mL), not from a source.
type sanity struct {
	n                int64
	pawMin, pawMax   float64
	flowMin, flowMax float64
	// work, the sum of flow × pressure change, is positive when flow into
	// the patient raises the pressure, as it does; absWork the sum of its
	// magnitudes
	prevPaw, work, absWork float64

	breaths, peepOverPeak, negR int
	vti                         [16]float64 // the latest breaths' vti
}

func newSanity() sanity {
	inf := math.Inf(1)
	return sanity{pawMin: inf, pawMax: -inf, flowMin: inf, flowMax: -inf, prevPaw: math.NaN()}
}

// sample takes one sample; it does not allocate.
func (s *sanity) sample(paw, flow float64) {
	s.n++
	s.pawMin, s.pawMax = min(s.pawMin, paw), max(s.pawMax, paw)
	s.flowMin, s.flowMax = min(s.flowMin, flow), max(s.flowMax, flow)
	if w := flow * (paw - s.prevPaw); w == w { // not NaN (the first sample)
		s.work += w
		s.absWork += math.Abs(w)
	}
	s.prevPaw = paw
}

// breath takes one breath.
func (s *sanity) breath(b *mechanics.Breath) {
	s.vti[s.breaths%len(s.vti)] = b.VTi
	s.breaths++
	if b.PEEP > b.PPeak {
		s.peepOverPeak++
	}
	if b.FitR < 0 {
		s.negR++
	}
}

// hint is the likely cause of implausible numbers and its fix, or "".
func (s *sanity) hint(c *lines.Counts) string {
	if c.Samples >= 20 && 2*c.Gaps > c.Samples {
		if step := (c.LastT - c.FirstT) / float64(c.Samples-1); step >= 1 && step <= 100 {
			return fmt.Sprintf("the time steps by %.3g between lines, a gap each time: is t in ms? add --unit t=ms", step)
		}
	}
	if c.FlowOutOfRange > 20 && 10*c.FlowOutOfRange > c.Lines {
		return fmt.Sprintf("the flow is beyond ±%g L/min on %d lines: is flow in mL/s? add --unit flow=mL/s", lines.FlowMax, c.FlowOutOfRange)
	}
	if s.n < 500 {
		return ""
	}
	if s.absWork > 0 && s.work < -0.3*s.absWork {
		return "the pressure falls when the flow is positive and rises when it is negative: is the flow's sign reversed (positive out of the patient)? add --flow-sign -1"
	}
	flowSwing, pawSwing := s.flowMax-s.flowMin, s.pawMax-s.pawMin
	switch {
	case flowSwing < 6 && pawSwing > 3:
		return fmt.Sprintf("the flow never passes %.2g while the pressure swings by %.3g: is flow in L/s? add --unit flow=L/s",
			max(math.Abs(s.flowMin), math.Abs(s.flowMax)), pawSwing)
	case s.pawMax < 6 && pawSwing > 0.3 && flowSwing > 20:
		return fmt.Sprintf("the pressure never passes %.2g while the flow swings by %.0f: is pressure in kPa? add --unit paw=kPa",
			s.pawMax, flowSwing)
	}
	if s.breaths < 5 {
		return ""
	}
	if 2*s.peepOverPeak > s.breaths || 2*s.negR > s.breaths {
		return fmt.Sprintf("PEEP above the peak pressure on %d and a negative resistance on %d of %d breaths: is the flow's sign reversed? add --flow-sign -1",
			s.peepOverPeak, s.negR, s.breaths)
	}
	v := s.vti // a copy: no allocation
	k := min(s.breaths, len(v))
	slices.Sort(v[:k])
	if med := v[k/2]; med > 4000 {
		return fmt.Sprintf("the tidal volumes are about %.0f mL: is flow in mL/s? add --unit flow=mL/s", med)
	}
	return ""
}
