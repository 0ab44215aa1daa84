package main

import (
	"crypto/tls"
	"fmt"
	"net"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"sync/atomic"
	"syscall"
	"testing"
	"time"

	mqtt "github.com/eclipse/paho.mqtt.golang"
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
	out := startBreathd(t, "embedded MQTT broker started", "replay", "--speed", "50", "--id", "v6e", "--listen", listen, "testdata/demo.txt.gz")
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

// TestEmbeddedBrokerOnEveryAddress: --listen 0.0.0.0:PORT needs a password
// file and TLS; with both, breathd's own publisher reaches the broker (on
// a loopback listener of its own) and a user of the password file reads
// the breaths over TLS on that port.
func TestEmbeddedBrokerOnEveryAddress(t *testing.T) {
	t.Parallel() // a process of its own, on its own ports and files
	tt := makeTLS(t)
	pw := filepath.Join(t.TempDir(), "passwd")
	os.WriteFile(pw, []byte("viewer:v-secret-9\n"), 0o600)
	port := freePort(t)
	listen := fmt.Sprintf("0.0.0.0:%d", port)
	if out, err := breathd("replay", "--listen", listen, "--broker-passwords", pw, "testdata/bad-lines.txt").CombinedOutput(); err == nil ||
		!strings.Contains(string(out), "give the broker a certificate and key") {
		t.Errorf("off loopback without TLS: %v\n%s", err, out)
	}
	out := startBreathd(t, "embedded MQTT broker started", "replay", "--speed", "50", "--id", "ward", "--listen", listen,
		"--broker-passwords", pw, "--broker-cert", tt.cert, "--broker-key", tt.key, "testdata/demo.txt.gz")
	opts := mqtt.NewClientOptions().AddBroker(fmt.Sprintf("ssl://127.0.0.1:%d", port)).SetClientID("ward-viewer").
		SetUsername("viewer").SetPassword("v-secret-9").SetTLSConfig(&tls.Config{RootCAs: tt.pool, ServerName: "127.0.0.1"})
	c := mqtt.NewClient(opts)
	if tok := c.Connect(); !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		t.Fatalf("viewer over TLS: %v\n%s", tok.Error(), out.String())
	}
	defer c.Disconnect(50)
	var n atomic.Int64
	if tok := c.Subscribe("breathd/ward/breath", 0, func(mqtt.Client, mqtt.Message) { n.Add(1) }); !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		t.Fatal(tok.Error())
	}
	waitFor(t, "breaths over TLS on 0.0.0.0", 20*time.Second, func() bool { return n.Load() >= 3 })
}

// startBreathd starts breathd with args, stopped with SIGTERM when the test
// ends, and waits until its output says ready.
func startBreathd(t *testing.T, ready string, args ...string) *syncBuffer {
	t.Helper()
	cmd := breathd(args...)
	out := &syncBuffer{}
	cmd.Stdout, cmd.Stderr = out, out
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { cmd.Process.Signal(syscall.SIGTERM); cmd.Wait() })
	waitFor(t, "breathd to say "+ready, 10*time.Second, func() bool { return strings.Contains(out.String(), ready) })
	return out
}

// TestWatchCleansUntrustedText: escape sequences, newlines and
// bidirectional overrides in a message never reach the terminal as they
// are. Common practice (terminal escape injection), no source.
func TestWatchCleansUntrustedText(t *testing.T) {
	evil := "\x1b]0;owned\x07\x1b[2Jrule\nFAKE LINE\u202e\x9b31m"
	p := clean(map[string]any{"rule": evil, "flags": []any{evil}, evil: 1.0}).(map[string]any)
	line := watchLine(cleanText("bed\x1b[1m"), "event", p)
	screen := renderWatch(map[string]*deviceView{cleanText("bed\x1b[1m"): {breath: p, active: []any{p}}}, 80, 24)
	for _, out := range []string{line, screen, fmt.Sprint(p)} {
		for _, r := range out {
			if r == 0x1b || r == 0x07 || r == 0x9b || r == '\u202e' {
				t.Errorf("control character %U in %q", r, out)
			}
		}
	}
	if strings.Contains(line, "\n") {
		t.Errorf("a newline from a message in %q", line)
	}
}
