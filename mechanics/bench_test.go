package mechanics

import (
	"sync"
	"testing"
	"time"
)

// benchHour is an hour at 100 Hz of the steady passive adult on volume
// control with a pause, with sensor noise (360 000 samples).
var benchHour = sync.OnceValue(func() []SimSample {
	sc := Scenario{Seed: 1, RateHz: 100, Duration: time.Hour,
		Settings: Settings{Mode: ModeVC, R: 10, C: 50, PEEP: 5, RR: 15, VT: 450, Ti: 1.2, Pause: 0.3},
		Sensor:   Sensor{PawNoise: 0.2, FlowNoise: 0.5}}
	sim := NewSim(sc, nil)
	var out []SimSample
	var s SimSample
	for sim.Next(&s) {
		out = append(out, s)
	}
	return out
})

// BenchmarkSegmenter is breath detection and every per-breath metric;
// one op is one sample.
func BenchmarkSegmenter(b *testing.B) {
	data := benchHour()
	seg, _ := NewSegmenter(Config{Sex: "male", HeightCm: 175}, 100)
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
	seg, _ := NewSegmenter(Config{}, 100)
	var breaths []Breath
	for _, s := range data {
		if br := seg.Add(s.T, s.Paw, s.Flow, false); br != nil {
			breaths = append(breaths, *br)
		}
	}
	w, _ := NewWindow(WindowConfig{})
	si := fieldIndex("si")
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
