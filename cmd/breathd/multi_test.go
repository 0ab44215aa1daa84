package main

import (
	"encoding/json"
	"fmt"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"breathd/device"
	"breathd/mechanics/lungsim"

	"github.com/creack/pty"
	mqtt "github.com/eclipse/paho.mqtt.golang"
)

// ventilatorOnPty writes a simulated stream, ten times faster than real
// time, into a new pty and returns its slave path and master.
func ventilatorOnPty(t *testing.T, garbage bool) (string, *os.File) {
	t.Helper()
	master, slave, err := pty.Open()
	if err != nil {
		t.Skipf("no pseudo-terminal: %v", err)
	}
	name := slave.Name()
	slave.Close()
	sc := lungsim.Scenario{Seed: 5, RateHz: 100, Duration: time.Hour,
		Settings: lungsim.Settings{Mode: lungsim.ModeVC, R: 10, C: 50, PEEP: 5, RR: 15, VT: 450, Ti: 1.2, Pause: 0.3}}
	sc.Defaults()
	src := device.NewSim(sc, device.SimFormat{Header: true}, 10, nil)
	go func() {
		buf := make([]byte, 4096)
		rng := rand.New(rand.NewPCG(1, 2))
		for {
			n, err := src.Read(buf)
			if err != nil {
				return
			}
			if _, err := master.Write(buf[:n]); err != nil {
				return
			}
			if garbage && rng.IntN(20) == 0 {
				junk := make([]byte, 200)
				for i := range junk {
					junk[i] = byte(rng.IntN(256))
				}
				master.Write(append(junk, '\n'))
			}
		}
	}()
	t.Cleanup(func() { src.Close(); master.Close() })
	return name, master
}

// TestThreeDevicesOneFails: run with a simulated device and two
// pty-backed serial devices; one pty is unplugged, the other gets bursts
// of binary garbage; the simulated device keeps publishing every breath.
func TestThreeDevicesOneFails(t *testing.T) {
	t.Parallel() // a process of its own, on its own ports and files
	unplug, master := ventilatorOnPty(t, false)
	noisy, _ := ventilatorOnPty(t, true)
	port := freePort(t)
	dir := t.TempDir()
	scen := filepath.Join(dir, "steady.yaml")
	os.WriteFile(scen, []byte("settings: {mode: vc, r: 10, c: 50, peep: 5, rr: 15, vt: 450, ti: 1.2, pause: 0.3}\nsensor: {paw_noise: 0.2, flow_noise: 0.5}\nduration: 2h\n"), 0o600)
	cfg := filepath.Join(dir, "three.yaml")
	os.WriteFile(cfg, []byte(fmt.Sprintf(`report_every: 1s
embedded_broker: {listen: "127.0.0.1:%d"}
devices:
  - id: steady
    simulate: {scenario: %s, speed: 10}
  - id: unplugged
    serial: {path: %s}
  - id: noisy
    serial: {path: %s}
`, port, scen, unplug, noisy)), 0o600)
	run := breathd("run", "--config", cfg)
	out := &syncBuffer{}
	run.Stdout, run.Stderr = out, out
	if err := run.Start(); err != nil {
		t.Fatal(err)
	}
	defer func() { run.Process.Signal(syscall.SIGTERM); run.Wait() }()
	// every device is open and the broker listens before the broker's line
	waitFor(t, "the embedded broker", 10*time.Second, func() bool { return strings.Contains(out.String(), "embedded MQTT broker started") })
	c := collectBreaths(t, fmt.Sprintf("mqtt://127.0.0.1:%d", port))
	waitFor(t, "breaths from every device", 15*time.Second, func() bool {
		return len(c.seqs("steady")) >= 3 && len(c.seqs("noisy")) >= 2 && len(c.seqs("unplugged")) >= 2
	})
	before := len(c.seqs("steady"))
	master.Close() // unplug
	waitFor(t, "the loss reported and 10 more breaths", 20*time.Second, func() bool {
		return strings.Contains(out.String(), "serial port lost") && len(c.seqs("steady")) >= before+10 && len(c.seqs("noisy")) >= 6
	})

	steady := c.seqs("steady")
	if len(steady) < 12 {
		t.Fatalf("steady device published %d breaths; output:\n%s", len(steady), out.String())
	}
	for i := 1; i < len(steady); i++ {
		if steady[i] != steady[i-1]+1 {
			t.Errorf("steady device: breath %d after %d", steady[i], steady[i-1])
		}
	}
	if g := c.gapFlags("steady"); g != 0 {
		t.Errorf("steady device: %d breaths flagged gap", g)
	}
	if n := len(c.seqs("noisy")); n < 6 {
		t.Errorf("noisy device published only %d breaths", n)
	}
	text := out.String()
	if !strings.Contains(text, "serial port lost") || !strings.Contains(text, "noisy  samples") || !strings.Contains(text, "bad ") {
		t.Errorf("output lacks the loss or the counters:\n%s", tail([]byte(text)))
	}
	t.Logf("steady %d breaths in order, noisy %d, unplugged %d", len(steady), len(c.seqs("noisy")), len(c.seqs("unplugged")))
}

// syncBuffer is a buffer a process writes to while the test reads it.
type syncBuffer struct {
	mu  sync.Mutex
	buf strings.Builder
}

func (s *syncBuffer) Write(p []byte) (int, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.buf.Write(p)
}

func (s *syncBuffer) String() string {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.buf.String()
}

// breathLog records every breath record's seq and gap flags by device.
type breathLog struct {
	mu   sync.Mutex
	seq  map[string][]int
	gaps map[string]int
}

// collectBreaths subscribes to every device's breath records.
func collectBreaths(t *testing.T, url string) *breathLog {
	t.Helper()
	bl := &breathLog{seq: map[string][]int{}, gaps: map[string]int{}}
	opts := mqtt.NewClientOptions().AddBroker(strings.Replace(url, "mqtt://", "tcp://", 1)).SetClientID("multi-collector").
		SetOrderMatters(true)
	cl := mqtt.NewClient(opts)
	if tok := cl.Connect(); !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		t.Fatalf("connect: %v", tok.Error())
	}
	t.Cleanup(func() { cl.Disconnect(50) })
	tok := cl.Subscribe("breathd/+/breath", 0, func(_ mqtt.Client, m mqtt.Message) {
		parts := strings.Split(m.Topic(), "/")
		bl.add(parts[1], m.Payload())
	})
	if !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		t.Fatalf("subscribe: %v", tok.Error())
	}
	return bl
}

func (b *breathLog) add(dev string, payload []byte) {
	var p struct {
		Seq   int
		Flags []string
	}
	json.Unmarshal(payload, &p)
	b.mu.Lock()
	defer b.mu.Unlock()
	b.seq[dev] = append(b.seq[dev], p.Seq)
	for _, f := range p.Flags {
		if f == "gap" {
			b.gaps[dev]++
		}
	}
}

func (b *breathLog) seqs(dev string) []int {
	b.mu.Lock()
	defer b.mu.Unlock()
	return append([]int(nil), b.seq[dev]...)
}

func (b *breathLog) gapFlags(dev string) int {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.gaps[dev]
}
