package edfrec

import (
	"errors"
	"fmt"
	"math"
	"time"

	"breathd/alerts"
	"breathd/mechanics"
	"breathd/stream"
	"breathd/stream/edf"
	"breathd/stream/lines"
)

// The signals breathd writes: physical ranges whose 16-bit steps
// (range/65535) stay well below the sensors' noise (about 0.2 cmH2O and
// 0.5 L/min): 0.003 cmH2O, 0.018 L/min, 0.09 mL.
var (
	Paw    = edf.Signal{Label: "Paw", Unit: "cmH2O", Min: -30, Max: 150, Prefilter: "as the ventilator sent it"}
	Flow   = edf.Signal{Label: "Flow", Unit: "L/min", Min: -600, Max: 600, Prefilter: "as the ventilator sent it; into the patient > 0"}
	Volume = edf.Signal{Label: "Volume", Unit: "mL", Min: -2000, Max: 4000, Prefilter: "flow integrated from each breath's start"}
)

// Text of the annotations: a breath's start and a rule's transition.
func breathNote(b *mechanics.Breath) string { return fmt.Sprintf("breath %d", b.Seq) }
func eventNote(e *alerts.Event) string      { return e.Rule + " " + string(e.Transition) }

// Export decodes the recording at path again and writes its samples to out
// as EDF+: airway pressure, flow and the volume since each breath's start
// at the measured rate, with an annotation at each breath start and each
// rule transition (analyze --edf).
func Export(out, path string, f lines.Format, rateHz float64, breaths []mechanics.Breath, events []alerts.Event) error {
	rate := int(math.Round(rateHz))
	if rate <= 0 {
		return errors.New("no sample rate: nothing was decoded")
	}
	var w *edf.Writer
	var werr error // the file's, which ends the pass
	err := stream.Reread(path, f, breaths, func(s *lines.Sample, v float64) bool {
		if w == nil { // the first sample: time zero of the file
			t0 := s.T
			start := edf.UnknownStart
			for _, b := range breaths {
				if !b.At.IsZero() {
					start = b.At.Add(-time.Duration((b.TStart - t0) * float64(time.Second)))
					break
				}
			}
			anns := make([]edf.Annotation, 0, len(breaths)+len(events))
			for i := range breaths {
				anns = append(anns, edf.Annotation{Onset: breaths[i].TStart - t0, Text: breathNote(&breaths[i])})
			}
			for i := range events {
				anns = append(anns, edf.Annotation{Onset: events[i].T - t0, Text: eventNote(&events[i])})
			}
			if w, werr = edf.Create(out, start, "X X X X", "X X breathd", []edf.Signal{Paw, Flow, Volume}, rate, anns); werr != nil {
				w = nil
				return false
			}
		}
		werr = w.Add(s.Paw, s.Flow, v)
		return werr == nil
	})
	if w == nil {
		return errors.Join(err, werr, errors.New("no EDF+ file written"))
	}
	return errors.Join(err, werr, w.Close())
}
