package config

import (
	"runtime"
	"strings"
	"testing"

	"breathd/alerts"
)

// TestValuesOutOfReason: every value run would refuse, or that would hurt
// (a NaN rate, a 1 ns report that burns a core, a size that overflows, a
// device id that leaves its directory), is refused by the loader that
// check and run share, at its line. (Issue 16, item 5.)
func TestValuesOutOfReason(t *testing.T) {
	dev := "devices:\n  - id: bed1\n    stdin: true\n"
	for _, c := range []struct{ yaml, want string }{
		{dev + "    format: {rate_hz: .nan}\n", "c.yaml:4: devices[0].format: rate_hz NaN"},
		{"devices:\n  - id: bed1\n    file: {path: x, speed: .inf}\n", "c.yaml:3: devices[0].file.speed"},
		{"devices:\n  - id: bed1\n    file: {path: x, speed: .nan}\n", "c.yaml:3: devices[0].file.speed"},
		{"report_every: 1ns\n" + dev, "c.yaml:1: report_every: 1ns"},
		{"mqtt: {status_every: 1ns}\n" + dev, "c.yaml:1: mqtt.status_every: 1ns"},
		{"mqtt: {root: a//b}\n" + dev, "c.yaml:1: mqtt: topic root \"a//b\""},
		{"mqtt: {breath_qos: 2}\n" + dev, "c.yaml:1: mqtt.breath_qos: 2"},
		{dev + "    record: {dir: /tmp/r, max_mib: 9223372036854775807}\n", "c.yaml:4: devices[0].record.max_mib"},
		{dev + "    record: {dir: /tmp/r, clock_every: 1ns}\n", "c.yaml:4: devices[0].record.clock_every"},
		{"devices:\n  - id: '..'\n    stdin: true\n", "c.yaml:2: devices[0].id: device id \"..\""},
		{"devices:\n  - id: .\n    stdin: true\n", "c.yaml:2: devices[0].id: device id \".\""},
	} {
		_, err := Parse("c.yaml", []byte(c.yaml))
		if err == nil || !strings.HasPrefix(err.Error(), c.want) {
			t.Errorf("%q: %v, want %q…", c.yaml, err, c.want)
		}
	}
}

// TestDeepNestingBounded: a small file nested thousands deep costs little
// to reject and says where in a short line. (Issue 16, item 6: 9000
// levels took some 700 MB.)
func TestDeepNestingBounded(t *testing.T) {
	for _, text := range []string{
		"devices: " + strings.Repeat("[", 9000) + strings.Repeat("]", 9000) + "\n",
		"devices:\n" + strings.Repeat("- ", 9000) + "x\n",
	} {
		var m0, m1 runtime.MemStats
		runtime.ReadMemStats(&m0)
		_, err := Parse("n.yaml", []byte(text))
		runtime.ReadMemStats(&m1)
		if err == nil || len(err.Error()) > 300 {
			t.Errorf("error %.300v (%d bytes)", err, len(err.Error()))
		}
		if mb := (m1.TotalAlloc - m0.TotalAlloc) >> 20; mb > 64 {
			t.Errorf("%d MB allocated to reject %d bytes", mb, len(text))
		}
	}
}

// TestOverridesCarryPresence: a rule override may set 0 and false: a
// hysteresis of 0, a threshold of 0, latching switched off again, a rule
// switched back on. What the override leaves out keeps the default.
// (Issue 16, item 7.)
func TestOverridesCarryPresence(t *testing.T) {
	c, err := Parse("r.yaml", []byte(`devices:
  - id: a
    stdin: true
    rules:
      - {id: plateau_high, hysteresis: 0, latching: true}
      - {id: driving_pressure_high, threshold: 0}
  - id: b
    stdin: true
    rules:
      - {id: plateau_high, latching: true}
      - {id: plateau_high, latching: false}
`))
	if err != nil {
		t.Fatal(err)
	}
	find := func(d int, id string) (r alerts.Rule) {
		for _, r := range c.Devices[d].MergedRules() {
			if r.ID == id {
				return r
			}
		}
		t.Fatalf("no rule %s", id)
		return r
	}
	if r := find(0, "plateau_high"); r.Hysteresis != 0 || !r.Latching || r.Threshold != 30 {
		t.Errorf("plateau_high on a: %+v", r)
	}
	if r := find(0, "driving_pressure_high"); r.Threshold != 0 || r.Hysteresis != 1 {
		t.Errorf("driving_pressure_high on a: %+v", r)
	}
	if r := find(1, "plateau_high"); r.Latching {
		t.Errorf("latching: false ignored: %+v", r)
	}
	// switched off, then on again by a later override
	rules, err := alerts.Merge(alerts.Defaults(), []alerts.Override{{ID: "power_high", Off: new(true)}, {ID: "power_high", Off: new(false), Latching: new(true)}})
	if err != nil {
		t.Fatal(err)
	}
	for _, r := range rules {
		if r.ID == "power_high" && (r.Off || !r.Latching) {
			t.Errorf("power_high %+v", r)
		}
	}
}
