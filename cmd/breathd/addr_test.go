package main

import (
	"fmt"
	"net"
	"regexp"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"
)

// needIPv6 skips when this machine has no IPv6 loopback.
func needIPv6(t *testing.T) {
	t.Helper()
	l, err := net.Listen("tcp", "[::1]:0")
	if err != nil {
		t.Skipf("no IPv6 loopback here: %v", err)
	}
	l.Close()
}

// TestBrokerOverIPv6: breathd publishes to a real Mosquitto listening on
// ::1 only, given as mqtt://[::1]:PORT; every breath of the replay reaches a
// subscriber there. Common practice (RFC 3986 brackets), no source.
func TestBrokerOverIPv6(t *testing.T) {
	t.Parallel() // a process of its own, on its own ports and files
	needIPv6(t)
	m := startMosquittoAt(t, "::1", "", nil)
	url := m.url("mqtt")
	if !strings.HasPrefix(url, "mqtt://[::1]:") {
		t.Fatalf("url %s", url)
	}
	c := collectBreaths(t, url)
	out, err := breathd("replay", "--speed", "max", "--id", "v6", "--broker", url, "testdata/demo.txt.gz").CombinedOutput()
	if err != nil {
		t.Fatalf("replay: %v\n%s", err, tail(out))
	}
	n := breathsSaid(t, out)
	waitFor(t, "every breath over IPv6", 10*time.Second, func() bool { return len(c.seqs("v6")) == n })
}

// TestEmbeddedBrokerOnIPv6: --listen [::1]:PORT starts the embedded broker
// there, breathd's publisher reaches it, and so does a subscriber; the
// hint printed is usable as it stands.
func TestEmbeddedBrokerOnIPv6(t *testing.T) {
	t.Parallel() // a process of its own, on its own ports and files
	needIPv6(t)
	l, err := net.Listen("tcp", "[::1]:0")
	if err != nil {
		t.Fatal(err)
	}
	port := l.Addr().(*net.TCPAddr).Port
	l.Close()
	listen := net.JoinHostPort("::1", strconv.Itoa(port))
	cmd := breathd("replay", "--speed", "50", "--id", "v6e", "--listen", listen, "testdata/demo.txt.gz")
	out := &syncBuffer{}
	cmd.Stdout, cmd.Stderr = out, out
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	defer func() { cmd.Process.Signal(syscall.SIGTERM); cmd.Wait() }()
	waitFor(t, "the embedded broker", 10*time.Second, func() bool { return strings.Contains(out.String(), "embedded MQTT broker started") })
	if want := fmt.Sprintf("mosquitto_sub -h ::1 -p %d", port); !strings.Contains(out.String(), want) {
		t.Errorf("hint: want %q in\n%s", want, out.String())
	}
	c := collectBreaths(t, "mqtt://"+listen)
	waitFor(t, "breaths over IPv6", 20*time.Second, func() bool { return len(c.seqs("v6e")) >= 3 })
}

// breathsSaid is the breath count of replay's last report line.
func breathsSaid(t *testing.T, out []byte) int {
	t.Helper()
	m := regexp.MustCompile(`breaths (\d+) `).FindAllSubmatch(out, -1)
	if m == nil {
		t.Fatalf("no breath count in:\n%s", tail(out))
	}
	n, _ := strconv.Atoi(string(m[len(m)-1][1]))
	return n
}
