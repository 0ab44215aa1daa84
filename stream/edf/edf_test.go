package edf

import (
	"bytes"
	"math"
	"os"
	"path/filepath"
	"testing"
	"time"
)

// TestRoundTrip: what Writer writes, Read reads back: the start, the
// signals' labels, units and rates, every sample within one 16-bit step of
// its physical range, and every annotation with its onset; the header's
// fixed fields sit where the EDF specification puts them (Kemp 1992:
// version at 0, start date at 168, header bytes at 184, reserved "EDF+C"
// at 192, records at 236, record duration at 244, signals at 252).
func TestRoundTrip(t *testing.T) {
	path := filepath.Join(t.TempDir(), "x.edf")
	start := time.Date(2026, 12, 1, 8, 0, 0, 0, time.UTC)
	sigs := []Signal{{Label: "Paw", Unit: "cmH2O", Min: -30, Max: 150}, {Label: "Flow", Unit: "L/min", Min: -600, Max: 600}}
	anns := []Annotation{{0.5, "breath 1"}, {2.25, "breath 2"}, {2.3, "dp_high raised"}, {4.9, "breath 3"}}
	w, err := Create(path, start, "X X X X", "X X breathd", sigs, 10, anns)
	if err != nil {
		t.Fatal(err)
	}
	const n = 45 // four and a half records: the last is padded
	for i := range n {
		w.Add(5+10*math.Sin(float64(i)/7), 60*math.Cos(float64(i)/5))
	}
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	data, _ := os.ReadFile(path)
	for off, want := range map[int]string{0: "0       ", 168: "01.12.26", 176: "08.00.00", 184: "1024    ", 192: "EDF+C", 236: "5       ", 244: "1       ", 252: "3   "} {
		if got := string(data[off : off+len(want)]); got != want {
			t.Errorf("header at %d: %q, want %q", off, got, want)
		}
	}
	f, err := Read(bytes.NewReader(data))
	if err != nil {
		t.Fatal(err)
	}
	if !f.Start.Equal(start) || f.Records != 5 || len(f.Signals) != 2 || f.Rates[0] != 10 || f.Signals[1].Unit != "L/min" || f.Signals[0].Label != "Paw" {
		t.Fatalf("read back %+v", f)
	}
	for i := range n {
		for k, want := range []float64{5 + 10*math.Sin(float64(i)/7), 60 * math.Cos(float64(i)/5)} {
			step := (sigs[k].Max - sigs[k].Min) / 65535
			if got := f.Samples[k][i]; math.Abs(got-want) > step {
				t.Fatalf("signal %d sample %d: %v, want %v (step %v)", k, i, got, want, step)
			}
		}
	}
	if len(f.Annotations) != len(anns) {
		t.Fatalf("annotations %v", f.Annotations)
	}
	for i, a := range anns {
		if f.Annotations[i] != a {
			t.Errorf("annotation %d: %+v, want %+v", i, f.Annotations[i], a)
		}
	}
}

// FuzzRead: the reader never panics and never allocates beyond its bounds
// on any input. Common practice, no source.
func FuzzRead(f *testing.F) {
	path := filepath.Join(f.TempDir(), "seed.edf")
	w, _ := Create(path, time.Date(2026, 12, 1, 8, 0, 0, 0, time.UTC), "X X X X", "X", []Signal{{Label: "Paw", Unit: "cmH2O", Min: -30, Max: 150}}, 4, []Annotation{{0.5, "breath 1"}})
	for i := range 9 {
		w.Add(float64(i))
	}
	w.Close()
	seed, _ := os.ReadFile(path)
	f.Add(seed)
	f.Add(seed[:300])
	f.Fuzz(func(t *testing.T, data []byte) {
		Read(bytes.NewReader(data))
	})
}
