// Package broker is the embedded MQTT broker breathd starts when no broker is
// configured: mochi-mqtt on loopback, or beyond it only with a password
// file.
package broker

import (
	"bufio"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"os"
	"strings"
	"sync"
	"syscall"

	mochi "github.com/mochi-mqtt/server/v2"
	"github.com/mochi-mqtt/server/v2/hooks/auth"
	"github.com/mochi-mqtt/server/v2/listeners"
	"github.com/rs/zerolog"
)

// DefaultListen is where the embedded broker listens by default.
const DefaultListen = "127.0.0.1:1883"

// Config configures the embedded MQTT broker.
type Config struct {
	Listen string // host:port; default DefaultListen. Port 0 picks a free one.
	// PasswordFile holds "user:password" lines ('#' comments). Without it
	// the broker takes anyone, which is allowed on loopback only.
	PasswordFile string
}

// ErrPortBusy is returned when the broker's port is taken.
var ErrPortBusy = errors.New("port in use")

// Broker is the embedded MQTT broker (mochi-mqtt).
type Broker struct {
	srv  *mochi.Server
	addr string
	once sync.Once
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

// Start starts the embedded broker. It refuses to listen beyond
// loopback without a password file, and says what to do when the port is
// taken.
func Start(cfg Config, log zerolog.Logger) (*Broker, error) {
	if cfg.Listen == "" {
		cfg.Listen = DefaultListen
	}
	if _, _, err := net.SplitHostPort(cfg.Listen); err != nil {
		return nil, fmt.Errorf("broker listen address %q: want host:port, e.g. %s", cfg.Listen, DefaultListen)
	}
	if !IsLoopback(cfg.Listen) && cfg.PasswordFile == "" {
		return nil, fmt.Errorf("refusing to start an open MQTT broker on %s: listen on 127.0.0.1 or give a password file", cfg.Listen)
	}
	level := log.GetLevel()
	if level < zerolog.WarnLevel {
		level = zerolog.WarnLevel // client connects are routine
	}
	blog := log.With().Str("component", "broker").Logger().Level(level)
	srv := mochi.New(&mochi.Options{InlineClient: false, Logger: slog.New(zerolog.NewSlogHandler(blog))})
	srv.Options.Capabilities.MaximumMessageExpiryInterval = 0 // keep retained messages
	if cfg.PasswordFile != "" {
		users, err := readPasswordFile(cfg.PasswordFile)
		if err != nil {
			return nil, err
		}
		if err := srv.AddHook(new(auth.Hook), &auth.Options{Ledger: &auth.Ledger{Users: users}}); err != nil {
			return nil, fmt.Errorf("broker auth: %w", err)
		}
	} else if err := srv.AddHook(new(auth.AllowHook), nil); err != nil {
		return nil, fmt.Errorf("broker auth: %w", err)
	}
	tcp := listeners.NewTCP(listeners.Config{ID: "tcp", Address: cfg.Listen})
	if err := srv.AddListener(tcp); err != nil {
		srv.Close()
		if errors.Is(err, syscall.EADDRINUSE) {
			return nil, fmt.Errorf("%w: %s is taken, probably by another MQTT broker: use that one with --broker mqtt://%s, or start the embedded one elsewhere with --listen 127.0.0.1:1884",
				ErrPortBusy, cfg.Listen, cfg.Listen)
		}
		return nil, fmt.Errorf("broker listen on %s: %w", cfg.Listen, err)
	}
	if err := srv.Serve(); err != nil {
		srv.Close()
		return nil, fmt.Errorf("broker: %w", err)
	}
	return &Broker{srv: srv, addr: tcp.Address()}, nil
}

// readPasswordFile reads "user:password" lines. An empty password is an
// error: the broker's ledger would match any password.
func readPasswordFile(path string) (auth.Users, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("broker password file: %w", err)
	}
	defer f.Close()
	users := auth.Users{}
	sc := bufio.NewScanner(f)
	for n := 1; sc.Scan(); n++ {
		line := strings.TrimSpace(sc.Text())
		if line == "" || strings.HasPrefix(line, "#") {
			continue
		}
		user, pass, ok := strings.Cut(line, ":")
		if !ok || user == "" || pass == "" {
			return nil, fmt.Errorf("broker password file %s:%d: want user:password with both set", path, n)
		}
		users[user] = auth.UserRule{Username: auth.RString(user), Password: auth.RString(pass)}
	}
	if err := sc.Err(); err != nil {
		return nil, fmt.Errorf("broker password file: %w", err)
	}
	if len(users) == 0 {
		return nil, fmt.Errorf("broker password file %s has no users", path)
	}
	return users, nil
}

// Addr is the address the broker listens on.
func (b *Broker) Addr() string { return b.addr }

// URL is the broker's address as a client URL on this machine: a broker
// listening on every address (0.0.0.0, [::]) is reached on loopback.
func (b *Broker) URL() string { return "mqtt://" + b.LocalAddr() }

// LocalAddr is host:port to reach the broker from this machine.
func (b *Broker) LocalAddr() string {
	host, port, err := net.SplitHostPort(b.addr)
	if err != nil {
		return b.addr
	}
	if ip := net.ParseIP(host); ip != nil && ip.IsUnspecified() {
		host = "127.0.0.1"
	}
	return net.JoinHostPort(host, port)
}

// Close stops the broker; it is safe to call more than once.
func (b *Broker) Close() error {
	var err error
	b.once.Do(func() { err = b.srv.Close() })
	return err
}
