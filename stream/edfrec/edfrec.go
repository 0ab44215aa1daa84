// Package edfrec keeps an EDF+ copy of a device's decoded samples beside
// its raw recording: a sink of the device loop, given every sample.
package edfrec

import (
	"math"
	"strings"
	"sync"

	"breathd/alerts"
	"breathd/mechanics"
	"breathd/stream"
	"breathd/stream/edf"
	"breathd/stream/lines"

	"github.com/rs/zerolog"
)

// RawFile is a source that records its bytes (device.Recorder): the path
// of the file being written.
type RawFile interface{ File() string }

// The live copy's signals: airway pressure and flow as decoded. (The
// volume since each breath's start, which Export adds, needs the breath's
// start before its samples are written.)
var liveSignals = []edf.Signal{Paw, Flow}

// Recording writes the decoded samples beside the raw recording as EDF+, a
// file per raw file (name.txt → name.edf), with an annotation at each
// breath start and rule transition. It starts once the rate is known
// (configured, or measured over the first 2 s of samples). It is a
// stream.SampleSink and an EventSink; Close ends its file.
type Recording struct {
	mu   sync.Mutex // events may come from the ticker's or an acknowledgement's goroutine
	raw  RawFile
	log  zerolog.Logger
	path string // the raw file the open EDF+ belongs to
	w    *edf.Writer
	t0   float64 // stream time of its first sample
	bad  bool    // the file could not be made: not tried again until the raw file changes
}

// New makes the EDF+ copy of the recording raw.
func New(raw RawFile, log zerolog.Logger) *Recording { return &Recording{raw: raw, log: log} }

// Sample writes one sample, opening or rotating the file with the raw one.
func (e *Recording) Sample(s *lines.Sample, l stream.Timing) {
	e.mu.Lock()
	defer e.mu.Unlock()
	if p := e.raw.File(); p != e.path {
		e.closeLocked()
		e.path, e.bad = p, false
	}
	if e.w == nil {
		if e.bad || e.path == "" || !e.open(l, s) {
			return
		}
	}
	if err := e.w.Add(s.Paw, s.Flow); err != nil {
		e.fail(err)
	}
}

func (e *Recording) open(l stream.Timing, s *lines.Sample) bool {
	rate := l.RateHz()
	if rate <= 0 {
		return false // not yet measured
	}
	r := int(math.Round(rate))
	if r <= 0 || math.Abs(rate-float64(r)) > 0.01*rate {
		e.log.Warn().Float64("rate_hz", rate).Msg("EDF+ recording needs a whole number of samples per second; not written")
		e.bad = true
		return false
	}
	start := l.WallAt(s.T)
	if start.IsZero() {
		start = edf.UnknownStart
	}
	name := strings.TrimSuffix(e.path, ".txt") + ".edf"
	w, err := edf.CreateLive(name, start, "X X X X", "X X breathd", liveSignals, r, 96)
	if err != nil {
		e.fail(err)
		return false
	}
	e.w, e.t0 = w, s.T
	e.log.Info().Str("file", name).Int("rate_hz", r).Msg("recording EDF+")
	return true
}

func (e *Recording) fail(err error) {
	e.log.Error().Err(err).Msg("EDF+ recording failed; the raw recording goes on")
	if e.w != nil {
		e.w.Close()
		e.w = nil
	}
	e.bad = true
}

// Close ends the open file.
func (e *Recording) Close() {
	e.mu.Lock()
	defer e.mu.Unlock()
	e.closeLocked()
}

func (e *Recording) closeLocked() {
	if e.w != nil {
		if err := e.w.Close(); err != nil {
			e.log.Error().Err(err).Msg("EDF+ recording: closing")
		}
		e.w = nil
	}
}

// Breath notes the breath's start.
func (e *Recording) Breath(_ string, b *mechanics.Breath, _ *mechanics.Window) {
	e.mu.Lock()
	defer e.mu.Unlock()
	if e.w != nil {
		e.w.Annotate(edf.Annotation{Onset: b.TStart - e.t0, Text: breathNote(b)})
	}
}

// Event notes a rule transition.
func (e *Recording) Event(ev *alerts.Event, _ []alerts.Active) {
	e.mu.Lock()
	defer e.mu.Unlock()
	if e.w != nil {
		e.w.Annotate(edf.Annotation{Onset: ev.T - e.t0, Text: eventNote(ev)})
	}
}
