package broker

import (
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/pem"
	"errors"
	"fmt"
	"math/big"
	"net"
	"os"
	"path/filepath"
	"runtime"
	"strings"
	"sync"
	"testing"
	"time"

	mqtt "github.com/eclipse/paho.mqtt.golang"
	"github.com/rs/zerolog"
)

// TestRefusesOpenNonLoopback: no open broker beyond loopback, and a taken
// port says which broker to use instead. Common practice, no source.
func TestRefusesOpenNonLoopback(t *testing.T) {
	for _, addr := range []string{"0.0.0.0:0", "[::]:0", ":0"} {
		_, err := Start(Config{Listen: addr}, zerolog.Nop())
		if err == nil || !strings.Contains(err.Error(), "refusing to start an open MQTT broker") {
			t.Errorf("%s: %v", addr, err)
		}
	}
	b, err := Start(Config{Listen: "127.0.0.1:0"}, zerolog.Nop())
	if err != nil {
		t.Fatal(err)
	}
	defer b.Close()
	_, err = Start(Config{Listen: b.Addr()}, zerolog.Nop())
	if !errors.Is(err, ErrPortBusy) || !strings.Contains(err.Error(), "publish there with --broker mqtt://"+b.Addr()+" and a device id of this run's own") {
		t.Errorf("busy port: %v", err)
	}
	if _, err := Start(Config{Listen: "no-port"}, zerolog.Nop()); err == nil || !strings.Contains(err.Error(), "want host:port") {
		t.Errorf("bad address: %v", err)
	}
}

// TestPasswordFileErrors: every malformed password file is refused at
// start with its path and line; a missing one keeps fs.ErrNotExist.
func TestPasswordFileErrors(t *testing.T) {
	dir := t.TempDir()
	for name, c := range map[string]struct{ text, want string }{
		"empty password": {"# boards\nboard1:\n", "passwd:2: want user:password"},
		"no colon":       {"board1\n", "passwd:1: want user:password"},
		"no user":        {":secret\n", "passwd:1: want user:password"},
		"no users":       {"# nobody\n\n", "has no users"},
	} {
		path := filepath.Join(dir, "passwd")
		os.WriteFile(path, []byte(c.text), 0o600)
		_, err := Start(Config{Listen: "127.0.0.1:0", PasswordFile: path}, zerolog.Nop())
		if err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%s: %v", name, err)
		}
	}
	_, err := Start(Config{Listen: "127.0.0.1:0", PasswordFile: filepath.Join(dir, "absent")}, zerolog.Nop())
	if !errors.Is(err, os.ErrNotExist) {
		t.Errorf("missing file: %v", err)
	}
	users, err := readPasswordFile(writeFile(t, dir, "board1:correct-horse\n# c\n  board2:x:y  \n"))
	if err != nil || len(users) != 2 || string(users["board2"].password) != "x:y" {
		t.Errorf("users %v, %v", users, err)
	}
}

func writeFile(t *testing.T, dir, text string) string {
	t.Helper()
	path := filepath.Join(dir, "ok")
	if err := os.WriteFile(path, []byte(text), 0o600); err != nil {
		t.Fatal(err)
	}
	return path
}

// TestClientAddress: a broker listening on every address is reached on
// loopback; an IPv6 address is written in brackets. RFC 3986 for the
// brackets.
func TestClientAddress(t *testing.T) {
	dir := t.TempDir()
	pw := writeFile(t, dir, "board1:correct-horse\n")
	cert, key := selfSigned(t, dir)
	b, err := Start(Config{Listen: "0.0.0.0:0", PasswordFile: pw, CertFile: cert, KeyFile: key}, zerolog.Nop())
	if err != nil {
		t.Fatal(err)
	}
	defer b.Close()
	if !strings.HasPrefix(b.URL(), "mqtt://127.0.0.1:") {
		t.Errorf("wildcard listener: URL %s (listening on %s)", b.URL(), b.Addr())
	}
	b6, err := Start(Config{Listen: "[::1]:0"}, zerolog.Nop())
	if err != nil {
		t.Skipf("no IPv6 loopback: %v", err)
	}
	defer b6.Close()
	if !strings.HasPrefix(b6.URL(), "mqtt://[::1]:") {
		t.Errorf("IPv6 listener: URL %s", b6.URL())
	}
}

// client connects a paho client as user (anonymous when ""), or returns
// the connection error.
func client(t *testing.T, b *Broker, id, user, pass string) (mqtt.Client, error) {
	t.Helper()
	opts := mqtt.NewClientOptions().AddBroker("tcp://" + b.LocalAddr()).SetClientID(id).SetAutoReconnect(false).
		SetConnectTimeout(5 * time.Second).SetCleanSession(true)
	if user != "" {
		opts.SetUsername(user).SetPassword(pass)
	}
	c := mqtt.NewClient(opts)
	tok := c.Connect()
	if !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		return nil, fmt.Errorf("connect %s: %v", id, tok.Error())
	}
	t.Cleanup(func() { c.Disconnect(50) })
	return c, nil
}

// inbox subscribes c to filter and collects what arrives, by topic.
type inbox struct {
	mu  sync.Mutex
	got map[string][]string
}

func subscribeAll(t *testing.T, c mqtt.Client, filter string) *inbox {
	t.Helper()
	in := &inbox{got: map[string][]string{}}
	tok := c.Subscribe(filter, 1, func(_ mqtt.Client, m mqtt.Message) {
		in.mu.Lock()
		defer in.mu.Unlock()
		in.got[m.Topic()] = append(in.got[m.Topic()], string(m.Payload()))
	})
	if !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		t.Fatalf("subscribe: %v", tok.Error())
	}
	return in
}

func (in *inbox) all(topic string) []string {
	in.mu.Lock()
	defer in.mu.Unlock()
	return append([]string(nil), in.got[topic]...)
}

// accessBroker starts a broker with a password file of one user granted
// ack ("nurse") and one not ("viewer").
func accessBroker(t *testing.T, cfg Config) *Broker {
	t.Helper()
	cfg.Listen = "127.0.0.1:0"
	cfg.PasswordFile = writeFile(t, t.TempDir(), "# who may acknowledge\nack nurse:n-secret-1\nviewer:v-secret-2\n")
	b, err := Start(cfg, zerolog.Nop())
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { b.Close() })
	return b
}

// TestAccessRules: only breathd's publisher writes a device's topics;
// anonymous clients and users read; only a user granted ack writes ack,
// and never retained. A forged message never reaches a subscriber and
// the retained state stays as breathd left it. Common practice (least
// privilege), no source.
func TestAccessRules(t *testing.T) {
	b := accessBroker(t, Config{})
	user, secret := b.Publisher()
	pub, err := client(t, b, "breathd-host-bed1", user, secret)
	if err != nil {
		t.Fatal(err)
	}
	pub.Publish("breathd/bed1/active", 1, true, `{"active":[{"rule":"dp_high"}]}`).Wait()
	watcher, err := client(t, b, "watcher", "", "")
	if err != nil {
		t.Fatalf("anonymous read-only client refused: %v", err)
	}
	in := subscribeAll(t, watcher, "breathd/#")
	waitUntil(t, "the retained active set", func() bool { return len(in.all("breathd/bed1/active")) == 1 })

	anon, _ := client(t, b, "intruder", "", "")
	viewer, err := client(t, b, "viewer-1", "viewer", "v-secret-2")
	if err != nil {
		t.Fatal(err)
	}
	nurse, err := client(t, b, "nurse-1", "nurse", "n-secret-1")
	if err != nil {
		t.Fatal(err)
	}
	for _, topic := range []string{"breathd/bed1/ack", "breathd/bed1/active", "breathd/bed1/status", "breathd/bed1/event",
		"breathd/bed1/breath", "breathd/bed1/trend", "breathd/phantom/breath"} {
		anon.Publish(topic, 0, true, `{"active":[]}`).Wait()
		anon.Publish(topic, 0, false, "forged").Wait()
		viewer.Publish(topic, 0, false, "forged").Wait()
	}
	nurse.Publish("breathd/bed1/active", 0, true, `{"active":[]}`).Wait()
	nurse.Publish("breathd/bed1/ack", 0, true, "bed1/dp_high/r1-3").Wait() // retained: refused
	nurse.Publish("breathd/bed1/ack", 0, false, "bed1/dp_high/r1-4").Wait()
	pub.Publish("breathd/bed1/status", 0, false, "end").Wait() // a marker: everything before it was handled
	waitUntil(t, "the marker", func() bool { return len(in.all("breathd/bed1/status")) == 1 })
	for topic, got := range in.got {
		switch topic {
		case "breathd/bed1/active": // breathd's, perhaps twice (live and retained)
			for _, g := range got {
				if !strings.Contains(g, "dp_high") {
					t.Errorf("active forged: %v", got)
				}
			}
		case "breathd/bed1/ack":
			if len(got) != 1 || got[0] != "bed1/dp_high/r1-4" {
				t.Errorf("ack: %v, want only the granted user's, not retained", got)
			}
		case "breathd/bed1/status":
			if len(got) != 1 || got[0] != "end" {
				t.Errorf("status forged: %v", got)
			}
		default:
			t.Errorf("%s forged: %v", topic, got)
		}
	}
	// a new subscriber sees breathd's retained active set, not a forgery
	late, _ := client(t, b, "late", "", "")
	lin := subscribeAll(t, late, "breathd/+/active")
	waitUntil(t, "the retained set", func() bool { return len(lin.all("breathd/bed1/active")) >= 1 })
	if got := lin.all("breathd/bed1/active")[0]; !strings.Contains(got, "dp_high") {
		t.Errorf("retained active %s", got)
	}
	if _, err := client(t, b, "x", "nurse", "wrong"); err == nil {
		t.Error("a wrong password admitted")
	}
	if _, err := client(t, b, "y", PublisherUser, "guess"); err == nil {
		t.Error("breathd's user admitted without this run's secret")
	}
}

// TestClientIDNotHijacked: a client that reuses the id of breathd's
// publisher is refused, and the publisher stays connected.
func TestClientIDNotHijacked(t *testing.T) {
	b := accessBroker(t, Config{})
	user, secret := b.Publisher()
	pub, err := client(t, b, "breathd-host-bed2", user, secret)
	if err != nil {
		t.Fatal(err)
	}
	for _, who := range [][2]string{{"", ""}, {"nurse", "n-secret-1"}} {
		if _, err := client(t, b, "breathd-host-bed2", who[0], who[1]); err == nil {
			t.Errorf("%q took breathd's client id", who[0])
		}
	}
	if !pub.IsConnectionOpen() {
		t.Error("the publisher was knocked off")
	}
}

// TestNoAnonymous: with NoAnonymous a client must log in even to read.
func TestNoAnonymous(t *testing.T) {
	b := accessBroker(t, Config{NoAnonymous: true})
	if _, err := client(t, b, "anon", "", ""); err == nil {
		t.Error("anonymous client admitted")
	}
	if _, err := client(t, b, "viewer-1", "viewer", "v-secret-2"); err != nil {
		t.Error(err)
	}
}

// TestLimits: a packet over the limit is refused before it is read into
// memory (13 of 20 MB leave the heap where it was), and retained topics
// stop at their limit.
func TestLimits(t *testing.T) {
	b := accessBroker(t, Config{Limits: Limits{Retained: 5}})
	var ms0, ms1 runtime.MemStats
	runtime.GC()
	runtime.ReadMemStats(&ms0)
	big := strings.Repeat("x", 20<<20)
	for i := range 13 {
		c, err := client(t, b, fmt.Sprintf("big-%d", i), "nurse", "n-secret-1")
		if err != nil {
			t.Fatal(err)
		}
		c.Publish("breathd/bed1/ack", 0, false, big).WaitTimeout(2 * time.Second)
	}
	runtime.GC()
	runtime.ReadMemStats(&ms1)
	if grew := int64(ms1.HeapAlloc) - int64(ms0.HeapAlloc); grew > 8<<20 {
		t.Errorf("heap grew %d MB", grew>>20)
	}
	user, secret := b.Publisher()
	pub, _ := client(t, b, "breathd-host-bed3", user, secret)
	for i := range 8 {
		pub.Publish(fmt.Sprintf("breathd/bed%d/trend", i), 1, true, "{}").Wait()
	}
	pub.Publish("breathd/bed0/trend", 1, true, `{"again":1}`).Wait() // an existing topic is replaced
	late, _ := client(t, b, "late", "", "")
	in := subscribeAll(t, late, "breathd/+/trend")
	count := func() (n int) { // topics with a retained trend
		for i := range 8 {
			n += min(1, len(in.all(fmt.Sprintf("breathd/bed%d/trend", i))))
		}
		return n
	}
	waitUntil(t, "the retained trends", func() bool { return count() >= 5 })
	pub.Publish("breathd/marker/trend", 0, false, "end").Wait() // after the retained ones
	waitUntil(t, "the marker", func() bool { return len(in.all("breathd/marker/trend")) == 1 })
	if n := count(); n != 5 {
		t.Errorf("%d retained trends, limit 5", n)
	}
	if got := in.all("breathd/bed0/trend"); got[len(got)-1] != `{"again":1}` {
		t.Errorf("bed0 trend %s", got)
	}
}

func waitUntil(t *testing.T, what string, cond func() bool) {
	t.Helper()
	for deadline := time.Now().Add(5 * time.Second); !cond(); {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting for %s", what)
		}
		time.Sleep(5 * time.Millisecond)
	}
}

// selfSigned writes a self-signed certificate for 127.0.0.1 and its key.
func selfSigned(t *testing.T, dir string) (cert, key string) {
	t.Helper()
	k, _ := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	tmpl := &x509.Certificate{SerialNumber: big.NewInt(1), Subject: pkix.Name{CommonName: "127.0.0.1"},
		NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(time.Hour),
		IPAddresses: []net.IP{net.ParseIP("127.0.0.1")}, ExtKeyUsage: []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth}}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, tmpl, &k.PublicKey, k)
	if err != nil {
		t.Fatal(err)
	}
	kder, _ := x509.MarshalECPrivateKey(k)
	cert, key = filepath.Join(dir, "cert.pem"), filepath.Join(dir, "key.pem")
	os.WriteFile(cert, pem.EncodeToMemory(&pem.Block{Type: "CERTIFICATE", Bytes: der}), 0o600)
	os.WriteFile(key, pem.EncodeToMemory(&pem.Block{Type: "EC PRIVATE KEY", Bytes: kder}), 0o600)
	return cert, key
}
