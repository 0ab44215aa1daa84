package main

import (
	"bytes"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/tls"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/json"
	"encoding/pem"
	"fmt"
	"math/big"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	mqtt "github.com/eclipse/paho.mqtt.golang"
)

// needMosquitto skips the test when mosquitto is not installed, unless
// BREATHD_REQUIRE_MOSQUITTO=1 (set by .ci/run) makes that a failure.
func needMosquitto(t *testing.T) string {
	t.Helper()
	path, err := exec.LookPath("mosquitto")
	if err != nil {
		if os.Getenv("BREATHD_REQUIRE_MOSQUITTO") == "1" {
			t.Fatal("mosquitto is not installed but BREATHD_REQUIRE_MOSQUITTO=1: apt-get install -y mosquitto")
		}
		t.Skip("mosquitto is not installed (apt-get install -y mosquitto); skipping the real-broker test")
	}
	return path
}

// freePort returns a loopback port that was free a moment ago.
func freePort(t *testing.T) int {
	t.Helper()
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer l.Close()
	return l.Addr().(*net.TCPAddr).Port
}

// mosquitto is a real broker process started by a test.
type mosquitto struct {
	t    *testing.T
	bin  string
	conf string
	host string // the address it listens on
	port int
	cmd  *exec.Cmd
	log  *bytes.Buffer
}

// startMosquitto writes a config (with persistence, so that sessions
// survive a restart) and starts the broker on an ephemeral port.
func startMosquitto(t *testing.T, extra string, tlsFiles *testTLS) *mosquitto {
	return startMosquittoAt(t, "127.0.0.1", extra, tlsFiles)
}

// startMosquittoAt is startMosquitto listening on host.
func startMosquittoAt(t *testing.T, host, extra string, tlsFiles *testTLS) *mosquitto {
	bin := needMosquitto(t)
	dir := t.TempDir()
	m := &mosquitto{t: t, bin: bin, host: host, port: freePort(t), conf: filepath.Join(dir, "mosquitto.conf")}
	conf := fmt.Sprintf("listener %d %s\npersistence true\npersistence_location %s/\nautosave_interval 1\n"+
		"autosave_on_changes true\nmax_queued_messages 100000\nlog_dest stderr\n", m.port, host, dir)
	if tlsFiles != nil {
		conf += fmt.Sprintf("cafile %s\ncertfile %s\nkeyfile %s\n", tlsFiles.ca, tlsFiles.cert, tlsFiles.key)
	}
	conf += extra
	if os.Geteuid() == 0 {
		conf += "user root\n" // else it drops to user mosquitto, who cannot read the test's files
	}
	if !strings.Contains(extra, "allow_anonymous") {
		conf += "allow_anonymous true\n"
	}
	os.WriteFile(m.conf, []byte(conf), 0o600)
	m.start()
	t.Cleanup(m.stop)
	return m
}

func (m *mosquitto) start() {
	m.log = &bytes.Buffer{}
	m.cmd = exec.Command(m.bin, "-c", m.conf)
	m.cmd.Stderr = m.log
	if err := m.cmd.Start(); err != nil {
		m.t.Fatal(err)
	}
	deadline := time.Now().Add(5 * time.Second)
	for {
		c, err := net.Dial("tcp", net.JoinHostPort(m.host, strconv.Itoa(m.port)))
		if err == nil {
			c.Close()
			return
		}
		if time.Now().After(deadline) {
			m.t.Fatalf("mosquitto did not start: %s", m.log.String())
		}
		time.Sleep(20 * time.Millisecond)
	}
}

// stop ends the broker with SIGTERM, which saves its persistence file.
func (m *mosquitto) stop() {
	if m.cmd != nil && m.cmd.Process != nil {
		m.cmd.Process.Signal(syscall.SIGTERM)
		m.cmd.Wait()
		m.cmd = nil
	}
}

func (m *mosquitto) url(scheme string) string {
	return scheme + "://" + net.JoinHostPort(m.host, strconv.Itoa(m.port))
}

// testTLS is a CA and a server certificate for 127.0.0.1, made here.
type testTLS struct {
	ca, cert, key string
	pool          *x509.CertPool
}

func makeTLS(t *testing.T) *testTLS {
	t.Helper()
	dir := t.TempDir()
	caKey, _ := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	caTmpl := &x509.Certificate{SerialNumber: big.NewInt(1), Subject: pkix.Name{CommonName: "breathd test CA"},
		NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(24 * time.Hour), IsCA: true,
		KeyUsage: x509.KeyUsageCertSign, BasicConstraintsValid: true}
	caDER, err := x509.CreateCertificate(rand.Reader, caTmpl, caTmpl, &caKey.PublicKey, caKey)
	if err != nil {
		t.Fatal(err)
	}
	caCert, _ := x509.ParseCertificate(caDER)
	srvKey, _ := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	srvTmpl := &x509.Certificate{SerialNumber: big.NewInt(2), Subject: pkix.Name{CommonName: "127.0.0.1"},
		NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(24 * time.Hour),
		IPAddresses: []net.IP{net.ParseIP("127.0.0.1")}, KeyUsage: x509.KeyUsageDigitalSignature,
		ExtKeyUsage: []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth}}
	srvDER, err := x509.CreateCertificate(rand.Reader, srvTmpl, caCert, &srvKey.PublicKey, caKey)
	if err != nil {
		t.Fatal(err)
	}
	keyDER, _ := x509.MarshalECPrivateKey(srvKey)
	tt := &testTLS{ca: filepath.Join(dir, "ca.pem"), cert: filepath.Join(dir, "server.pem"), key: filepath.Join(dir, "server.key"),
		pool: x509.NewCertPool()}
	os.WriteFile(tt.ca, pem.EncodeToMemory(&pem.Block{Type: "CERTIFICATE", Bytes: caDER}), 0o600)
	os.WriteFile(tt.cert, pem.EncodeToMemory(&pem.Block{Type: "CERTIFICATE", Bytes: srvDER}), 0o600)
	os.WriteFile(tt.key, pem.EncodeToMemory(&pem.Block{Type: "EC PRIVATE KEY", Bytes: keyDER}), 0o600)
	tt.pool.AddCert(caCert)
	return tt
}

// collector is a QoS 1 subscriber with a persistent session.
type collector struct {
	mu     sync.Mutex
	events map[string]map[string]any // by event id
	dups   int
	status []map[string]any
	active []string // raw payloads, "" for a cleared retained message
	retain map[string]bool
	counts map[string]int
}

func (c *collector) handle(_ mqtt.Client, m mqtt.Message) {
	c.mu.Lock()
	defer c.mu.Unlock()
	topic := m.Topic()
	c.counts[topic[strings.LastIndex(topic, "/")+1:]]++
	var p map[string]any
	json.Unmarshal(m.Payload(), &p)
	switch {
	case strings.HasSuffix(topic, "/event"):
		id, _ := p["id"].(string)
		if _, seen := c.events[id]; seen {
			c.dups++
		}
		c.events[id] = p
	case strings.HasSuffix(topic, "/status"):
		c.status = append(c.status, p)
		c.retain["status"] = m.Retained()
	case strings.HasSuffix(topic, "/active"):
		c.active = append(c.active, string(m.Payload()))
	}
}

// actives are the active-rules payloads received so far.
func (c *collector) actives() []string {
	c.mu.Lock()
	defer c.mu.Unlock()
	return append([]string(nil), c.active...)
}

func (c *collector) snapshot() (events []map[string]any, dups int, status []map[string]any) {
	c.mu.Lock()
	defer c.mu.Unlock()
	for _, e := range c.events {
		events = append(events, e)
	}
	return events, c.dups, append([]map[string]any(nil), c.status...)
}

func (c *collector) count(kind string) int {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.counts[kind]
}

func collect(t *testing.T, url, id string, tc *tls.Config, user, pass string) *collector {
	t.Helper()
	c := &collector{events: map[string]map[string]any{}, retain: map[string]bool{}, counts: map[string]int{}}
	addr := strings.Replace(strings.Replace(url, "mqtts://", "ssl://", 1), "mqtt://", "tcp://", 1)
	subscribed := make(chan error, 1)
	opts := mqtt.NewClientOptions().AddBroker(addr).SetClientID(id).SetCleanSession(false).SetOrderMatters(false).
		SetAutoReconnect(true).SetMaxReconnectInterval(500 * time.Millisecond).SetConnectRetry(true).
		SetConnectRetryInterval(200 * time.Millisecond).SetResumeSubs(true).
		SetOnConnectHandler(func(cl mqtt.Client) {
			tok := cl.Subscribe("breathd/#", 1, c.handle)
			go func() {
				tok.Wait()
				select {
				case subscribed <- tok.Error():
				default: // a later reconnection: nobody waits
				}
			}()
		})
	if tc != nil {
		opts.SetTLSConfig(tc)
	}
	if user != "" {
		opts.SetUsername(user).SetPassword(pass)
	}
	cl := mqtt.NewClient(opts)
	if tok := cl.Connect(); !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		t.Fatalf("collector connect: %v", tok.Error())
	}
	select {
	case err := <-subscribed:
		if err != nil {
			t.Fatalf("collector subscribe: %v", err)
		}
	case <-time.After(5 * time.Second):
		t.Fatal("collector: no subscription")
	}
	t.Cleanup(func() { cl.Disconnect(100) })
	return c
}

func waitFor(t *testing.T, what string, limit time.Duration, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(limit)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out after %v waiting for %s", limit, what)
		}
		time.Sleep(20 * time.Millisecond)
	}
}

// expectedDemoEvents are the demo recording's events by rule and
// transition, from analyze (the same rules, no broker).
func expectedDemoEvents(t *testing.T) []string {
	t.Helper()
	out, err := breathd("analyze", "--events", "-", "testdata/demo.txt.gz").Output()
	if err != nil {
		t.Fatal(err)
	}
	var keys []string
	for _, line := range strings.Split(strings.TrimSpace(string(out)), "\n") {
		var p map[string]any
		json.Unmarshal([]byte(line), &p)
		keys = append(keys, fmt.Sprintf("%s %s %.1f", p["rule"], p["transition"], p["t"]))
	}
	return keys
}

func eventKeys(events []map[string]any) map[string]bool {
	m := map[string]bool{}
	for _, e := range events {
		m[fmt.Sprintf("%s %s %.1f", e["rule"], e["transition"], e["t"])] = true
	}
	return m
}

// TestMosquittoTLSCredentials: breathd publishes to a real Mosquitto over
// TLS (a CA made in the test) with a username and a password file; wrong
// credentials are refused with a clear message; the password never
// appears in any log line, at the most verbose level.
func TestMosquittoTLSCredentials(t *testing.T) {
	t.Parallel() // a process of its own, on its own ports and files
	needMosquitto(t)
	tt := makeTLS(t)
	dir := t.TempDir()
	pwfile := filepath.Join(dir, "passwd")
	if out, err := exec.Command("mosquitto_passwd", "-b", "-c", pwfile, "board7", "s3cret-Pa55").CombinedOutput(); err != nil {
		t.Fatalf("mosquitto_passwd: %v %s", err, out)
	}
	m := startMosquitto(t, "allow_anonymous false\npassword_file "+pwfile+"\n", tt)
	c := collect(t, m.url("mqtts"), "tls-collector", &tls.Config{RootCAs: tt.pool}, "board7", "s3cret-Pa55")
	good := filepath.Join(dir, "good")
	os.WriteFile(good, []byte("s3cret-Pa55\n"), 0o600)
	cmd := breathd("replay", "--speed", "max", "--log-level", "trace", "--broker", m.url("mqtts"), "--ca-file", tt.ca,
		"--username", "board7", "--password-file", good, "testdata/demo.txt.gz")
	out, err := cmd.CombinedOutput()
	if err != nil {
		t.Fatalf("replay over TLS: %v\n%s", err, tail(out))
	}
	waitFor(t, "events over TLS", 10*time.Second, func() bool { ev, _, _ := c.snapshot(); return len(ev) >= 7 })
	if c.count("breath") < 390 {
		t.Errorf("%d breath records over TLS", c.count("breath"))
	}
	if bytes.Contains(out, []byte("s3cret-Pa55")) {
		t.Error("the password appears in breathd's output")
	}

	bad := filepath.Join(dir, "bad")
	os.WriteFile(bad, []byte("wrong\n"), 0o600)
	out, err = breathd("replay", "--speed", "max", "--log-level", "trace", "--broker", m.url("mqtts"), "--ca-file", tt.ca,
		"--username", "board7", "--password-file", bad, "testdata/demo.txt.gz").CombinedOutput()
	if err == nil || !bytes.Contains(out, []byte(`refused the credentials of user "board7"`)) {
		t.Errorf("wrong password: %v\n%s", err, tail(out))
	}
	if bytes.Contains(out, []byte("wrong")) && bytes.Contains(out, []byte("password\":")) {
		t.Error("the wrong password is logged")
	}
	// the password through the environment works too, and is not logged
	cmd = breathd("replay", "--speed", "max", "--log-level", "trace", "--broker", m.url("mqtts"), "--ca-file", tt.ca,
		"--username", "board7", "--password-env", "BREATHD_TEST_PW", "testdata/bad-lines.txt")
	cmd.Env = append(cmd.Env, "BREATHD_TEST_PW=s3cret-Pa55")
	if out, err = cmd.CombinedOutput(); err != nil || bytes.Contains(out, []byte("s3cret-Pa55")) {
		t.Errorf("password from the environment: %v\n%s", err, tail(out))
	}
}

func tail(b []byte) string {
	if len(b) > 3000 {
		b = b[len(b)-3000:]
	}
	return string(b)
}

// TestBrokerRestartsLoseNoEvent: Mosquitto stopped and restarted three
// times during an accelerated replay of the demo recording; every event
// reaches a QoS 1 subscriber with a persistent session (duplicates
// allowed, counted).
func TestBrokerRestartsLoseNoEvent(t *testing.T) {
	t.Parallel() // a process of its own, on its own ports and files
	m := startMosquitto(t, "", nil)
	want := expectedDemoEvents(t)
	c := collect(t, m.url("mqtt"), "restart-collector", nil, "", "")
	state := t.TempDir()
	cmd := breathd("replay", "--speed", "100", "--broker", m.url("mqtt"), "--state-dir", state, "testdata/demo.txt.gz")
	out := &syncBuffer{}
	cmd.Stdout, cmd.Stderr = out, out
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	defer func() {
		if t.Failed() {
			t.Logf("breathd said:\n%s", tail([]byte(out.String())))
		}
	}()
	// the broker goes away after the first, third and fifth event has
	// arrived, and comes back once breathd has noticed (within 20 s: on a
	// loaded CI machine under -race 10 s was once not enough)
	for i, after := range []int{1, 3, 5} {
		waitFor(t, fmt.Sprintf("event %d", after), 30*time.Second, func() bool { ev, _, _ := c.snapshot(); return len(ev) >= after })
		m.stop()
		waitFor(t, "breathd to notice", 20*time.Second, func() bool { return strings.Count(out.String(), "lost the MQTT broker") > i })
		m.start()
	}
	if err := cmd.Wait(); err != nil {
		t.Fatalf("replay: %v\n%s", err, tail([]byte(out.String())))
	}
	waitFor(t, "every event", 20*time.Second, func() bool { ev, _, _ := c.snapshot(); return len(ev) >= len(want) })
	events, dups, _ := c.snapshot()
	got := eventKeys(events)
	for _, w := range want {
		if !got[w] {
			t.Errorf("event %s lost", w)
		}
	}
	t.Logf("%d events expected, %d distinct received, %d duplicates; %d breath records of 398 (QoS 0, dropped while the broker was away)",
		len(want), len(events), dups, c.count("breath"))
}

// TestSIGKILLWhileBrokerDown: breathd killed while the broker is down
// keeps its queued events in the state directory; restarted, it delivers
// them.
func TestSIGKILLWhileBrokerDown(t *testing.T) {
	t.Parallel() // a process of its own, on its own ports and files
	needMosquitto(t)
	port := freePort(t)
	url := fmt.Sprintf("mqtt://127.0.0.1:%d", port)
	state := t.TempDir()
	want := expectedDemoEvents(t)
	cmd := breathd("replay", "--speed", "max", "--id", "demo", "--broker", url, "--state-dir", state, "testdata/demo.txt.gz")
	var out bytes.Buffer
	cmd.Stdout, cmd.Stderr = &out, &out
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	queue := filepath.Join(state, "queue", "demo", "events.log")
	waitFor(t, "the events on disk", 15*time.Second, func() bool {
		b, _ := os.ReadFile(queue)
		return bytes.Count(b, []byte("\n")) >= len(want)
	})
	cmd.Process.Signal(syscall.SIGKILL)
	cmd.Wait()

	// now the broker comes up, a subscriber joins, breathd starts again
	m := startMosquittoOn(t, port)
	c := collect(t, m.url("mqtt"), "kill-collector", nil, "", "")
	again := breathd("replay", "--speed", "max", "--id", "demo", "--broker", url, "--state-dir", state, "testdata/bad-lines.txt")
	if b, err := again.CombinedOutput(); err != nil {
		t.Fatalf("second run: %v\n%s", err, tail(b))
	}
	waitFor(t, "the queued events", 10*time.Second, func() bool { ev, _, _ := c.snapshot(); return len(ev) >= len(want) })
	got := eventKeys(func() []map[string]any { ev, _, _ := c.snapshot(); return ev }())
	for _, w := range want {
		if !got[w] {
			t.Errorf("queued event %s not delivered after the restart", w)
		}
	}
}

func startMosquittoOn(t *testing.T, port int) *mosquitto {
	bin := needMosquitto(t)
	dir := t.TempDir()
	m := &mosquitto{t: t, bin: bin, host: "127.0.0.1", port: port, conf: filepath.Join(dir, "mosquitto.conf")}
	conf := fmt.Sprintf("listener %d 127.0.0.1\nallow_anonymous true\npersistence true\npersistence_location %s/\n", port, dir)
	if os.Geteuid() == 0 {
		conf += "user root\n"
	}
	os.WriteFile(m.conf, []byte(conf), 0o600)
	m.start()
	t.Cleanup(m.stop)
	return m
}

// TestWillAndSIGTERM: after SIGKILL the broker publishes the will (status
// offline, retained); after SIGTERM breathd clears its retained trend and
// active set, publishes the offline status itself, retained, and exits 0.
func TestWillAndSIGTERM(t *testing.T) {
	t.Parallel() // a process of its own, on its own ports and files
	m := startMosquitto(t, "", nil)
	c := collect(t, m.url("mqtt"), "will-collector", nil, "", "")
	out := &syncBuffer{}
	start := func() *exec.Cmd {
		cmd := breathd("replay", "--speed", "1", "--id", "bed5", "--broker", m.url("mqtt"), "testdata/demo.txt.gz")
		cmd.Stdout, cmd.Stderr = out, out
		if err := cmd.Start(); err != nil {
			t.Fatal(err)
		}
		return cmd
	}
	defer func() {
		if t.Failed() {
			t.Logf("breathd said:\n%s", tail([]byte(out.String())))
		}
	}()
	online := func() bool {
		_, _, st := c.snapshot()
		return len(st) > 0 && st[len(st)-1]["state"] == "online"
	}
	lastStatus := func() map[string]any { _, _, st := c.snapshot(); return st[len(st)-1] }

	cmd := start()
	waitFor(t, "online status", 10*time.Second, online)
	cmd.Process.Signal(syscall.SIGKILL)
	cmd.Wait()
	waitFor(t, "the will", 10*time.Second, func() bool { return lastStatus()["state"] == "offline" })
	if r := lastStatus()["reason"]; r != "connection lost" {
		t.Errorf("will reason %v", r)
	}

	cmd = start()
	waitFor(t, "online again", 10*time.Second, online)
	cmd.Process.Signal(syscall.SIGTERM)
	if err := cmd.Wait(); err != nil {
		t.Errorf("exit after SIGTERM: %v (want 0)", err)
	}
	waitFor(t, "offline status", 10*time.Second, func() bool { return lastStatus()["state"] == "offline" })
	if r := lastStatus()["reason"]; r != "stopped" {
		t.Errorf("offline reason %v", r)
	}
	// a new subscriber sees it retained
	late := collect(t, m.url("mqtt"), "late-collector", nil, "", "")
	waitFor(t, "the retained status", 5*time.Second, func() bool {
		_, _, st := late.snapshot()
		return len(st) > 0 && st[0]["state"] == "offline"
	})
	// a clean stop leaves no trend and no raised rules behind (the status
	// arrived after them, so they would have arrived by now)
	if n, a := late.count("trend"), late.actives(); n != 0 || len(a) != 0 {
		t.Errorf("after a clean stop: %d retained trends, active %q", n, a)
	}
}

// TestReplayPublishesAndWatchShows: the README's pair — replay publishing
// to the embedded broker, watch in another process showing it.
func TestReplayPublishesAndWatchShows(t *testing.T) {
	t.Parallel() // a process of its own, on its own ports and files
	port := freePort(t)
	listen := fmt.Sprintf("127.0.0.1:%d", port)
	rep := breathd("replay", "--speed", "50", "--listen", listen, "testdata/demo.txt.gz")
	repOut := &syncBuffer{}
	rep.Stderr = repOut
	if err := rep.Start(); err != nil {
		t.Fatal(err)
	}
	defer func() { rep.Process.Signal(syscall.SIGTERM); rep.Wait() }()
	waitFor(t, "the embedded broker", 10*time.Second, func() bool { return strings.Contains(repOut.String(), "embedded MQTT broker started") })
	w := breathd("watch", "--broker", "mqtt://"+listen)
	out := &syncBuffer{}
	w.Stdout, w.Stderr = out, out
	if err := w.Start(); err != nil {
		t.Fatal(err)
	}
	waitFor(t, "watch to show the device", 15*time.Second, func() bool {
		text := out.String()
		return strings.Contains(text, "demo status online") && strings.Contains(text, "demo breath ")
	})
	w.Process.Signal(syscall.SIGTERM)
	if err := w.Wait(); err != nil {
		t.Errorf("watch after SIGTERM: %v", err)
	}
	text := out.String()
	if !strings.Contains(text, "demo status online") || !strings.Contains(text, "demo breath ") {
		t.Errorf("watch printed:\n%s", tail([]byte(out.String())))
	}
}

// TestSIGTERMDuringBrokerOutage: SIGTERM while the broker is away ends
// breathd with exit 0 after the drain deadline; the undelivered events
// stay in the state directory.
func TestSIGTERMDuringBrokerOutage(t *testing.T) {
	t.Parallel()        // a process of its own, on its own ports and files
	port := freePort(t) // nothing listens there
	state := t.TempDir()
	cmd := breathd("replay", "--id", "bed6", "--broker", fmt.Sprintf("mqtt://127.0.0.1:%d", port), "--state-dir", state, "-")
	stdin, _ := cmd.StdinPipe()
	defer stdin.Close() // referenced to the end, so that no finalizer closes it
	out := &syncBuffer{}
	cmd.Stdout, cmd.Stderr = out, out
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	demo, _ := os.ReadFile(filepath.Join(root, "testdata", "demo.txt.gz"))
	go func() { stdin.Write(demo) }() // stdin stays open: breathd waits for more
	queue := filepath.Join(state, "queue", "bed6", "events.log")
	waitFor(t, "queued events", 15*time.Second, func() bool {
		b, _ := os.ReadFile(queue)
		return bytes.Count(b, []byte("\n")) >= 7
	})
	start := time.Now()
	cmd.Process.Signal(syscall.SIGTERM)
	err := cmd.Wait()
	took := time.Since(start)
	if err != nil {
		t.Errorf("exit after SIGTERM during an outage: %v\n%s", err, tail([]byte(out.String())))
	}
	if took > 9*time.Second {
		t.Errorf("took %v to stop", took)
	}
	if !strings.Contains(out.String(), "queued messages not delivered; they stay in the state directory") {
		t.Errorf("no word on the undelivered events:\n%s", tail([]byte(out.String())))
	}
	t.Logf("stopped %.1f s after SIGTERM", took.Seconds())
}

// TestSIGKILLLeavesNoStaleState: after SIGKILL the retained status is the
// will, which carries nothing that could be older than the last online
// status (no time, no counters); a restart with other rules shows no
// stale raised rule, neither live nor retained.
func TestSIGKILLLeavesNoStaleState(t *testing.T) {
	t.Parallel() // a process of its own, on its own ports and files
	m := startMosquitto(t, "", nil)
	c := collect(t, m.url("mqtt"), "stale-collector", nil, "", "")
	state := t.TempDir()
	cmd := breathd("replay", "--speed", "100", "--id", "bed8", "--broker", m.url("mqtt"), "--state-dir", state, "testdata/demo.txt.gz")
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	waitFor(t, "a raised rule", 20*time.Second, func() bool {
		a := c.actives()
		return len(a) > 0 && strings.Contains(a[len(a)-1], "compliance_falling")
	})
	cmd.Process.Signal(syscall.SIGKILL)
	cmd.Wait()
	lastStatus := func() map[string]any { _, _, st := c.snapshot(); return st[len(st)-1] }
	waitFor(t, "the will", 10*time.Second, func() bool { return lastStatus()["state"] == "offline" })
	will := lastStatus()
	for k := range will {
		if k != "v" && k != "device" && k != "state" && k != "reason" {
			t.Errorf("the will carries %q: %v", k, will)
		}
	}
	if will["device"] != "bed8" || will["reason"] != "connection lost" {
		t.Errorf("will %v", will)
	}

	// the next start switches the raised rule off
	cfg := filepath.Join(t.TempDir(), "other-rules.yaml")
	os.WriteFile(cfg, []byte(fmt.Sprintf(`state_dir: %s
mqtt: {broker: "%s"}
devices:
  - id: bed8
    file: {path: testdata/bad-lines.txt}
    rules:
      - {id: compliance_falling, off: true}
`, state, m.url("mqtt"))), 0o600)
	before := len(c.actives())
	if out, err := breathd("run", "--config", cfg).CombinedOutput(); err != nil {
		t.Fatalf("restart: %v\n%s", err, tail(out))
	}
	waitFor(t, "the new run's active set", 10*time.Second, func() bool { return len(c.actives()) > before })
	for _, a := range c.actives()[before:] {
		if strings.Contains(a, "compliance_falling") {
			t.Errorf("stale active set after the restart: %s", a)
		}
	}
	late := collect(t, m.url("mqtt"), "stale-late", nil, "", "")
	late.mu.Lock()
	retained := append([]string(nil), late.active...)
	late.mu.Unlock()
	for _, a := range retained {
		if strings.Contains(a, "compliance_falling") {
			t.Errorf("stale retained active set: %s", a)
		}
	}
}
