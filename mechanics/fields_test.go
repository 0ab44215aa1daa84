package mechanics

import (
	"os"
	"strings"
	"testing"
)

// TestFieldRegistry: the registry and Breath.Values agree in length and
// order, names are unique, and the README's field table documents each
// field. Common practice, no source.
func TestFieldRegistry(t *testing.T) {
	b := Breath{TStart: 1, EEF: 29}
	v := b.Values(nil)
	if len(v) != NumFields || v[FieldIndex("t_start")] != 1 || v[FieldIndex("eef")] != 29 {
		t.Fatalf("Values gives %d values for %d fields", len(v), NumFields)
	}
	readme, err := os.ReadFile("../README.md")
	if err != nil {
		t.Fatal(err)
	}
	seen := map[string]bool{}
	for i, f := range Fields() {
		if seen[f.Name] || FieldIndex(f.Name) != i || FieldAt(i) != f {
			t.Errorf("field %d %q: duplicate or out of place", i, f.Name)
		}
		seen[f.Name] = true
		if f.Unit == "" || f.Meaning == "" || f.Decimals < 0 {
			t.Errorf("%s: unit %q, meaning %q, decimals %d", f.Name, f.Unit, f.Meaning, f.Decimals)
		}
		if !strings.Contains(string(readme), "`"+f.Name+"`") {
			t.Errorf("%s is not in the README's field table", f.Name)
		}
		if got := b.Untrusted(i); got {
			t.Errorf("%s untrusted without flags", f.Name)
		}
	}
	if FieldIndex("nonsense") != -1 {
		t.Error("unknown name found")
	}
	// the plateau's and the fit's numbers are disowned by their flags
	b.Flags = FlagPlateauUnsettled
	if !b.Untrusted(FieldIndex("dp")) || b.Untrusted(FieldIndex("fit_c")) {
		t.Error("plateau_unsettled disowns the wrong fields")
	}
}
