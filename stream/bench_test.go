package stream

import (
	"bytes"
	"context"
	"io"
	"runtime"
	"sync"
	"testing"
	"time"

	"breathd/alerts"
	"breathd/device"
	"breathd/mechanics"
	"breathd/mechanics/lungsim"
)

// simDay is 24 h at 100 Hz of the steady passive adult from the lung
// simulator, as printed lines (8.64 M samples, about 175 MB).
var simDay = sync.OnceValue(func() []byte {
	sc := lungsim.Scenario{Seed: 1, RateHz: 100, Duration: 24 * time.Hour,
		Settings: lungsim.Settings{Mode: lungsim.ModeVC, R: 10, C: 50, PEEP: 5, RR: 15, VT: 450, Ti: 1.2, Pause: 0.3},
		Sensor:   lungsim.Sensor{PawNoise: 0.2, FlowNoise: 0.5}}
	sc.Defaults()
	src := device.NewSim(sc, device.SimFormat{Header: true}, 0, nil)
	var buf bytes.Buffer
	buf.Grow(180 << 20)
	io.Copy(&buf, src)
	return buf.Bytes()
})

type countBreaths struct {
	n     int
	trend bool // compute the window's trend after each breath, as a sink that shows it does
}

func (c *countBreaths) Breath(_ string, _ *mechanics.Breath, w *mechanics.Window) {
	c.n++
	if c.trend {
		w.Trend()
	}
}

// BenchmarkAnalyze runs the per-device loop over the day-long stream:
// decode, breath detection, every metric, and the rolling window with its
// trend (slopes, attribution) after every breath; one op is the whole day.
// allocs/sample is the allocation per sample.
func BenchmarkAnalyze(b *testing.B) {
	benchAnalyze(b, nil)
}

// BenchmarkAnalyzeRules is BenchmarkAnalyze with the default rules
// evaluated on every breath and every second, as run and analyze do.
func BenchmarkAnalyzeRules(b *testing.B) {
	benchAnalyze(b, alerts.Defaults())
}

func benchAnalyze(b *testing.B, rules []alerts.Rule) {
	data := simDay()
	var samples int64
	var ms0, ms1 runtime.MemStats
	runtime.ReadMemStats(&ms0)
	b.SetBytes(int64(len(data)))
	b.ResetTimer()
	for range b.N {
		sink := &countBreaths{trend: true}
		st, err := Run(context.Background(), io.NopCloser(bytes.NewReader(data)), Config{Device: "bench", Sink: sink, Rules: rules})
		if err != nil || sink.n < 21000 {
			b.Fatalf("%v, %d breaths", err, sink.n)
		}
		samples += st.Counts.Samples
	}
	b.StopTimer()
	runtime.ReadMemStats(&ms1)
	b.ReportMetric(float64(samples)/b.Elapsed().Seconds(), "samples/s")
	b.ReportMetric(float64(ms1.Mallocs-ms0.Mallocs)/float64(samples), "allocs/sample")
}
