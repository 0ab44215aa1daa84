package device

import (
	"bufio"
	"fmt"
	"path/filepath"
	"testing"
	"time"

	"github.com/rs/zerolog"
)

func TestSerialBurst(t *testing.T) {
	link := filepath.Join(t.TempDir(), "tty")
	master := openPty(t, link)
	defer master.Close()
	port, err := OpenSerial(fastSerial(link), zerolog.Nop())
	if err != nil {
		t.Fatal(err)
	}
	defer port.Close()
	go func() {
		for i := 0; i < 2000; i++ {
			fmt.Fprintf(master, "%.2f,5.0,0.0\n", float64(i)/100)
		}
	}()
	sc := bufio.NewScanner(port)
	n := 0
	done := make(chan struct{})
	go func() {
		for sc.Scan() {
			n++
			if n == 2000 {
				break
			}
		}
		close(done)
	}()
	select {
	case <-done:
	case <-time.After(3 * time.Second):
		t.Fatalf("got %d lines of 2000", n)
	}
}
