package stream

import (
	"errors"
	"io"
	"math"

	"breathd/device"
	"breathd/mechanics"
	"breathd/stream/lines"
)

// FlowVolume is the volume a flow carries between two samples, by the
// trapezoid rule: flows in L/min, dt in s, the volume in mL.
func FlowVolume(f0, f1, dt float64) float64 { return (f0 + f1) / 2 / 60 * dt * 1000 }

// Reread decodes the recording at path a second time, once its breaths are
// known (analyze's picture and EDF+ export), and calls fn with each good
// sample and the volume since its breath's start (not integrated across a
// gap), until fn returns false or the recording ends.
func Reread(path string, f lines.Format, breaths []mechanics.Breath, fn func(s *lines.Sample, vol float64) bool) error {
	src, err := device.OpenFile(path, 0)
	if err != nil {
		return err
	}
	defer src.Close()
	dec, err := lines.NewDecoder(src, f)
	if err != nil {
		return err
	}
	var s lines.Sample
	v, prevT, prevF := 0.0, math.NaN(), 0.0
	bi := 0
	for {
		err := dec.Decode(&s)
		if errors.Is(err, io.EOF) {
			return nil
		}
		var le *lines.LineError
		if errors.As(err, &le) {
			continue
		}
		if err != nil {
			return err
		}
		for bi < len(breaths) && breaths[bi].TStart <= s.T {
			if math.Abs(breaths[bi].TStart-s.T) < 1e-9 {
				v = 0
			}
			bi++
		}
		if !math.IsNaN(prevT) && !s.Gap {
			v += FlowVolume(prevF, s.Flow, s.T-prevT)
		}
		prevT, prevF = s.T, s.Flow
		if !fn(&s, v) {
			return nil
		}
	}
}
