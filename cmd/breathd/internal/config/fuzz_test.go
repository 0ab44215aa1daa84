package config

import (
	"os"
	"path/filepath"
	"strings"
	"testing"

	"breathd/mechanics/lungsim"
)

// FuzzConfig: no configuration text panics the loader, and every error
// names the file.
func FuzzConfig(f *testing.F) {
	example, _ := os.ReadFile("../../../../configs/breathd.example.yaml")
	f.Add(string(example))
	f.Add("devices:\n  - id: a\n    stdin: true\n")
	f.Add("devices: [{id: x, serial: {path: /dev/x, baud: 9600}}]\n")
	f.Fuzz(func(t *testing.T, text string) {
		_, err := Parse("fuzz.yaml", []byte(text))
		if err != nil && !strings.HasPrefix(err.Error(), "fuzz.yaml") {
			t.Fatalf("error without the file name: %v", err)
		}
	})
}

// FuzzScenario: no scenario text panics the loader, and a scenario it
// accepts simulates without panicking.
func FuzzScenario(f *testing.F) {
	files, _ := filepath.Glob("../../../../configs/scenarios/*.yaml")
	for _, p := range files {
		b, _ := os.ReadFile(p)
		f.Add(string(b))
	}
	f.Fuzz(func(t *testing.T, text string) {
		var sc lungsim.Scenario
		if _, err := decodeStrict("fuzz.yaml", []byte(text), &sc); err != nil {
			return
		}
		sc.Defaults()
		if sc.Validate() != nil {
			return
		}
		sc.Duration = min(sc.Duration, 20e9) // 20 s is enough to exercise it
		sim := lungsim.NewSim(sc, nil)
		var s lungsim.SimSample
		for sim.Next(&s) {
		}
	})
}
