// Package broker is the embedded MQTT broker breathd starts when no broker is
// configured (mochi-mqtt), with breathd's own access rules:
//
//   - breathd's publisher logs in with a secret made for this run (Publisher)
//     and is the only client that may publish under the devices' topics, or
//     use the client ids it has used;
//   - a user of the password file may subscribe; a user granted "ack" may
//     also publish to <root>/<device>/ack, not retained;
//   - an anonymous client may subscribe only (NoAnonymous refuses it);
//   - nobody else publishes anything.
//
// Off loopback it needs the password file and TLS (certificate and key);
// breathd's own clients then use a second listener on loopback. Packets,
// retained messages and clients are bounded (Limits).
package broker

import (
	"bufio"
	"context"
	"crypto/rand"
	"crypto/subtle"
	"crypto/tls"
	"encoding/hex"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"os"
	"regexp"
	"strings"
	"sync"
	"syscall"

	mochi "github.com/mochi-mqtt/server/v2"
	"github.com/mochi-mqtt/server/v2/listeners"
	"github.com/mochi-mqtt/server/v2/packets"
	"github.com/rs/zerolog"
)

// DefaultListen is where the embedded broker listens by default.
const DefaultListen = "127.0.0.1:1883"

// PublisherUser is the user name breathd's own publisher logs in with; a
// password file may not list it.
const PublisherUser = "breathd-publisher"

// Limits bound what clients can make the broker hold.
type Limits struct {
	Clients  int64  // connected clients; default 64
	Packet   uint32 // bytes in one packet; default 256 KiB
	Retained int    // retained topics; default 4096
}

// Config configures the embedded MQTT broker.
type Config struct {
	Listen string // host:port; default DefaultListen. Port 0 picks a free one.
	// PasswordFile holds "user:password" lines, or "ack user:password" for
	// a user who may acknowledge events ('#' comments). Required off
	// loopback.
	PasswordFile string
	// CertFile and KeyFile (PEM) make the listener TLS; required off
	// loopback.
	CertFile, KeyFile string
	// NoAnonymous refuses clients without a user name; by default they
	// may subscribe (read-only).
	NoAnonymous bool
	Root        string // the devices' topic root; default "breathd"
	Limits      Limits
}

// ErrPortBusy is returned when the broker's port is taken.
var ErrPortBusy = errors.New("port in use")

// Broker is the embedded MQTT broker.
type Broker struct {
	srv    *mochi.Server
	addr   string // the configured listener's address
	local  string // where breathd's own clients connect
	secret string
	once   sync.Once
}

// IsLoopback reports whether host:port listens on loopback only.
func IsLoopback(hostport string) bool {
	host, _, err := net.SplitHostPort(hostport)
	if err != nil {
		return false
	}
	if host == "localhost" {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}

// Start starts the embedded broker. It refuses to listen beyond loopback
// without a password file and TLS, and says what to do when the port is
// taken.
func Start(cfg Config, log zerolog.Logger) (*Broker, error) {
	if cfg.Listen == "" {
		cfg.Listen = DefaultListen
	}
	if cfg.Root == "" {
		cfg.Root = "breathd"
	}
	if cfg.Limits.Clients <= 0 {
		cfg.Limits.Clients = 64
	}
	if cfg.Limits.Packet == 0 {
		cfg.Limits.Packet = 256 << 10
	}
	if cfg.Limits.Retained <= 0 {
		cfg.Limits.Retained = 4096
	}
	if _, _, err := net.SplitHostPort(cfg.Listen); err != nil {
		return nil, fmt.Errorf("broker listen address %q: want host:port, e.g. %s", cfg.Listen, DefaultListen)
	}
	loopback := IsLoopback(cfg.Listen)
	if !loopback && cfg.PasswordFile == "" {
		return nil, fmt.Errorf("refusing to start an open MQTT broker on %s: listen on 127.0.0.1 or give a password file", cfg.Listen)
	}
	if (cfg.CertFile == "") != (cfg.KeyFile == "") {
		return nil, errors.New("broker TLS: give both the certificate and the key file")
	}
	if !loopback && cfg.CertFile == "" {
		return nil, fmt.Errorf("refusing to send passwords in the clear on %s: give the broker a certificate and key (TLS), or listen on 127.0.0.1", cfg.Listen)
	}
	var tc *tls.Config
	if cfg.CertFile != "" {
		cert, err := tls.LoadX509KeyPair(cfg.CertFile, cfg.KeyFile)
		if err != nil {
			return nil, fmt.Errorf("broker TLS: %w", err)
		}
		tc = &tls.Config{MinVersion: tls.VersionTLS12, Certificates: []tls.Certificate{cert}}
	}
	acc := &access{root: cfg.Root, anonymous: !cfg.NoAnonymous, retainedMax: cfg.Limits.Retained,
		owned: map[string]bool{}, retained: map[string]struct{}{}}
	if cfg.PasswordFile != "" {
		users, err := readPasswordFile(cfg.PasswordFile)
		if err != nil {
			return nil, err
		}
		acc.users = users
	}
	secret := make([]byte, 24)
	rand.Read(secret)
	acc.secret = hex.EncodeToString(secret)

	level := log.GetLevel()
	if level < zerolog.WarnLevel {
		level = zerolog.WarnLevel // client connects are routine
	}
	blog := log.With().Str("component", "broker").Logger().Level(level)
	srv := mochi.New(&mochi.Options{InlineClient: false, Logger: slog.New(quietClose{zerolog.NewSlogHandler(blog)})})
	srv.Options.Capabilities.MaximumMessageExpiryInterval = 0 // keep retained messages
	srv.Options.Capabilities.MaximumClients = cfg.Limits.Clients
	srv.Options.Capabilities.MaximumPacketSize = cfg.Limits.Packet
	if err := srv.AddHook(acc, nil); err != nil {
		return nil, fmt.Errorf("broker access rules: %w", err)
	}
	tcp := listeners.NewTCP(listeners.Config{ID: "tcp", Address: cfg.Listen, TLSConfig: tc})
	if err := srv.AddListener(tcp); err != nil {
		srv.Close()
		if errors.Is(err, syscall.EADDRINUSE) {
			return nil, fmt.Errorf("%w: %s is taken, probably by another breathd or MQTT broker: publish there with --broker mqtt://%s and a device id of this run's own (--id; watch then needs --broker too), or start the embedded one elsewhere with --listen 127.0.0.1:1884",
				ErrPortBusy, cfg.Listen, cfg.Listen)
		}
		return nil, fmt.Errorf("broker listen on %s: %w", cfg.Listen, err)
	}
	b := &Broker{srv: srv, addr: tcp.Address(), secret: acc.secret}
	b.local = loopbackAddr(b.addr)
	if tc != nil {
		// breathd's own clients on a loopback listener of their own, in
		// the clear: they never leave the machine
		lo := listeners.NewTCP(listeners.Config{ID: "loopback", Address: "127.0.0.1:0"})
		if err := srv.AddListener(lo); err != nil {
			srv.Close()
			return nil, fmt.Errorf("broker loopback listener: %w", err)
		}
		b.local = lo.Address()
	}
	if err := srv.Serve(); err != nil {
		srv.Close()
		return nil, fmt.Errorf("broker: %w", err)
	}
	return b, nil
}

// loopbackAddr is addr, or for a listener on every address (0.0.0.0,
// [::]) the same port on 127.0.0.1.
func loopbackAddr(addr string) string {
	host, port, err := net.SplitHostPort(addr)
	if err != nil {
		return addr
	}
	if ip := net.ParseIP(host); ip != nil && ip.IsUnspecified() {
		host = "127.0.0.1"
	}
	return net.JoinHostPort(host, port)
}

// Users are the entries of a password file, for other listeners of
// breathd's (the HTTP one) that take the same file.
type Users map[string]user

// ReadUsers reads a password file ("user:password" and "ack
// user:password" lines).
func ReadUsers(path string) (Users, error) { return readPasswordFile(path) }

// Check reports whether name and password match an entry, in constant time
// over the password.
func (u Users) Check(name, password string) bool {
	e, ok := u[name]
	return ok && subtle.ConstantTimeCompare([]byte(password), e.password) == 1
}

// CanAck reports whether name may acknowledge events.
func (u Users) CanAck(name string) bool { return u[name].ack }

// user is an entry of the password file.
type user struct {
	password []byte
	ack      bool // may publish to the ack topics
}

// readPasswordFile reads "user:password" and "ack user:password" lines. An
// empty password is an error.
func readPasswordFile(path string) (Users, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("broker password file: %w", err)
	}
	defer f.Close()
	users := map[string]user{}
	sc := bufio.NewScanner(f)
	for n := 1; sc.Scan(); n++ {
		line := strings.TrimSpace(sc.Text())
		if line == "" || strings.HasPrefix(line, "#") {
			continue
		}
		var u user
		if role, rest, ok := strings.Cut(line, " "); ok && !strings.Contains(role, ":") {
			if role != "ack" && role != "read" {
				return nil, fmt.Errorf("broker password file %s:%d: role %q: want ack or read (or none)", path, n, role)
			}
			u.ack, line = role == "ack", strings.TrimSpace(rest)
		}
		name, pass, ok := strings.Cut(line, ":")
		if !ok || name == "" || pass == "" {
			return nil, fmt.Errorf("broker password file %s:%d: want user:password with both set", path, n)
		}
		if name == PublisherUser {
			return nil, fmt.Errorf("broker password file %s:%d: the user name %s is breathd's own", path, n, PublisherUser)
		}
		u.password = []byte(pass)
		users[name] = u
	}
	if err := sc.Err(); err != nil {
		return nil, fmt.Errorf("broker password file: %w", err)
	}
	if len(users) == 0 {
		return nil, fmt.Errorf("broker password file %s has no users", path)
	}
	return users, nil
}

// access is the broker's hook for the access rules and the retained
// limit.
type access struct {
	mochi.HookBase
	root        string
	users       Users
	anonymous   bool
	secret      string
	retainedMax int

	mu       sync.Mutex
	owned    map[string]bool     // client ids breathd's publisher has used
	retained map[string]struct{} // topics with a retained message
}

func (a *access) ID() string { return "breathd-access" }

func (a *access) Provides(b byte) bool {
	return b == mochi.OnConnectAuthenticate || b == mochi.OnACLCheck || b == mochi.OnPublish
}

// OnConnectAuthenticate admits breathd's publisher by its secret, the
// password file's users by theirs, and anonymous clients when allowed;
// nobody else may take a client id breathd's publisher has used.
func (a *access) OnConnectAuthenticate(cl *mochi.Client, pk packets.Packet) bool {
	name, pass := string(pk.Connect.Username), pk.Connect.Password
	a.mu.Lock()
	defer a.mu.Unlock()
	if name == PublisherUser {
		if subtle.ConstantTimeCompare(pass, []byte(a.secret)) != 1 {
			return false
		}
		a.owned[cl.ID] = true
		return true
	}
	if a.owned[cl.ID] {
		return false // would take over breathd's session
	}
	if name == "" {
		return a.anonymous && len(pass) == 0
	}
	return a.users.Check(name, string(pass))
}

// OnACLCheck lets everyone admitted read, breathd's publisher write
// anywhere, and a user granted ack write to a device's ack topic.
func (a *access) OnACLCheck(cl *mochi.Client, topic string, write bool) bool {
	name := string(cl.Properties.Username)
	if name == PublisherUser {
		return true
	}
	if !write {
		return true
	}
	return a.users.CanAck(name) && a.isAckTopic(topic)
}

var ackTopic = regexp.MustCompile(`^(.+)/[A-Za-z0-9_.-]{1,64}/ack$`)

func (a *access) isAckTopic(topic string) bool {
	m := ackTopic.FindStringSubmatch(topic)
	return m != nil && m[1] == a.root
}

// OnPublish drops a retained message from anyone but breathd's publisher,
// and one for a new topic past the limit: acknowledged (so that a QoS 1
// sender does not wait), neither retained nor delivered.
func (a *access) OnPublish(cl *mochi.Client, pk packets.Packet) (packets.Packet, error) {
	if !pk.FixedHeader.Retain {
		return pk, nil
	}
	if string(cl.Properties.Username) != PublisherUser {
		return pk, packets.CodeSuccessIgnore
	}
	a.mu.Lock()
	defer a.mu.Unlock()
	if len(pk.Payload) == 0 { // clears the topic's retained message
		delete(a.retained, pk.TopicName)
		return pk, nil
	}
	if _, ok := a.retained[pk.TopicName]; !ok {
		if len(a.retained) >= a.retainedMax {
			return pk, packets.CodeSuccessIgnore
		}
		a.retained[pk.TopicName] = struct{}{}
	}
	return pk, nil
}

// Addr is the address the broker listens on.
func (b *Broker) Addr() string { return b.addr }

// LocalAddr is host:port where breathd's own clients reach the broker on
// this machine.
func (b *Broker) LocalAddr() string { return b.local }

// URL is LocalAddr as a client URL.
func (b *Broker) URL() string { return "mqtt://" + b.local }

// Publisher returns the user name and this run's secret with which
// breathd's publisher logs in.
func (b *Broker) Publisher() (user, password string) { return PublisherUser, b.secret }

// Close stops the broker; it is safe to call more than once.
//
// The listeners are closed first, with their clients disconnected from a
// copy of the client list: mochi's own Close lists each listener's
// clients under a read lock taken twice, which deadlocks when a client
// leaves between the two (mochi-mqtt/server#488, open in v2.7.9; a test
// hung on it for ten minutes). Each listener closes its clients once, so
// mochi's Close then finds nothing left to list.
func (b *Broker) Close() error {
	var err error
	b.once.Do(func() {
		b.srv.Listeners.CloseAll(func(listener string) {
			for _, cl := range b.srv.Clients.GetAll() {
				if cl.Net.Listener == listener && !cl.Closed() {
					_ = b.srv.DisconnectClient(cl, packets.ErrServerShuttingDown)
				}
			}
		})
		err = b.srv.Close()
	})
	return err
}

// quietClose drops the broker's reports of reading from a connection that
// was closed: at every clean stop each connected client's read ends so,
// and it is not a fault.
type quietClose struct{ slog.Handler }

func (q quietClose) Handle(ctx context.Context, r slog.Record) error {
	closed := false
	r.Attrs(func(a slog.Attr) bool {
		if err, ok := a.Value.Any().(error); ok && (errors.Is(err, net.ErrClosed) || strings.Contains(err.Error(), "use of closed network connection")) {
			closed = true
		}
		return !closed
	})
	if closed {
		return nil
	}
	return q.Handler.Handle(ctx, r)
}

func (q quietClose) WithAttrs(as []slog.Attr) slog.Handler {
	return quietClose{q.Handler.WithAttrs(as)}
}
func (q quietClose) WithGroup(name string) slog.Handler { return quietClose{q.Handler.WithGroup(name)} }
