package edfrec

import (
	"context"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"breathd/alerts"
	"breathd/device"
	"breathd/mechanics"
	"breathd/mechanics/lungsim"
	"breathd/stream"
	"breathd/stream/edf"

	"github.com/rs/zerolog"
)

// TestEDFBesideTheRecording: with a Recording as the loop's SampleSink, each raw recording file gets
// an EDF+ file of the same name, rotated with it; read back, the files
// hold every sample (but the first 2 s when the rate is to be measured) at the
// stream's rate, with one annotation per breath and per rule transition.
// Common practice, no source: the files' reader is this project's, which
// TestRoundTrip holds to the format and TestAnalyzeEDF to MNE-Python.
func TestEDFBesideTheRecording(t *testing.T) {
	sc := lungsim.Scenario{Seed: 4, RateHz: 100, Duration: 6 * time.Minute,
		Settings: lungsim.Settings{Mode: lungsim.ModeVC, R: 10, C: 25, PEEP: 5, RR: 15, VT: 450, Ti: 1.2, Pause: 0.3}}
	sc.Defaults()
	src := device.NewSim(sc, device.SimFormat{Header: true}, 0, nil)
	dir := t.TempDir()
	rec, err := device.NewRecorder(src, device.RecordConfig{Dir: dir, Name: "bed3", MaxBytes: 250 << 10}, zerolog.Nop())
	if err != nil {
		t.Fatal(err)
	}
	evs := &countEvents{}
	copyEDF := New(rec, zerolog.Nop())
	st, err := stream.Run(context.Background(), rec, stream.Config{Device: "bed3", Samples: copyEDF, Sink: stream.Sinks{evs, copyEDF}, Rules: alerts.Defaults()})
	copyEDF.Close()
	if err != nil {
		t.Fatal(err)
	}
	raws, _ := filepath.Glob(filepath.Join(dir, "*.txt"))
	if len(raws) < 3 {
		t.Fatalf("%d raw files: the test wants rotation", len(raws))
	}
	samples, breaths, events := 0, 0, 0
	for _, raw := range raws {
		fh, err := os.Open(strings.TrimSuffix(raw, ".txt") + ".edf")
		if err != nil {
			t.Fatalf("no EDF+ beside %s: %v", raw, err)
		}
		f, err := edf.Read(fh)
		fh.Close()
		if err != nil {
			t.Fatal(err)
		}
		if f.Rates[0] != 100 || f.Signals[0].Label != "Paw" || f.Signals[1].Unit != "L/min" {
			t.Errorf("%s: %v Hz, %+v", raw, f.Rates, f.Signals)
		}
		samples += len(f.Samples[0]) // the last record of each file is padded
		for _, a := range f.Annotations {
			if strings.HasPrefix(a.Text, "breath ") {
				breaths++
			} else {
				events++
			}
		}
	}
	// at most the first 2 s missing (a rate to measure), at most a padded
	// second at the end of each file
	if n := int(st.Counts.Samples); samples < n-200 || samples > n+100*len(raws) {
		t.Errorf("%d samples in the %d EDF+ files, the stream had %d", samples, len(raws), n)
	}
	if breaths != int(st.Breaths) || events != evs.n || events == 0 {
		t.Errorf("annotations: %d breaths (%d in the stream), %d events (%d)", breaths, st.Breaths, events, evs.n)
	}
}

// countEvents counts the events it is given.
type countEvents struct{ n int }

func (c *countEvents) Breath(string, *mechanics.Breath, *mechanics.Window) {}
func (c *countEvents) Event(*alerts.Event, []alerts.Active)                { c.n++ }
