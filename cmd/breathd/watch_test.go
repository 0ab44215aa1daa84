package main

import (
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"
	"unicode/utf8"

	"github.com/creack/pty"
)

// TestWatchFits80x24: watch on a real pseudo-terminal of 80 columns and 24
// rows, with the four devices of the simulated ward publishing, draws
// every line within 80 columns and the whole screen within 24 rows, with
// its header, the units and every device. Common practice, no source: the
// classic terminal size.
func TestWatchFits80x24(t *testing.T) {
	t.Parallel() // processes of their own, on their own ports and files
	port := freePort(t)
	listen := fmt.Sprintf("127.0.0.1:%d", port)
	dir := t.TempDir()
	conf := filepath.Join(dir, "ward.yaml")
	var b strings.Builder
	for i, sc := range []string{"steady-vc", "stiffening-lung", "bronchospasm", "waking-on-support"} {
		fmt.Fprintf(&b, "  - id: bed%d\n    simulate: {scenario: configs/scenarios/%s.yaml, speed: 10}\n", i+1, sc)
	}
	os.WriteFile(conf, []byte("devices:\n"+b.String()), 0o600)
	run := breathd("run", "--listen", listen, "--config", conf)
	runOut := &syncBuffer{}
	run.Stdout, run.Stderr = runOut, runOut
	if err := run.Start(); err != nil {
		t.Fatal(err)
	}
	defer func() { run.Process.Signal(syscall.SIGTERM); run.Wait() }()
	waitFor(t, "the embedded broker", 15*time.Second, func() bool { return strings.Contains(runOut.String(), "embedded MQTT broker started") })

	master, slave, err := pty.Open()
	if err != nil {
		t.Skipf("no pseudo-terminal: %v", err)
	}
	defer master.Close()
	if err := pty.Setsize(master, &pty.Winsize{Cols: 80, Rows: 24}); err != nil {
		t.Fatal(err)
	}
	w := breathd("watch", "--broker", "mqtt://"+listen)
	w.Stdout, w.Stderr = slave, slave
	if err := w.Start(); err != nil {
		t.Fatal(err)
	}
	slave.Close()
	defer func() { w.Process.Signal(syscall.SIGTERM); w.Wait() }()
	screen := &syncBuffer{}
	go io.Copy(screen, master)

	// the last frame drawn: after the last clear-screen
	frame := func() string {
		s := screen.String()
		if i := strings.LastIndex(s, "\x1b[2J"); i >= 0 {
			s = s[i+len("\x1b[2J"):]
		}
		return strings.ReplaceAll(s, "\r", "")
	}
	var last string
	defer func() {
		if t.Failed() {
			t.Logf("last frame:\n%s\nbreathd run said:\n%s", frame(), tail([]byte(runOut.String())))
		}
	}()
	waitFor(t, "every device with a breath and a trend", 30*time.Second, func() bool {
		last = frame()
		return strings.Count(last, "  #") == 4 && strings.Count(last, "median of") == 4 && strings.Count(last, "online") == 4 && strings.HasSuffix(last, "\n")
	})
	t.Logf("watch at 80×24:\n%s", last)
	rows := strings.Split(strings.TrimSuffix(last, "\n"), "\n")
	if len(rows) > 24 {
		t.Errorf("%d rows on a 24-row terminal", len(rows))
	}
	for _, r := range rows {
		if n := utf8.RuneCountInString(r); n > 80 {
			t.Errorf("%d columns: %q", n, r)
		}
	}
	for _, want := range []string{"breathd watch", "advisory only", "cmH2O", "mL/cmH2O", "bed1", "bed2", "bed3", "bed4", "raised"} {
		if !strings.Contains(last, want) {
			t.Errorf("no %q on the screen", want)
		}
	}
	if strings.Contains(last, "RAISED") {
		t.Error("all-caps level words on the screen")
	}
}
