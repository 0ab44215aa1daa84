package main

import (
	"bufio"
	"bytes"
	"os"
	"path/filepath"
	"regexp"
	"strings"
	"syscall"
	"testing"
	"time"
)

// TestScenarioFilesSimulateCleanly: every bundled scenario loads, and a
// minute of it replays with 0 bad lines.
func TestScenarioFilesSimulateCleanly(t *testing.T) {
	files, _ := filepath.Glob("../../configs/scenarios/*.yaml")
	if len(files) < 6 {
		t.Fatalf("scenarios: %v", files)
	}
	for _, f := range files {
		rel := strings.TrimPrefix(f, "../../")
		t.Run(filepath.Base(f), func(t *testing.T) {
			out := filepath.Join(t.TempDir(), "x.txt")
			code, _, errs := runCLI(t, "simulate", "--scenario", rel, "--duration", "60s", "--out", out)
			if code != 0 {
				t.Fatalf("simulate: exit %d: %s", code, errs)
			}
			code, stdout, errs := runCLI(t, "replay", "--no-mqtt", "--speed", "max", out)
			if code != 0 || !strings.Contains(stdout, "bad 0  gaps 0") {
				t.Fatalf("replay: exit %d: %s%s", code, stdout, errs)
			}
		})
	}
}

// TestSimulateFormatsReadBack: every output format reads back with 0 bad
// lines, with the directive or with the matching flags.
func TestSimulateFormatsReadBack(t *testing.T) {
	dir := t.TempDir()
	cases := []struct {
		sim, replay []string
	}{
		{[]string{"--no-time", "--delimiter", "semicolon", "--unit", "paw=mbar", "--unit", "flow=L/s", "--flow-sign", "-1"}, nil},
		{[]string{"--delimiter", "tab", "--unit", "t=ms", "--unit", "paw=kPa", "--unit", "flow=mL/s", "--directive=false"},
			[]string{"--unit", "t=ms", "--unit", "paw=kPa", "--unit", "flow=mL/s"}},
		{[]string{"--delimiter", "space", "--no-header", "--directive=false", "--rate-hz", "200"}, nil},
		{[]string{"--no-time", "--no-header", "--directive=false", "--rate-hz", "50"}, []string{"--columns", "paw,flow", "--rate-hz", "50"}},
	}
	for i, tc := range cases {
		out := filepath.Join(dir, "f"+string(rune('a'+i))+".txt")
		args := append([]string{"simulate", "--duration", "30s", "--out", out}, tc.sim...)
		if code, _, errs := runCLI(t, args...); code != 0 {
			t.Fatalf("%v: %s", args, errs)
		}
		args = append(append([]string{"replay", "--no-mqtt", "--speed", "max"}, tc.replay...), out)
		code, stdout, errs := runCLI(t, args...)
		if code != 0 || !strings.Contains(stdout, "bad 0  gaps 0") || strings.Contains(stdout, "samples 0") {
			t.Errorf("%v: exit %d: %s%s", args, code, stdout, errs)
		}
	}
}

func TestSimulateSameSeedSameStream(t *testing.T) {
	dir := t.TempDir()
	for _, name := range []string{"a", "b"} {
		runCLI(t, "simulate", "--scenario", "configs/scenarios/demo.yaml", "--duration", "2m", "--out", filepath.Join(dir, name), "--truth", filepath.Join(dir, name+".csv"))
	}
	a, _ := os.ReadFile(filepath.Join(dir, "a"))
	b, _ := os.ReadFile(filepath.Join(dir, "b"))
	ta, _ := os.ReadFile(filepath.Join(dir, "a.csv"))
	if len(a) < 1000 || !bytes.Equal(a, b) || !bytes.HasPrefix(ta, []byte("seq,t_start,t_end,mode,r,c,peep")) {
		t.Errorf("streams differ or truth missing (%d bytes)", len(a))
	}
}

func TestScenarioErrorsNameTheLine(t *testing.T) {
	dir := t.TempDir()
	p := filepath.Join(dir, "bad.yaml")
	os.WriteFile(p, []byte("name: x\nsettings:\n  mode: vc\n  r: 10\n  c: 0\n  peep: 5\n  rr: 15\n  vt: 400\n  ti: 1\n"), 0o600)
	code, _, errs := runCLI(t, "simulate", "--scenario", p)
	if code != 1 || !strings.Contains(errs, p+":5: settings.c: 0 out of range (1…500)") {
		t.Errorf("exit %d: %s", code, errs)
	}
	os.WriteFile(p, []byte("name: x\nsetings: {}\n"), 0o600)
	if _, _, errs := runCLI(t, "simulate", "--scenario", p); !strings.Contains(errs, p+`:2: unknown key "setings"`) {
		t.Errorf("typo: %s", errs)
	}
}

// TestSimulatePtyReadByRun: "breathd simulate --pty" in one process,
// "breathd run" reading that pseudo-terminal as a serial port in another.
func TestSimulatePtyReadByRun(t *testing.T) {
	t.Parallel() // a process of its own, on its own ports and files
	link := filepath.Join(t.TempDir(), "ventilator")
	sim := breathd("simulate", "--pty", "--link", link, "--speed", "5", "--duration", "10m")
	simErr, _ := sim.StderrPipe()
	if err := sim.Start(); err != nil {
		t.Fatal(err)
	}
	defer func() { sim.Process.Signal(syscall.SIGTERM); sim.Wait() }()
	sc := bufio.NewScanner(simErr)
	if !sc.Scan() || !strings.Contains(sc.Text(), "simulated ventilator on "+link) {
		t.Fatalf("simulate said %q", sc.Text())
	}
	cfg := filepath.Join(t.TempDir(), "run.yaml")
	os.WriteFile(cfg, []byte("report_every: 200ms\ndevices:\n  - id: bed3\n    serial:\n      path: "+link+"\n"), 0o600)
	run := breathd("run", "--listen", "127.0.0.1:0", "--config", cfg)
	out, _ := run.StdoutPipe()
	var stderr bytes.Buffer
	run.Stderr = &stderr
	if err := run.Start(); err != nil {
		t.Fatal(err)
	}
	re := regexp.MustCompile(`bed3  samples (\d+)  rate (\d+\.\d) Hz .* bad (\d+) `)
	lines := bufio.NewScanner(out)
	got := make(chan []string, 1)
	go func() {
		for lines.Scan() {
			if m := re.FindStringSubmatch(lines.Text()); m != nil && len(m[1]) >= 4 { // ≥ 1000 samples
				got <- m
				return
			}
		}
		close(got)
	}()
	select {
	case m, ok := <-got:
		if !ok {
			t.Fatalf("run ended; stderr:\n%s", stderr.String())
		}
		// the first line may be cut when run opens the port mid-line
		if m[3] != "0" && m[3] != "1" {
			t.Errorf("bad lines %s: %v", m[3], m)
		}
	case <-time.After(20 * time.Second):
		t.Fatalf("no samples from the pty; stderr:\n%s", stderr.String())
	}
	run.Process.Signal(syscall.SIGTERM)
	if err := run.Wait(); err != nil {
		t.Errorf("run after SIGTERM: %v", err)
	}
}
