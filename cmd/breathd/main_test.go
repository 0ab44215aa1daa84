package main

import (
	"bufio"
	"bytes"
	"fmt"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/creack/pty"
)

// TestMain lets a test run the real binary: the test executable re-runs
// itself with BREATHD_AS_MAIN=1 and the command line after "--".
func TestMain(m *testing.M) {
	if os.Getenv("BREATHD_AS_MAIN") == "1" {
		os.Exit(run(os.Args[1:], os.Stdout, os.Stderr))
	}
	root, _ = filepath.Abs("../..")
	os.Exit(m.Run())
}

// root is the project's top directory.
var root string

func breathd(args ...string) *exec.Cmd {
	cmd := exec.Command(os.Args[0], args...)
	cmd.Env = append(os.Environ(), "BREATHD_AS_MAIN=1")
	cmd.Dir = root
	return cmd
}

// runCLI runs a command line in-process from the project's top directory.
func runCLI(t *testing.T, args ...string) (code int, stdout, stderr string) {
	t.Helper()
	t.Chdir(root)
	var out, errb bytes.Buffer
	code = run(args, &out, &errb)
	return code, out.String(), errb.String()
}

func TestReplayCountsBadLinesExactly(t *testing.T) {
	code, out, errs := runCLI(t, "replay", "--no-mqtt", "--speed", "max", "testdata/bad-lines.txt")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, errs)
	}
	lines := strings.Split(strings.TrimSpace(out), "\n")
	want := "bad-lines  samples 500  rate 50.0 Hz  span 10.0 s  breaths 2  bad 7 (field_count 1, not_finite 2, not_number 1, out_of_range 1, time_backwards 1, too_long 1)  gaps 0  (end)"
	if got := lines[len(lines)-1]; got != want {
		t.Errorf("counters\n%q\nwant\n%q", got, want)
	}
}

// TestUserErrors: every mistake a new user can make is one clear line on
// stderr and a non-zero exit, never a stack trace.
func TestUserErrors(t *testing.T) {
	dir := t.TempDir()
	write := func(name, text string) string {
		p := filepath.Join(dir, name)
		os.WriteFile(p, []byte(text), 0o600)
		return p
	}
	typo := write("typo.yaml", "devices:\n  - id: a\n    serial:\n      path: /dev/x\n      bod: 3\n")
	badValue := write("value.yaml", "devices:\n  - id: a\n    stdin: true\n    format:\n      gap_limit: 5\n")
	absent := write("absent.yaml", "devices:\n  - id: a\n    serial:\n      path: /dev/breathd-no-such-port\n")
	empty := write("empty.yaml", "")
	delay := write("delay.yaml", "devices:\n  - id: a\n    stdin: true\n    measurement:\n      flow_delay: soon\n")
	circuit := write("circuit.yaml", "devices:\n  - id: a\n    stdin: true\n    measurement: {circuit_compliance: 40}\n")
	asy := write("asy.yaml", "devices:\n  - id: a\n    stdin: true\n    asynchrony: {short_ti: 1.5}\n")
	tests := []struct {
		name string
		args []string
		code int
		want string // in the one line on stderr
	}{
		{"no verb", nil, 2, "no verb given"},
		{"unknown verb", []string{"fly"}, 2, `unknown verb "fly"`},
		{"missing file", []string{"replay", "nope.txt"}, 1, "recording nope.txt: file does not exist"},
		{"bad flag", []string{"replay", "--bogus", "x"}, 2, "flag provided but not defined: -bogus"},
		{"bad speed", []string{"replay", "--speed", "fast", "x"}, 2, `--speed "fast"`},
		{"bad unit", []string{"replay", "--unit", "paw=psi", "x"}, 2, `unknown unit "psi" for paw`},
		{"no t no rate", []string{"replay", "--columns", "paw,flow", "x"}, 2, "set rate_hz"},
		{"two files", []string{"replay", "a", "b"}, 2, "replay takes one recording"},
		{"run without config", []string{"run"}, 2, "run needs --config FILE"},
		{"config typo", []string{"check", typo}, 1, typo + `:5: unknown key "bod" in devices[0].serial`},
		{"config bad value", []string{"check", badValue}, 1, badValue + `:5: devices[0].format.gap_limit: "5" is not a duration`},
		{"config empty", []string{"check", empty}, 1, "the file is empty"},
		{"config bad delay", []string{"check", delay}, 1, delay + `:4: devices[0].measurement: flow delay "soon": want auto or a duration such as 20ms`},
		{"config bad circuit", []string{"check", circuit}, 1, "circuit compliance 40 mL/cmH2O: 0 (flow measured at the airway) to 10"},
		{"config bad asynchrony", []string{"check", asy}, 1, "devices[0].asynchrony: asynchrony short_ti 1.5 must be under 1 and long_ti 2 over 1 (shares of the mean)"},
		{"bad circuit flag", []string{"analyze", "--circuit-compliance", "-1", "x"}, 2, "circuit compliance -1 mL/cmH2O: 0 (flow measured at the airway) to 10"},
		{"config missing", []string{"check", "/nonexistent.yaml"}, 1, "does not exist"},
		{"absent port", []string{"run", "--no-mqtt", "--config", absent}, 1, "serial port /dev/breathd-no-such-port: file does not exist: check the cable"},
		{"not a recording", []string{"replay", "--no-mqtt", "--speed", "max", "testdata"}, 1, "is a directory"},
		{"flag after the file", []string{"analyze", "testdata/bad-lines.txt", "--csv", "x.csv"}, 2, "flags go before the recording or other arguments: breathd analyze --csv … testdata/bad-lines.txt"},
		{"tiny report period", []string{"replay", "--report-every", "1ns", "x"}, 2, "--report-every 1ns: want 0 (the default) or at least 100ms"},
		{"NaN rate", []string{"replay", "--rate-hz", "NaN", "--columns", "paw,flow", "x"}, 2, "rate_hz NaN out of range"},
		{"NaN speed", []string{"replay", "--speed", "NaN", "x"}, 2, `--speed "NaN"`},
		{"infinite speed", []string{"replay", "--speed", "+Inf", "x"}, 2, `--speed "+Inf"`},
		{"id ..", []string{"replay", "--id", "..", "x"}, 2, `device id ".."`},
		{"bad root flag", []string{"replay", "--root", "a//b", "--speed", "max", "testdata/bad-lines.txt"}, 1, `topic root "a//b"`},
		{"watch bad scheme", []string{"watch", "--broker", "http://127.0.0.1:1"}, 1, `scheme "http", want mqtt or mqtts`},
		{"watch missing CA", []string{"watch", "--broker", "mqtts://127.0.0.1:1", "--ca-file", "/nonexistent.pem"}, 1, "CA file: open /nonexistent.pem"},
		{"watch no broker", []string{"watch", "--broker", "mqtt://127.0.0.1:1"}, 1, "cannot reach the broker at mqtt://127.0.0.1:1"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			code, _, errs := runCLI(t, tc.args...)
			if code != tc.code {
				t.Errorf("exit %d, want %d", code, tc.code)
			}
			lines := strings.Split(strings.TrimSpace(errs), "\n")
			last := lines[len(lines)-1]
			if !strings.HasPrefix(last, "breathd: ") || !strings.Contains(last, tc.want) {
				t.Errorf("stderr %q, want one line containing %q", errs, tc.want)
			}
			if strings.Contains(errs, "goroutine ") || strings.Contains(errs, "panic") {
				t.Errorf("stack trace on stderr: %s", errs)
			}
		})
	}
}

// TestHelpShowsDoubleDashes: -h lists flags as the README writes them
// (--csv), and a verb without flags lists none. (Issue 17.)
func TestHelpShowsDoubleDashes(t *testing.T) {
	_, out, errs := runCLI(t, "analyze", "-h")
	if help := out + errs; !strings.Contains(help, "\n  --csv string") || strings.Contains(help, "\n  -csv") {
		t.Errorf("analyze -h:\n%s", help)
	}
	for _, verb := range []string{"check", "ports"} {
		_, out, errs := runCLI(t, verb, "-h")
		if strings.Contains(out+errs, "Flags:") {
			t.Errorf("%s -h shows an empty flag list:\n%s", verb, out+errs)
		}
	}
}

func TestHelpCarriesAdvisory(t *testing.T) {
	for _, args := range [][]string{{"help"}, {"replay", "-h"}, {"run", "-h"}} {
		code, out, errs := runCLI(t, args...)
		if code != 0 || !strings.Contains(out+errs, "not a medical device") {
			t.Errorf("%v: exit %d, advisory missing", args, code)
		}
	}
}

func TestCheckExampleConfig(t *testing.T) {
	code, out, errs := runCLI(t, "check", "configs/breathd.example.yaml")
	if code != 0 || !strings.Contains(out, "bed1") || !strings.Contains(out, "serial /dev/ttyUSB0 at 115200 baud") {
		t.Fatalf("exit %d\n%s%s", code, out, errs)
	}
	code, out, errs = runCLI(t, "check", "configs/simulated-ward.yaml")
	if code != 0 || !strings.Contains(out, "4 device(s)") || !strings.Contains(out, `simulated patient "stiffening lung"`) {
		t.Fatalf("simulated ward: exit %d\n%s%s", code, out, errs)
	}
}

// TestRecordingReplaysWithoutFlags: a stream in an unusual format, recorded
// while replayed with flags, replays from the recording with no flags.
func TestRecordingReplaysWithoutFlags(t *testing.T) {
	dir := t.TempDir()
	src := filepath.Join(dir, "odd.txt")
	var b strings.Builder
	for i := 0; i < 300; i++ {
		// semicolons, mbar, L/s, no time column, flow printed positive outwards
		b.WriteString(strings.Join([]string{ftoa(5 + float64(i%50)/10), ftoa(-0.5 + float64(i%100)/100)}, ";") + "\n")
	}
	os.WriteFile(src, []byte(b.String()), 0o600)
	rec := filepath.Join(dir, "rec")
	code, first, errs := runCLI(t, "replay", "--no-mqtt", "--speed", "max", "--record", rec, "--columns", "paw,flow", "--rate-hz", "50",
		"--unit", "paw=mbar", "--unit", "flow=L/s", "--flow-sign", "-1", src)
	if code != 0 {
		t.Fatalf("exit %d: %s", code, errs)
	}
	files, _ := filepath.Glob(filepath.Join(rec, "odd-*.txt"))
	if len(files) != 1 {
		t.Fatalf("recordings %v", files)
	}
	code, second, errs := runCLI(t, "replay", "--no-mqtt", "--speed", "max", "--id", "odd", files[0])
	if code != 0 {
		t.Fatalf("exit %d: %s", code, errs)
	}
	if first != second || !strings.Contains(first, "samples 300  rate 50.0 Hz") {
		t.Errorf("first run %q, replay of the recording %q", first, second)
	}
}

func ftoa(v float64) string { return strings.TrimRight(strings.TrimRight(strconvF(v), "0"), ".") }

func strconvF(v float64) string { return string(appendF(nil, v)) }

// TestRunReadsPtyAndStopsOnSIGTERM runs the real binary on a pty-backed
// serial device, checks it decodes what the "ventilator" writes, and that
// SIGTERM ends it with exit 0.
func TestRunReadsPtyAndStopsOnSIGTERM(t *testing.T) {
	t.Parallel() // a process of its own, on its own ports and files
	master, slave, err := pty.Open()
	if err != nil {
		t.Skipf("no pseudo-terminal here: %v", err)
	}
	defer master.Close()
	name := slave.Name()
	slave.Close()
	cfg := filepath.Join(t.TempDir(), "pty.yaml")
	os.WriteFile(cfg, []byte("report_every: 100ms\ndevices:\n  - id: bed7\n    serial:\n      path: "+name+"\n"), 0o600)
	cmd := breathd("run", "--listen", "127.0.0.1:0", "--config", cfg)
	stdout, _ := cmd.StdoutPipe()
	stderr := &syncBuffer{}
	cmd.Stderr = stderr
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	lines := bufio.NewScanner(stdout)
	waitFor(t, "the port opened", 10*time.Second, func() bool { return strings.Contains(stderr.String(), "device opened") })
	go func() {
		for i := 0; i < 200; i++ {
			master.WriteString(string(appendLine(nil, float64(i)/100)))
		}
	}()
	seen := false
	deadline := time.After(10 * time.Second)
	found := make(chan bool)
	go func() {
		for lines.Scan() {
			if strings.Contains(lines.Text(), "bed7  samples 200") {
				found <- true
				return
			}
		}
		found <- false
	}()
	select {
	case seen = <-found:
	case <-deadline:
	}
	if !seen {
		cmd.Process.Kill()
		t.Fatalf("never saw 200 samples; stderr:\n%s", stderr.String())
	}
	cmd.Process.Signal(syscall.SIGTERM)
	err = cmd.Wait()
	if err != nil {
		t.Fatalf("after SIGTERM: %v; stderr:\n%s", err, stderr.String())
	}
}

// TestServiceUnitHardening: the systemd unit runs breathd without root,
// without capabilities, on a read-only system, and lets it report ready
// and ping the watchdog.
func TestServiceUnitHardening(t *testing.T) {
	unit, err := os.ReadFile(filepath.Join(root, "configs", "breathd.service"))
	if err != nil {
		t.Fatal(err)
	}
	text := string(unit)
	for _, want := range []string{"DynamicUser=yes", "SupplementaryGroups=dialout", "ProtectSystem=strict",
		"NoNewPrivileges=yes", "CapabilityBoundingSet=\n", "StateDirectory=breathd", "Type=notify", "WatchdogSec=",
		"Restart=on-failure", "DevicePolicy=closed"} {
		if !strings.Contains(text, want) {
			t.Errorf("unit lacks %q", want)
		}
	}
	for _, bad := range []string{"User=root", "AmbientCapabilities=CAP", "PermissionsStartOnly"} {
		if strings.Contains(text, bad) {
			t.Errorf("unit has %q", bad)
		}
	}
}

// TestRotatedRecordingKeepsColumns: a stream whose header names its
// columns in an unusual order is recorded into several files; a later
// file, which has no header line of its own, replays alone with the right
// columns because its format line comes from what the decoder saw.
func TestRotatedRecordingKeepsColumns(t *testing.T) {
	dir := t.TempDir()
	src := filepath.Join(dir, "odd.txt")
	var b strings.Builder
	b.WriteString("flow;t;paw\n")
	for i := 0; i < 90000; i++ { // about 1.6 MB: two files of at most 1 MiB
		fmt.Fprintf(&b, "%.2f;%.2f;%.2f\n", 30*math.Sin(float64(i)/50), float64(i)/100, 10+5*math.Sin(float64(i)/50))
	}
	os.WriteFile(src, []byte(b.String()), 0o600)
	cfg := filepath.Join(dir, "rec.yaml")
	rec := filepath.Join(dir, "rec")
	os.WriteFile(cfg, []byte("mqtt: {off: true}\ndevices:\n  - id: odd\n    file: {path: "+src+"}\n    record: {dir: "+rec+", max_mib: 1}\n"), 0o600)
	if code, _, errs := runCLI(t, "run", "--config", cfg); code != 0 {
		t.Fatal(errs)
	}
	files, _ := filepath.Glob(filepath.Join(rec, "odd-*.txt"))
	if len(files) < 2 {
		t.Fatalf("recordings %v", files)
	}
	later := ""
	for _, f := range files {
		if data, _ := os.ReadFile(f); !strings.Contains(string(data), "\nflow;t;paw\n") {
			later = f
			if !strings.Contains(string(data), "columns=flow,t,paw") || !strings.Contains(string(data), "delimiter=semicolon") {
				t.Fatalf("later file starts %q", string(data[:min(200, len(data))]))
			}
		}
	}
	if later == "" {
		t.Fatal("no file without the header line")
	}
	code, out, errs := runCLI(t, "replay", "--no-mqtt", "--speed", "max", later)
	if code != 0 || !strings.Contains(out, "bad 0") {
		t.Errorf("replay of a later file alone: %d %s%s", code, tail([]byte(out)), errs)
	}
}
