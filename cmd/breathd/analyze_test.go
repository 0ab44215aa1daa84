package main

import (
	"encoding/json"
	"flag"
	"fmt"
	stdpng "image/png"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"testing"

	"breathd/stream/payload"
)

var update = flag.Bool("update", false, "rewrite the golden files in testdata")

// TestAnalyzeDemoGolden: the per-breath CSV of the demo recording, against
// testdata/demo.breaths.csv (go test ./cmd/breathd -run Golden -update
// rewrites it after a deliberate change).
func TestAnalyzeDemoGolden(t *testing.T) {
	out := filepath.Join(t.TempDir(), "demo.csv")
	code, _, errs := runCLI(t, "analyze", "--csv", out, "--sex", "male", "--height-cm", "178", "testdata/demo.txt.gz")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, errs)
	}
	raw, _ := os.ReadFile(out)
	// the run column is this analysis's random id: the same on every row,
	// left out of the comparison
	var kept []string
	run := ""
	for i, line := range strings.Split(strings.TrimSuffix(string(raw), "\n"), "\n") {
		id := line[strings.LastIndexByte(line, ',')+1:]
		if i > 0 {
			if run == "" {
				run = id
			}
			if id != run || len(id) != 8 {
				t.Fatalf("row %d: run %q, the first row's %q", i, id, run)
			}
		}
		kept = append(kept, line[:strings.LastIndexByte(line, ',')])
	}
	got := []byte(strings.Join(kept, "\n") + "\n")
	var schema struct{ Fields []struct{ Name string } }
	if data, err := os.ReadFile(out + ".schema.json"); err != nil || json.Unmarshal(data, &schema) != nil || len(schema.Fields) != len(kept[0])-len(strings.ReplaceAll(kept[0], ",", ""))+2 {
		t.Errorf("the Table Schema beside the CSV: %v, %d fields", err, len(schema.Fields))
	}
	golden := filepath.Join(root, "testdata", "demo.breaths.csv")
	if *update {
		if err := os.WriteFile(golden, got, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	want, err := os.ReadFile(golden)
	if err != nil {
		t.Fatalf("%v (run with -update to create it)", err)
	}
	if string(got) != string(want) {
		gl, wl := strings.Split(string(got), "\n"), strings.Split(string(want), "\n")
		for i := range min(len(gl), len(wl)) {
			if gl[i] != wl[i] {
				t.Fatalf("line %d differs:\n got %s\nwant %s", i+1, gl[i], wl[i])
			}
		}
		t.Fatalf("%d lines, golden has %d", len(gl), len(wl))
	}
	header := strings.SplitN(string(got), "\n", 2)[0]
	const contract = "seq,t_start,t_end,ti,te,rr,ie,vti,vte,leak,ppeak,pplat,peep,pmean,dp,cstat,cdyn,rinsp,fit_r,fit_c,fit_p0,fit_r2,tau,mp,si,e2_pct,pause_decay,peepi,vt_pbw,eef,ineffective_efforts,flags,asynchrony,at,device" // and run
	if header != contract {
		t.Errorf("header %q", header)
	}
	// every breath of the simulator's truth file but the first (the
	// recording starts inside it) and the last (no inflation after it ends it)
	truth, _ := os.ReadFile(filepath.Join(root, "testdata", "demo.truth.csv"))
	breaths := strings.Count(strings.TrimSpace(string(truth)), "\n") - 2
	if !strings.Contains(errs, fmt.Sprintf("demo: %d breaths", breaths)) || !strings.Contains(errs, "bad lines 0") {
		t.Errorf("summary: %s", errs)
	}
}

// TestAnalyzeAgainstDemoTruth: the demo's per-breath values against the
// simulator's truth file beside it (the lung model is the oracle).
func TestAnalyzeAgainstDemoTruth(t *testing.T) {
	code, out, errs := runCLI(t, "analyze", "--csv", "-", "testdata/demo.txt.gz")
	if code != 0 {
		t.Fatal(errs)
	}
	truth, _ := os.ReadFile(filepath.Join(root, "testdata", "demo.truth.csv"))
	type row map[string]string
	parse := func(text string) []row {
		lines := strings.Split(strings.TrimSpace(text), "\n")
		head := strings.Split(lines[0], ",")
		var rows []row
		for _, l := range lines[1:] {
			r := row{}
			for i, v := range strings.Split(l, ",") {
				r[head[i]] = v
			}
			rows = append(rows, r)
		}
		return rows
	}
	found, want := parse(out), parse(string(truth))
	matched, plateauOK := 0, 0
	j := 0
	for _, tr := range want {
		ts := parseF(tr["t_start"])
		for j < len(found) && parseF(found[j]["t_start"]) < ts-0.03 {
			j++
		}
		if j == len(found) || parseF(found[j]["t_start"]) > ts+0.03 {
			continue
		}
		f := found[j]
		matched++
		if tr["plateau"] != "" && f["pplat"] != "" && absDiff(f["pplat"], tr["plateau"]) <= 0.3 {
			plateauOK++
		}
	}
	// all but the first breath (the recording starts inside it) and the last
	if matched < len(want)-2 {
		t.Errorf("matched %d of %d true breaths", matched, len(want))
	}
	plateaus := 0
	for _, tr := range want {
		if tr["plateau"] != "" {
			plateaus++
		}
	}
	if plateauOK < plateaus*95/100 { // every fourth breath has a pause
		t.Errorf("only %d of %d plateaus within 0.3 cmH2O of the truth", plateauOK, plateaus)
	}
}

func absDiff(a, b string) float64 {
	x, y := parseF(a), parseF(b)
	if x > y {
		return x - y
	}
	return y - x
}

// TestPlotDemo renders the demo recording to PNG and SVG and checks the
// picture is there and not blank.
func TestPlotDemo(t *testing.T) {
	dir := t.TempDir()
	png := filepath.Join(dir, "demo.png")
	code, _, errs := runCLI(t, "analyze", "--plot", png, "--plot-from", "960", "--plot-span", "20", "testdata/demo.txt.gz")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, errs)
	}
	f, err := os.Open(png)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	img, err := stdpng.Decode(f)
	if err != nil {
		t.Fatalf("not a PNG: %v", err)
	}
	b := img.Bounds()
	if b.Dx() < 500 || b.Dy() < 800 {
		t.Errorf("picture %v", b)
	}
	inked := 0
	for y := b.Min.Y; y < b.Max.Y; y += 2 {
		for x := b.Min.X; x < b.Max.X; x += 2 {
			if r, g, bl, _ := img.At(x, y).RGBA(); r < 0xe000 || g < 0xe000 || bl < 0xe000 {
				inked++
			}
		}
	}
	share := float64(inked) / float64(b.Dx()*b.Dy()/4)
	if share < 0.02 {
		t.Errorf("only %.1f %% of the picture is drawn", share*100)
	}
	svg := filepath.Join(dir, "demo.svg")
	if code, _, errs := runCLI(t, "analyze", "--plot", svg, "testdata/demo.txt.gz"); code != 0 {
		t.Fatal(errs)
	}
	data, _ := os.ReadFile(svg)
	if len(data) < 10000 || !strings.Contains(string(data), "<svg") {
		t.Errorf("svg of %d bytes", len(data))
	}
	// the title names the device, the file and the notice; each raised rule
	// is named once, on the panel of its field
	text := string(data)
	for _, want := range []string{"device demo", "demo.txt.gz", "not a medical device", ">driving_pressure_high (warning)<", ">peak_plateau_gap_high (warning)<"} {
		if n := strings.Count(text, want); n != 1 {
			t.Errorf("%q %d times in the picture, want once", want, n)
		}
	}
	if code, _, errs := runCLI(t, "analyze", "--plot", filepath.Join(dir, "late.png"), "--plot-from", "5000", "testdata/demo.txt.gz"); code != 1 || !strings.Contains(errs, "no samples in the strip's range 5000–5030 s: the breaths run from 4 to 1496 s") {
		t.Errorf("a range past the end: exit %d %s", code, errs)
	}
	if code, _, errs := runCLI(t, "analyze", "--plot", filepath.Join(dir, "x.gif"), "testdata/demo.txt.gz"); code != 2 || !strings.Contains(errs, ".png or .svg") {
		t.Errorf("gif: exit %d %s", code, errs)
	}
}

// TestAnalyzeSummaryChannels: the summary says how far the flow channel
// lags the pressure channel, as estimated or as configured, and takes its
// medians from the values no flag disowns.
func TestAnalyzeSummaryChannels(t *testing.T) {
	code, _, errs := runCLI(t, "analyze", "testdata/demo.txt.gz")
	if code != 0 || !strings.Contains(errs, "behind pressure (median of the last 9 passive onsets)") || !strings.Contains(errs, "medians (of the values no flag disowns)") {
		t.Errorf("exit %d: %s", code, errs)
	}
	code, _, errs = runCLI(t, "analyze", "--flow-delay", "40ms", "--circuit-compliance", "1.5", "testdata/demo.txt.gz")
	if code != 0 || !strings.Contains(errs, "flow delay 40 ms as configured, aligned by 40 ms") {
		t.Errorf("exit %d: %s", code, errs)
	}
	if code, _, errs = runCLI(t, "analyze", "--flow-delay", "later", "testdata/demo.txt.gz"); code != 2 || !strings.Contains(errs, "want auto or a duration") {
		t.Errorf("a bad delay: exit %d: %s", code, errs)
	}
}

// TestFieldsVerb: breathd fields prints the dictionary the meta topic
// carries, and the CSV's column names as analyze writes them. Common
// practice, no source.
func TestFieldsVerb(t *testing.T) {
	code, out, errs := runCLI(t, "fields", "--json")
	var d payload.Dict
	if code != 0 || json.Unmarshal([]byte(out), &d) != nil || len(d.CSV) == 0 || d.V != payload.Version {
		t.Fatalf("fields --json: exit %d %s %s", code, errs, out)
	}
	code, cols, _ := runCLI(t, "fields", "--csv-columns")
	csv := filepath.Join(t.TempDir(), "b.csv")
	runCLI(t, "analyze", "--csv", csv, "testdata/bad-lines.txt")
	data, _ := os.ReadFile(csv)
	if header, _, _ := strings.Cut(string(data), "\n"); code != 0 || strings.TrimSpace(cols) != header {
		t.Errorf("fields --csv-columns %q, the CSV's header %q", cols, header)
	}
	if code, out, _ := runCLI(t, "fields"); code != 0 || !strings.Contains(out, "cstat") || !strings.Contains(out, "mL/cm[H2O]") {
		t.Errorf("fields: exit %d\n%s", code, out)
	}
}

// TestAsynchronyInAnalyze: on three minutes of the simulator's mixed
// asynchrony scenario, analyze prints the asynchrony index line, and the
// picture names on its strip each asynchrony the CSV gives for the
// breaths it shows (the count of each name against the CSV's; common
// practice, no source).
func TestAsynchronyInAnalyze(t *testing.T) {
	dir := t.TempDir()
	rec := filepath.Join(dir, "asy.txt")
	if code, _, errs := runCLI(t, "simulate", "--scenario", "configs/scenarios/asynchrony.yaml", "--duration", "3m", "--out", rec); code != 0 {
		t.Fatal(errs)
	}
	svg, csvPath := filepath.Join(dir, "asy.svg"), filepath.Join(dir, "asy.csv")
	code, _, errs := runCLI(t, "analyze", "--plot", svg, "--plot-from", "0", "--plot-span", "180", "--csv", csvPath, rec)
	if code != 0 || !strings.Contains(errs, "asynchrony index ") {
		t.Fatalf("exit %d: %s", code, errs)
	}
	data, _ := os.ReadFile(csvPath)
	rows := strings.Split(strings.TrimSpace(string(data)), "\n")
	head := strings.Split(rows[0], ",")
	col := slices.Index(head, "asynchrony")
	ie := slices.Index(head, "ineffective_efforts")
	want := map[string]int{}
	names := map[string]string{"double_trigger": "double trigger", "auto_trigger": "auto-trigger", "short_cycle": "short cycle",
		"long_cycle": "long cycle", "reverse_trigger": "reverse trigger"}
	for _, r := range rows[1:] {
		f := strings.Split(r, ",")
		n, _ := strconv.Atoi(f[ie])
		want["ineffective effort"] += min(n, 3)
		for _, w := range strings.Fields(f[col]) {
			if w != "ineffective_effort" {
				want[names[w]]++
			}
		}
	}
	if want["ineffective effort"] == 0 || want["double trigger"] == 0 {
		t.Fatalf("the scenario's first 3 minutes gave %v: the test tests too little", want)
	}
	text, _ := os.ReadFile(svg)
	for name, n := range want {
		if got := strings.Count(string(text), name); got != n {
			t.Errorf("%q %d times on the strip, the CSV has %d", name, got, n)
		}
	}
}
