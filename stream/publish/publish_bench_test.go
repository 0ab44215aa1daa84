package publish

import (
	"context"
	"encoding/json"
	"slices"
	"sync"
	"testing"
	"time"

	"breathd/mechanics"

	mqtt "github.com/eclipse/paho.mqtt.golang"
	"github.com/rs/zerolog"
)

// BenchmarkPublishLatency: from handing a finished breath to the
// publisher to its record arriving at a subscriber, through the embedded
// broker on loopback, one breath at a time; p50 and p99 in µs.
func BenchmarkPublishLatency(b *testing.B) {
	br := startTestBroker(b)
	arrived := make(chan int64, 1)
	opts := mqtt.NewClientOptions().AddBroker("tcp://" + br.Addr()).SetClientID("lat-sub").SetOrderMatters(false)
	sub := mqtt.NewClient(opts)
	sub.Connect().Wait()
	sub.Subscribe("breathd/lat/breath", 0, func(_ mqtt.Client, m mqtt.Message) {
		var p struct{ Seq int64 }
		json.Unmarshal(m.Payload(), &p)
		arrived <- p.Seq
	}).Wait()
	defer sub.Disconnect(50)
	pub, err := New(Config{Dial: publisherDial(br), Device: "lat", Log: zerolog.Nop()})
	if err != nil {
		b.Fatal(err)
	}
	defer pub.Close(context.Background())
	w, _ := mechanics.NewWindow(mechanics.WindowConfig{})
	br0 := mechanics.Breath{TEnd: 4, VTi: 450, PPeak: 25, PPlat: 20, PEEP: 5}
	w.Add(&br0)
	lat := make([]float64, 0, b.N)
	b.ResetTimer()
	for i := range b.N {
		br0.Seq = int64(i + 1)
		t0 := time.Now()
		pub.Breath("lat", &br0, w)
		for seq := range arrived {
			if seq == br0.Seq {
				break
			}
		}
		lat = append(lat, float64(time.Since(t0).Microseconds()))
	}
	b.StopTimer()
	slices.Sort(lat)
	b.ReportMetric(lat[len(lat)/2], "p50-µs")
	b.ReportMetric(lat[len(lat)*99/100], "p99-µs")
}

// BenchmarkPublishThroughput: breath records (with their trends) per
// second through the publisher and the embedded broker to a subscriber.
func BenchmarkPublishThroughput(b *testing.B) {
	br := startTestBroker(b)
	var mu sync.Mutex
	got := 0
	done := make(chan struct{})
	want := b.N
	opts := mqtt.NewClientOptions().AddBroker("tcp://" + br.Addr()).SetClientID("tp-sub").SetOrderMatters(false)
	sub := mqtt.NewClient(opts)
	sub.Connect().Wait()
	sub.Subscribe("breathd/tp/breath", 0, func(mqtt.Client, mqtt.Message) {
		mu.Lock()
		got++
		if got == want {
			close(done)
		}
		mu.Unlock()
	}).Wait()
	defer sub.Disconnect(50)
	pub, _ := New(Config{Dial: publisherDial(br), Device: "tp", Log: zerolog.Nop()})
	defer pub.Close(context.Background())
	w, _ := mechanics.NewWindow(mechanics.WindowConfig{})
	br0 := mechanics.Breath{TEnd: 4, VTi: 450, PPeak: 25, PPlat: 20, PEEP: 5}
	w.Add(&br0)
	b.ResetTimer()
	for i := range b.N {
		br0.Seq = int64(i + 1)
		for len(pub.q0) > breathQueue-8 {
			time.Sleep(50 * time.Microsecond) // keep within the bounded queue: none dropped
		}
		pub.Breath("tp", &br0, w)
	}
	select {
	case <-done:
	case <-time.After(30 * time.Second):
		mu.Lock()
		b.Fatalf("%d of %d arrived (dropped %d)", got, want, pub.Counters().Dropped)
	}
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "breaths/s")
}
