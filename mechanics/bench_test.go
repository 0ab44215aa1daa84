package mechanics_test

import (
	"sync"
	"testing"
	"time"

	"breathd/mechanics"
	"breathd/mechanics/lungsim"
)

// benchHour is an hour at 100 Hz of the steady passive adult on volume
// control with a pause, with sensor noise (360 000 samples).
var benchHour = sync.OnceValue(func() []lungsim.SimSample {
	sc := lungsim.Scenario{Seed: 1, RateHz: 100, Duration: time.Hour,
		Settings: lungsim.Settings{Mode: lungsim.ModeVC, R: 10, C: 50, PEEP: 5, RR: 15, VT: 450, Ti: 1.2, Pause: 0.3},
		Sensor:   lungsim.Sensor{PawNoise: 0.2, FlowNoise: 0.5}}
	sim := lungsim.NewSim(sc, nil)
	var out []lungsim.SimSample
	var s lungsim.SimSample
	for sim.Next(&s) {
		out = append(out, s)
	}
	return out
})

// BenchmarkSegmenter is breath detection and every per-breath metric;
// one op is one sample.
func BenchmarkSegmenter(b *testing.B) {
	data := benchHour()
	seg, _ := mechanics.NewSegmenter(mechanics.Config{Sex: "male", HeightCm: 175}, 100)
	b.ReportAllocs()
	b.ResetTimer()
	for i := range b.N {
		s := &data[i%len(data)]
		if i%len(data) == 0 && i > 0 {
			seg.Add(s.T+float64(i/len(data))*3600, s.Paw, s.Flow, true)
			continue
		}
		seg.Add(s.T+float64(i/len(data))*3600, s.Paw, s.Flow, false)
	}
}

// BenchmarkWindow is the window's Add and Trend (with the attribution and
// one field's statistics, as the default rules ask); one op is one breath.
func BenchmarkWindow(b *testing.B) {
	data := benchHour()
	seg, _ := mechanics.NewSegmenter(mechanics.Config{}, 100)
	var breaths []mechanics.Breath
	for _, s := range data {
		if br := seg.Add(s.T, s.Paw, s.Flow, false); br != nil {
			breaths = append(breaths, *br)
		}
	}
	w, _ := mechanics.NewWindow(mechanics.WindowConfig{})
	si := mechanics.FieldIndex("si")
	b.ReportAllocs()
	b.ResetTimer()
	for i := range b.N {
		br := breaths[i%len(breaths)]
		shift := float64(i/len(breaths)) * 3600
		br.TStart += shift
		br.TEnd += shift
		w.Add(&br)
		w.Trend().StatAt(si)
	}
}
