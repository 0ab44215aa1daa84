package main

import (
	"bytes"
	"compress/gzip"
	"encoding/csv"
	"encoding/json"
	"io"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	mqtt "github.com/eclipse/paho.mqtt.golang"
)

// clockBase is the wall-clock time the test recording's clock directive
// gives its first sample.
var clockBase = time.Date(2026, 3, 1, 10, 0, 0, 0, time.UTC)

// demoWithClock writes the demo recording with a clock directive before
// its first sample.
func demoWithClock(t *testing.T) string {
	t.Helper()
	f, err := os.Open(filepath.Join(root, "testdata", "demo.txt.gz"))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	z, err := gzip.NewReader(f)
	if err != nil {
		t.Fatal(err)
	}
	text, _ := io.ReadAll(z)
	head, rest, _ := bytes.Cut(text, []byte("t,paw,flow\n"))
	var out bytes.Buffer
	out.Write(head)
	out.WriteString("t,paw,flow\n# breathd clock " + clockBase.Format(time.RFC3339Nano) + "\n")
	out.Write(rest)
	path := filepath.Join(t.TempDir(), "clocked.txt")
	os.WriteFile(path, out.Bytes(), 0o600)
	return path
}

// TestOneTimeBase: with a clock directive every breath's at (CSV and
// JSON) is the clock's time of its start and every event's the clock's
// time of its transition; without one analyze writes no at (never the
// time of the analysis). The arithmetic is the directive's definition
// (the wall-clock time of the next sample), no other source.
func TestOneTimeBase(t *testing.T) {
	path := demoWithClock(t)
	dir := t.TempDir()
	csvPath, evPath := filepath.Join(dir, "b.csv"), filepath.Join(dir, "e.jsonl")
	if code, _, errs := runCLI(t, "analyze", "--csv", csvPath, "--events", evPath, path); code != 0 {
		t.Fatal(errs)
	}
	near := func(what string, at string, want time.Time) {
		got, err := time.Parse(time.RFC3339Nano, at)
		if err != nil || math.Abs(got.Sub(want).Seconds()) > 0.001 {
			t.Errorf("%s: at %q, want %s", what, at, want.Format(time.RFC3339Nano))
		}
	}
	rows := readCSV(t, csvPath)
	if len(rows) < 300 {
		t.Fatalf("%d breaths", len(rows))
	}
	for _, r := range rows {
		ts, _ := strconv.ParseFloat(r["t_start"], 64)
		near("breath "+r["seq"], r["at"], clockBase.Add(time.Duration(ts*float64(time.Second))))
	}
	events := readEvents(t, evPath)
	if len(events) < 5 {
		t.Fatalf("%d events", len(events))
	}
	for _, e := range events {
		at, _ := e["at"].(string)
		near("event "+e["id"].(string), at, clockBase.Add(time.Duration(e["t"].(float64)*float64(time.Second))))
	}

	// the same recording without its clock
	if code, _, errs := runCLI(t, "analyze", "--csv", csvPath, "--events", evPath, "testdata/demo.txt.gz"); code != 0 {
		t.Fatal(errs)
	}
	for _, r := range readCSV(t, csvPath) {
		if r["at"] != "" {
			t.Fatalf("breath %s: at %q without a clock", r["seq"], r["at"])
		}
	}
	for _, e := range readEvents(t, evPath) {
		if v, ok := e["at"]; !ok || v != nil {
			t.Fatalf("event %v: at %v without a clock", e["id"], v)
		}
	}
}

// TestReplayCarriesTheClock: breaths and events published while replaying
// a recording with a clock directive carry that clock's times.
func TestReplayCarriesTheClock(t *testing.T) {
	t.Parallel() // a process of its own, on its own ports and files
	path := demoWithClock(t)
	listen := "127.0.0.1:" + strconv.Itoa(freePort(t))
	startBreathd(t, "embedded MQTT broker started", "replay", "--speed", "100", "--id", "clk", "--listen", listen, path)
	c := collect(t, "mqtt://"+listen, "clock-collector", nil, "", "")
	bl := collectBreathPayloads(t, "mqtt://"+listen, "clk")
	waitFor(t, "breaths and an event", 30*time.Second, func() bool { ev, _, _ := c.snapshot(); return len(ev) >= 1 && len(bl.all()) >= 5 })
	for _, p := range bl.all() {
		at, _ := p["at"].(string)
		got, err := time.Parse(time.RFC3339Nano, at)
		want := clockBase.Add(time.Duration(p["t_start"].(float64) * float64(time.Second)))
		if err != nil || math.Abs(got.Sub(want).Seconds()) > 0.001 {
			t.Errorf("breath %v: at %q, want %s", p["seq"], at, want)
		}
	}
	ev, _, _ := c.snapshot()
	for _, e := range ev {
		at, _ := e["at"].(string)
		got, err := time.Parse(time.RFC3339Nano, at)
		want := clockBase.Add(time.Duration(e["t"].(float64) * float64(time.Second)))
		if err != nil || math.Abs(got.Sub(want).Seconds()) > 0.001 {
			t.Errorf("event %v: at %q, want %s", e["id"], at, want)
		}
	}
}

func readCSV(t *testing.T, path string) []map[string]string {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	recs, err := csv.NewReader(f).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	var rows []map[string]string
	for _, r := range recs[1:] {
		m := map[string]string{}
		for i, h := range recs[0] {
			m[h] = r[i]
		}
		rows = append(rows, m)
	}
	return rows
}

func readEvents(t *testing.T, path string) []map[string]any {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	var out []map[string]any
	for _, line := range strings.Split(strings.TrimSpace(string(b)), "\n") {
		var m map[string]any
		if err := json.Unmarshal([]byte(line), &m); err != nil {
			t.Fatalf("%q: %v", line, err)
		}
		out = append(out, m)
	}
	return out
}

// payloadLog keeps one device's breath payloads.
type payloadLog struct {
	mu sync.Mutex
	p  []map[string]any
}

func (l *payloadLog) all() []map[string]any {
	l.mu.Lock()
	defer l.mu.Unlock()
	return append([]map[string]any(nil), l.p...)
}

// collectBreathPayloads subscribes to dev's breath records.
func collectBreathPayloads(t *testing.T, url, dev string) *payloadLog {
	t.Helper()
	l := &payloadLog{}
	cl := mqtt.NewClient(mqtt.NewClientOptions().AddBroker(strings.Replace(url, "mqtt://", "tcp://", 1)).SetClientID(dev + "-payloads"))
	if tok := cl.Connect(); !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		t.Fatalf("connect: %v", tok.Error())
	}
	t.Cleanup(func() { cl.Disconnect(50) })
	tok := cl.Subscribe("breathd/"+dev+"/breath", 0, func(_ mqtt.Client, m mqtt.Message) {
		var p map[string]any
		json.Unmarshal(m.Payload(), &p)
		l.mu.Lock()
		l.p = append(l.p, p)
		l.mu.Unlock()
	})
	if !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		t.Fatalf("subscribe: %v", tok.Error())
	}
	return l
}
