package publish

import (
	"context"
	"flag"
	"os"
	"runtime"
	"sync/atomic"
	"testing"
	"time"

	"breathd/alerts"
	"breathd/device"
	"breathd/mechanics"
	"breathd/mechanics/lungsim"
	"breathd/stream"

	mqtt "github.com/eclipse/paho.mqtt.golang"
	"github.com/rs/zerolog"
	"go.uber.org/goleak"
)

var soakHours = flag.Float64("soak-hours", 2, "simulated hours for TestSoak (24 for the full soak)")

// heapProbe reads the live heap after a GC at chosen stream times, once
// every breath record offered so far has reached the subscriber (or was
// counted as dropped), so that messages in flight are not taken for a
// leak.
type heapProbe struct {
	at      []float64
	heap    []uint64
	next    int
	grtns   []int
	seen    int64              // breaths before this one
	settled func(n int64) bool // every one of n breath records is accounted for
}

func (h *heapProbe) Breath(_ string, b *mechanics.Breath, _ *mechanics.Window) {
	h.seen++
	if h.next < len(h.at) && b.TEnd >= h.at[h.next] {
		for deadline := time.Now().Add(10 * time.Second); !h.settled(h.seen) && time.Now().Before(deadline); {
			time.Sleep(time.Millisecond)
		}
		runtime.GC()
		var ms runtime.MemStats
		runtime.ReadMemStats(&ms)
		h.heap = append(h.heap, ms.HeapAlloc)
		h.grtns = append(h.grtns, runtime.NumGoroutine())
		h.next++
	}
}

// TestSoak replays simulated hours as fast as possible through the whole
// daemon — decoder, detection, rules, publisher, the embedded broker — to
// a subscriber counting messages: the heap at the end is within 10 % of
// the heap after the first hour, goroutines do not grow, and every event
// arrives. -soak-hours 24 runs the full day.
func TestSoak(t *testing.T) {
	ignore := goleak.IgnoreCurrent()
	t.Cleanup(func() { goleak.VerifyNone(t, ignore) }) // after the broker's cleanup
	hours := *soakHours
	if raceEnabled && hours > 2 {
		hours = 2
	}
	b := startTestBroker(t)
	var events, breaths atomic.Int64
	opts := mqtt.NewClientOptions().AddBroker("tcp://" + b.Addr()).SetClientID("soak-sub").SetCleanSession(false).SetOrderMatters(false)
	sub := mqtt.NewClient(opts)
	sub.Connect().Wait()
	sub.Subscribe("breathd/soak/event", 1, func(mqtt.Client, mqtt.Message) { events.Add(1) }).Wait()
	sub.Subscribe("breathd/soak/breath", 0, func(mqtt.Client, mqtt.Message) { breaths.Add(1) }).Wait()
	ctl := &stream.Control{}
	pub, err := New(Config{Dial: publisherDial(b), Device: "soak", StateDir: t.TempDir(), Status: ctl.Status, Log: zerolog.Nop()})
	if err != nil {
		t.Fatal(err)
	}
	// a lung that stiffens and recovers every two hours, so that rules are raised and cleared all along
	sc := lungsim.Scenario{Seed: 21, RateHz: 100, Duration: time.Duration(hours * float64(time.Hour)),
		Settings: lungsim.Settings{Mode: lungsim.ModeVC, R: 10, C: 50, PEEP: 6, RR: 16, VT: 480, Ti: 1.1, Pause: 0.3},
		Sensor:   lungsim.Sensor{PawNoise: 0.2, FlowNoise: 0.5}}
	for h := 0.0; h < hours; h += 2 {
		at := time.Duration(h * float64(time.Hour))
		sc.Timeline = append(sc.Timeline,
			lungsim.Change{At: at + 20*time.Minute, Ramp: 20 * time.Minute, Set: map[string]float64{"c": 26}},
			lungsim.Change{At: at + 70*time.Minute, Ramp: 20 * time.Minute, Set: map[string]float64{"c": 50}})
	}
	sc.Defaults()
	if err := sc.Validate(); err != nil {
		t.Fatal(err)
	}
	probe := &heapProbe{at: []float64{3600, hours*3600 - 10}, settled: func(n int64) bool {
		c := pub.Counters()
		return c.QueueDepth == 0 && breaths.Load()+c.Dropped >= n
	}}
	src := device.NewSim(sc, device.SimFormat{Header: true}, 0, nil)
	st, err := stream.Run(context.Background(), src, stream.Config{Device: "soak", Rules: alerts.Defaults(), Sink: stream.Sinks{pub, probe}, Control: ctl})
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	pub.Close(ctx)
	for deadline := time.Now().Add(10 * time.Second); events.Load() < st.Events && time.Now().Before(deadline); {
		time.Sleep(time.Millisecond)
	}
	sub.Disconnect(50)
	if len(probe.heap) != 2 {
		t.Fatalf("heap probes %v", probe.heap)
	}
	growth := float64(probe.heap[1])/float64(probe.heap[0]) - 1
	t.Logf("%.0f h: %d breaths, %d events published, %d received; %d breath records received (%d dropped by the bounded queue); heap %.1f MB after 1 h, %.1f MB at the end (%+.1f %%); goroutines %d → %d",
		hours, st.Breaths, st.Events, events.Load(), breaths.Load(), pub.Counters().Dropped,
		float64(probe.heap[0])/1e6, float64(probe.heap[1])/1e6, growth*100, probe.grtns[0], probe.grtns[1])
	if events.Load() < st.Events || st.Events < 2 {
		t.Errorf("%d of %d events received", events.Load(), st.Events)
	}
	if growth > 0.10 {
		t.Errorf("heap grew %.1f %%", growth*100)
	}
	if probe.grtns[1] > probe.grtns[0] {
		t.Errorf("goroutines %d → %d", probe.grtns[0], probe.grtns[1])
	}
	if os.Getenv("BREATHD_SOAK_VERBOSE") != "" {
		t.Log(st.String())
	}
}
