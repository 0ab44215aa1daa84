package main

import (
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"

	"golang.org/x/sys/unix"
)

// TestTruncatedGzipOnStdin: standard input that starts with a cut gzip
// header is one clear error line, not a panic; a gzip file cut in half
// gives its good part and then says so. (Issue 16, item 3.)
func TestTruncatedGzipOnStdin(t *testing.T) {
	t.Parallel() // a process of its own
	cmd := breathd("analyze", "-")
	cmd.Stdin = strings.NewReader("\x1f\x8b\x08\x00")
	out, err := cmd.CombinedOutput()
	if err == nil || strings.Contains(string(out), "panic") || strings.Count(strings.TrimSpace(string(out)), "\n") != 0 ||
		!strings.Contains(string(out), "gzip") {
		t.Errorf("cut gzip header on stdin: %v\n%s", err, out)
	}
	// half a gzip file: the good part is analysed, then one line says the rest is cut
	demo, _ := os.ReadFile(filepath.Join(root, "testdata", "demo.txt.gz"))
	half := filepath.Join(t.TempDir(), "half.txt.gz")
	os.WriteFile(half, demo[:len(demo)/2], 0o600)
	out, err = breathd("analyze", half).CombinedOutput()
	if err == nil || !strings.Contains(string(out), "unexpected EOF") || !strings.Contains(string(out), " breaths in ") {
		t.Errorf("half a gzip file: %v\n%s", err, out)
	}
}

// ptyUnread is the number of bytes waiting in a pty's input queue
// (TIOCINQ on another descriptor of the same terminal), or -1.
func ptyUnread(path string) int {
	f, err := os.OpenFile(path, os.O_RDONLY|unix.O_NOCTTY|unix.O_NONBLOCK, 0)
	if err != nil {
		return -1
	}
	defer f.Close()
	n, err := unix.IoctlGetInt(int(f.Fd()), unix.TIOCINQ)
	if err != nil {
		return -1
	}
	return n
}

// TestSimulatePtyStopsWhenNobodyReads: with nobody reading the pty, the
// simulator blocks writing; Ctrl-C (SIGINT) still ends it at once, and
// its last line says how much it simulated, not the scenario's whole
// length. Through a real pty. (Issue 16, item 9.)
func TestSimulatePtyStopsWhenNobodyReads(t *testing.T) {
	t.Parallel() // a process of its own
	link := filepath.Join(t.TempDir(), "vent")
	sim := breathd("simulate", "--pty", "--link", link, "--speed", "max", "--duration", "1h")
	out := &syncBuffer{}
	sim.Stderr = out
	if err := sim.Start(); err != nil {
		t.Fatal(err)
	}
	waitFor(t, "the pty", 10*time.Second, func() bool { return strings.Contains(out.String(), "simulated ventilator on") })
	waitFor(t, "the pty's buffer to fill", 10*time.Second, func() bool { return ptyUnread(link) > 1000 })
	sim.Process.Signal(syscall.SIGINT)
	done := make(chan error, 1)
	go func() { done <- sim.Wait() }()
	select {
	case err := <-done:
		if err != nil {
			t.Errorf("exit after Ctrl-C: %v\n%s", err, out.String())
		}
	case <-time.After(5 * time.Second):
		sim.Process.Kill()
		<-done
		t.Fatalf("Ctrl-C ignored while nobody reads the pty:\n%s", out.String())
	}
	last := strings.TrimSpace(out.String())
	last = last[strings.LastIndex(last, "\n")+1:]
	if !strings.HasPrefix(last, "stopped after ") || !strings.Contains(last, "of the 1h0m0s scenario") {
		t.Errorf("last line %q", last)
	}
}

// TestCleanStopIsQuiet: SIGTERM with a subscriber connected to the
// embedded broker ends without a warning. (Issue 17: every clean stop
// printed "use of closed network connection".)
func TestCleanStopIsQuiet(t *testing.T) {
	t.Parallel() // a process of its own, on its own ports and files
	listen := "127.0.0.1:" + strconv.Itoa(freePort(t))
	cmd := breathd("replay", "--speed", "10", "--id", "quiet", "--listen", listen, "testdata/demo.txt.gz")
	out := &syncBuffer{}
	cmd.Stdout, cmd.Stderr = out, out
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	waitFor(t, "the broker", 10*time.Second, func() bool { return strings.Contains(out.String(), "embedded MQTT broker started") })
	c := collectBreaths(t, "mqtt://"+listen)
	waitFor(t, "a breath", 10*time.Second, func() bool { return len(c.seqs("quiet")) > 0 })
	cmd.Process.Signal(syscall.SIGTERM)
	if err := cmd.Wait(); err != nil {
		t.Fatalf("exit: %v", err)
	}
	for _, line := range strings.Split(out.String(), "\n") {
		if strings.Contains(line, `"level":"warn"`) || strings.Contains(line, `"level":"error"`) {
			t.Errorf("a clean stop said: %s", line)
		}
	}
}
