package device

import (
	"bufio"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/creack/pty"
	"github.com/rs/zerolog"
	"golang.org/x/sys/unix"
)

// openPty makes a real pseudo-terminal and points link at its slave end.
func openPty(t *testing.T, link string) (master *os.File) {
	t.Helper()
	m, s, err := pty.Open()
	if err != nil {
		t.Skipf("no pseudo-terminal here: %v", err)
	}
	name := s.Name()
	s.Close() // the port under test opens it by name
	tmp := link + ".new"
	os.Remove(tmp)
	if err := os.Symlink(name, tmp); err != nil {
		t.Fatal(err)
	}
	if err := os.Rename(tmp, link); err != nil {
		t.Fatal(err)
	}
	return m
}

func fastSerial(path string) SerialConfig {
	return SerialConfig{Path: path, Baud: 115200, MinBackoff: 10 * time.Millisecond, MaxBackoff: 50 * time.Millisecond}
}

// readLines reads lines from r in the background.
func readLines(r io.Reader) <-chan string {
	ch := make(chan string, 1000)
	go func() {
		defer close(ch)
		sc := bufio.NewScanner(r)
		for sc.Scan() {
			ch <- sc.Text()
		}
	}()
	return ch
}

func expectLine(t *testing.T, ch <-chan string, want string) {
	t.Helper()
	for {
		select {
		case got, ok := <-ch:
			if !ok {
				t.Fatalf("stream ended waiting for %q", want)
			}
			if got == want {
				return
			}
			if got != "" {
				t.Logf("skipping %q", got)
			}
		case <-time.After(5 * time.Second):
			t.Fatalf("timed out waiting for %q", want)
		}
	}
}

func TestSerialPtyDataUnplugReplug(t *testing.T) {
	link := filepath.Join(t.TempDir(), "ttyVENT")
	master := openPty(t, link)
	port, err := OpenSerial(fastSerial(link), zerolog.Nop())
	if err != nil {
		t.Fatal(err)
	}
	defer port.Close()
	lines := readLines(port)

	master.WriteString("0.00,5.0,0.0\n")
	expectLine(t, lines, "0.00,5.0,0.0")

	// Unplug in the middle of a line: the partial line must be ended, not
	// glued to the first line after the port comes back.
	for round := 1; round <= 10; round++ {
		master.WriteString("0.01,5.")
		waitFor(t, func() bool { return unread(t, link) == 0 }) // the port has the half line
		master.Close()
		waitFor(t, func() bool { return !port.Health().Connected })
		master = openPty(t, link)
		waitFor(t, func() bool { return port.Health().Connected })
		master.WriteString("1.00,6.0,10.0\n")
		expectLine(t, lines, "1.00,6.0,10.0")
		h := port.Health()
		if h.Outages != int64(round) || h.Reopens != int64(round) {
			t.Fatalf("round %d: health %+v", round, h)
		}
	}
	master.Close()
}

// unread is the number of bytes waiting in the pty's input queue, not
// yet read by the port (TIOCINQ on another descriptor of the same
// terminal).
func unread(t *testing.T, path string) int {
	t.Helper()
	f, err := os.OpenFile(path, os.O_RDONLY|unix.O_NOCTTY|unix.O_NONBLOCK, 0)
	if err != nil {
		return -1
	}
	defer f.Close()
	n, err := unix.IoctlGetInt(int(f.Fd()), unix.TIOCINQ)
	if err != nil {
		t.Fatalf("TIOCINQ: %v", err)
	}
	return n
}

func waitFor(t *testing.T, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(5 * time.Second)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatal("condition not reached in 5 s")
		}
		time.Sleep(5 * time.Millisecond)
	}
}

// openedPty makes a pty and opens its slave as a Serial; both are closed
// when the test ends.
func openedPty(t *testing.T) (*os.File, *Serial) {
	t.Helper()
	link := filepath.Join(t.TempDir(), "tty")
	master := openPty(t, link)
	t.Cleanup(func() { master.Close() })
	port, err := OpenSerial(fastSerial(link), zerolog.Nop())
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { port.Close() })
	return master, port
}

// TestSerialBurst: a burst of 2000 lines written at once all arrive.
func TestSerialBurst(t *testing.T) {
	master, port := openedPty(t)
	go func() {
		for i := 0; i < 2000; i++ {
			fmt.Fprintf(master, "%.2f,5.0,0.0\n", float64(i)/100)
		}
	}()
	lines := readLines(port)
	for i := 0; i < 2000; i++ {
		select {
		case <-lines:
		case <-time.After(3 * time.Second):
			t.Fatalf("got %d lines of 2000", i)
		}
	}
}

func TestSerialCloseUnblocksRead(t *testing.T) {
	_, port := openedPty(t)
	done := make(chan error)
	go func() {
		_, err := port.Read(make([]byte, 64))
		done <- err
	}()
	// Read blocks inside the goroutine by now, most likely; Close must
	// end it either way (a Read after Close returns io.EOF as well), so
	// this pause only makes the test exercise the harder order
	time.Sleep(20 * time.Millisecond)
	port.Close()
	port.Close() // twice is fine
	select {
	case err := <-done:
		if !errors.Is(err, io.EOF) {
			t.Errorf("Read after Close: %v, want io.EOF", err)
		}
	case <-time.After(2 * time.Second):
		t.Fatal("Close did not unblock Read")
	}
}

func TestSerialCloseDuringOutage(t *testing.T) {
	link := filepath.Join(t.TempDir(), "tty")
	master := openPty(t, link)
	port, _ := OpenSerial(fastSerial(link), zerolog.Nop())
	done := make(chan error)
	go func() {
		_, err := io.ReadAll(port)
		done <- err
	}()
	master.Close()
	os.Remove(link)
	waitFor(t, func() bool { return port.Health().Outages == 1 })
	port.Close()
	select {
	case err := <-done:
		if err != nil {
			t.Errorf("ReadAll: %v", err)
		}
	case <-time.After(2 * time.Second):
		t.Fatal("Close did not stop the reopen loop")
	}
}

func TestSerialOpenErrors(t *testing.T) {
	_, err := OpenSerial(SerialConfig{Path: "/dev/does-not-exist-breathd"}, zerolog.Nop())
	if !errors.Is(err, fs.ErrNotExist) || !strings.Contains(err.Error(), "check the cable") {
		t.Errorf("absent port: %v", err)
	}
	f := filepath.Join(t.TempDir(), "plain")
	os.WriteFile(f, []byte("x"), 0o600)
	_, err = OpenSerial(SerialConfig{Path: f}, zerolog.Nop())
	if err == nil || !strings.Contains(err.Error(), f) {
		t.Errorf("plain file as port: %v", err)
	}
	for _, c := range []SerialConfig{{Path: "x", Baud: 1}, {Path: "x", DataBits: 9}, {Path: "x", Parity: "maybe"}, {Path: "x", StopBits: 3}, {}} {
		if c.Validate() == nil {
			t.Errorf("%+v accepted", c)
		}
	}
}
