package main

import (
	"errors"
	"fmt"
	"io"
	"math"
	"time"

	"breathd/alerts"
	"breathd/device"
	"breathd/mechanics"
	"breathd/stream/edf"
	"breathd/stream/lines"
)

// The EDF+ signals: physical ranges whose 16-bit steps (range/65535) stay
// well below the sensors' noise (about 0.2 cmH2O and 0.5 L/min): 0.003
// cmH2O, 0.018 L/min, 0.09 mL.
var edfSignals = []edf.Signal{
	{Label: "Paw", Unit: "cmH2O", Min: -30, Max: 150, Prefilter: "as the ventilator sent it"},
	{Label: "Flow", Unit: "L/min", Min: -600, Max: 600, Prefilter: "as the ventilator sent it; into the patient > 0"},
	{Label: "Volume", Unit: "mL", Min: -2000, Max: 4000, Prefilter: "flow integrated from each breath's start"},
}

// writeEDF decodes the recording at path again and writes its samples to
// out as EDF+: airway pressure, flow and the volume since each breath's
// start at the measured rate, with an annotation at each breath start
// ("breath <seq>") and each rule transition ("<rule> <transition>").
func writeEDF(out, path string, f lines.Format, rateHz float64, breaths []mechanics.Breath, events []alerts.Event) error {
	rate := int(math.Round(rateHz))
	if rate <= 0 {
		return errors.New("no sample rate: nothing was decoded")
	}
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
	first := true
	var t0 float64
	var w *edf.Writer
	bi, v, prevT, prevF := 0, 0.0, math.NaN(), 0.0
	for {
		err := dec.Decode(&s)
		if errors.Is(err, io.EOF) {
			break
		}
		var le *lines.LineError
		if errors.As(err, &le) {
			continue
		}
		if err != nil {
			return err
		}
		if first {
			first, t0 = false, s.T
			start := edf.UnknownStart
			for _, b := range breaths {
				if !b.At.IsZero() {
					start = b.At.Add(-time.Duration((b.TStart - t0) * float64(time.Second)))
					break
				}
			}
			anns := make([]edf.Annotation, 0, len(breaths)+len(events))
			for _, b := range breaths {
				anns = append(anns, edf.Annotation{Onset: b.TStart - t0, Text: fmt.Sprintf("breath %d", b.Seq)})
			}
			for _, e := range events {
				anns = append(anns, edf.Annotation{Onset: e.T - t0, Text: e.Rule + " " + string(e.Transition)})
			}
			w, err = edf.Create(out, start, "X X X X", "X X breathd", edfSignals, rate, anns)
			if err != nil {
				return err
			}
		}
		for bi < len(breaths) && breaths[bi].TStart <= s.T {
			if math.Abs(breaths[bi].TStart-s.T) < 1e-9 {
				v = 0
			}
			bi++
		}
		if !math.IsNaN(prevT) && !s.Gap {
			v += (prevF + s.Flow) / 2 / 60 * (s.T - prevT) * 1000
		}
		prevT, prevF = s.T, s.Flow
		if err := w.Add(s.Paw, s.Flow, v); err != nil {
			w.Close()
			return err
		}
	}
	if w == nil {
		return errors.New("no sample decoded")
	}
	return w.Close()
}
