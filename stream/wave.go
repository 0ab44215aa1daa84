package stream

import "breathd/stream/lines"

// WaveHz is the rate of the downsampled waveform the page and the MQTT
// wave topic carry.
const WaveHz = 25

// Downsample averages a stream's samples into 1/WaveHz s bins: a point of
// the waveform for a display, not for analysis. It does not allocate.
type Downsample struct {
	t0, paw, flow float64
	n             int
	prevT         float64
	started       bool
}

// Add takes a sample; when it closes a bin it returns the bin's start time
// and mean pressure and flow, and true.
func (d *Downsample) Add(s *lines.Sample) (t, paw, flow float64, ok bool) {
	dt := 0.0
	if d.started && !s.Gap {
		dt = s.T - d.prevT
	}
	d.prevT, d.started = s.T, true
	if d.n == 0 {
		d.t0, d.paw, d.flow = s.T, 0, 0
	}
	d.paw += s.Paw
	d.flow += s.Flow
	d.n++
	if s.T+dt-d.t0 >= 1.0/WaveHz-1e-9 || s.Gap { // the next sample would start the next bin
		n := float64(d.n)
		d.n = 0
		return d.t0, d.paw / n, d.flow / n, true
	}
	return 0, 0, 0, false
}
