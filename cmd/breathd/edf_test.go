package main

import (
	"encoding/json"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"

	"breathd/stream/edf"
)

// TestAnalyzeEDF: analyze --edf of the demo, read back by the package's
// own reader and by an independent one (MNE-Python's read_raw_edf, from
// Debian's python3-mne: skipped with a message when absent, required in CI
// by BREATHD_REQUIRE_MNE=1): 50 Hz, the units, one breath annotation per
// CSV row and one annotation per event line.
func TestAnalyzeEDF(t *testing.T) {
	dir := t.TempDir()
	out, csv, events := filepath.Join(dir, "demo.edf"), filepath.Join(dir, "demo.csv"), filepath.Join(dir, "demo.jsonl")
	if code, _, errs := runCLI(t, "analyze", "--edf", out, "--csv", csv, "--events", events, "testdata/demo.txt.gz"); code != 0 {
		t.Fatal(errs)
	}
	rows, _ := os.ReadFile(csv)
	breaths := strings.Count(string(rows), "\n") - 1
	evData, _ := os.ReadFile(events)
	nEvents := strings.Count(string(evData), "\n")
	f, nb, ne := readEDF(t, out)
	var units []string
	for _, s := range f.Signals {
		units = append(units, s.Label+" "+s.Unit)
	}
	if f.Rates[0] != 50 || strings.Join(units, ", ") != "Paw cmH2O, Flow L/min, Volume mL" || len(f.Samples[0]) < 75000 || nb != breaths || ne != nEvents {
		t.Errorf("EDF+: %d Hz, %v, %d samples, %d breath and %d event annotations; the CSV has %d breaths, the events %d",
			f.Rates[0], units, len(f.Samples[0]), nb, ne, breaths, nEvents)
	}

	py := "/usr/bin/python3"
	script := `import json, sys, mne
r = mne.io.read_raw_edf(sys.argv[1], preload=True, verbose="error")
d = list(r.annotations.description)
print(json.dumps({"sfreq": float(r.info["sfreq"]), "channels": r.ch_names, "n": int(r.n_times),
  "breaths": int(sum(x.startswith("breath ") for x in d)), "events": int(sum(not x.startswith("breath ") for x in d)),
  "paw0": float(r.get_data()[0][100])}))`
	if exec.Command(py, "-c", "import mne").Run() != nil {
		if os.Getenv("BREATHD_REQUIRE_MNE") != "" {
			t.Fatal("python3-mne is required here (BREATHD_REQUIRE_MNE) and is not installed")
		}
		t.Skip("python3-mne not installed: the independent EDF+ reader is not run (apt-get install python3-mne)")
	}
	res, err := exec.Command(py, "-c", script, out).Output()
	if err != nil {
		t.Fatalf("mne: %v", err)
	}
	var m struct {
		Sfreq           float64
		Channels        []string
		N               int
		Breaths, Events int
		Paw0            float64
	}
	json.Unmarshal(res, &m)
	if m.Sfreq != 50 || strings.Join(m.Channels, ",") != "Paw,Flow,Volume" || m.N != len(f.Samples[0]) || m.Breaths != breaths || m.Events != nEvents ||
		math.Abs(m.Paw0-f.Samples[0][100]) > 1e-6 {
		t.Errorf("MNE read %s; ours: %d samples, paw[100] %v", res, len(f.Samples[0]), f.Samples[0][100])
	}
	t.Logf("MNE: %s", strings.TrimSpace(string(res)))
}

// TestReplayRecordsEDF: replay --record DIR --record-edf leaves an EDF+
// file beside the raw one, with the stream's breaths annotated, read back
// by the package's reader (held to the format by TestRoundTrip and to
// MNE-Python by TestAnalyzeEDF).
func TestReplayRecordsEDF(t *testing.T) {
	dir := t.TempDir()
	if code, _, errs := runCLI(t, "replay", "--no-mqtt", "--speed", "max", "--record", dir, "--record-edf", "testdata/demo.txt.gz"); code != 0 {
		t.Fatal(errs)
	}
	raws, _ := filepath.Glob(filepath.Join(dir, "*.txt"))
	if len(raws) != 1 {
		t.Fatalf("raw files %v", raws)
	}
	f, nb, _ := readEDF(t, strings.TrimSuffix(raws[0], ".txt")+".edf")
	if f.Rates[0] != 50 || len(f.Signals) != 2 || nb != 398 {
		t.Errorf("%v Hz, %d signals, %d breath annotations (the demo has 398 breaths)", f.Rates, len(f.Signals), nb)
	}
	if code, _, errs := runCLI(t, "replay", "--no-mqtt", "--record-edf", "testdata/demo.txt.gz"); code != 2 || !strings.Contains(errs, "--record-edf needs --record DIR") {
		t.Errorf("--record-edf alone: exit %d %s", code, errs)
	}
}

// readEDF reads an EDF+ file with the package's reader and counts its
// breath annotations and the others.
func readEDF(t *testing.T, path string) (f *edf.File, breaths, others int) {
	t.Helper()
	fh, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer fh.Close()
	if f, err = edf.Read(fh); err != nil {
		t.Fatal(err)
	}
	for _, a := range f.Annotations {
		if strings.HasPrefix(a.Text, "breath ") {
			breaths++
		} else {
			others++
		}
	}
	return f, breaths, others
}
