package publish

import (
	"crypto/tls"
	"crypto/x509"
	"errors"
	"fmt"
	"net"
	"net/url"
	"os"
	"strings"
	"time"

	mqtt "github.com/eclipse/paho.mqtt.golang"
	"github.com/eclipse/paho.mqtt.golang/packets"
)

// Dial says how to reach an MQTT broker. The publisher and every other
// client of breathd (watch) connect through it, so that URLs, TLS and
// credentials are handled one way.
type Dial struct {
	Broker   string // mqtt://host:port or mqtts://host:port (ports default to 1883 and 8883)
	Username string
	Password string // from a file or the environment; never logged, never in the URL
	CAFile   string // mqtts: CA certificates (PEM); default the system's
	CertFile string // mqtts: client certificate (PEM), with KeyFile
	KeyFile  string
}

// Options returns paho client options that reach the broker: its address,
// TLS settings and credentials, and the timeouts breathd uses. The caller
// adds its client id, session and handlers.
func (d Dial) Options() (*mqtt.ClientOptions, error) {
	addr, tc, err := d.address()
	if err != nil {
		return nil, err
	}
	opts := mqtt.NewClientOptions().AddBroker(addr).SetConnectTimeout(5 * time.Second)
	if tc != nil {
		opts.SetTLSConfig(tc)
	}
	if d.Username != "" {
		opts.SetUsername(d.Username).SetPassword(d.Password)
	}
	return opts, nil
}

// Refused reports whether a connection error is the broker refusing the
// credentials (as opposed to not being reachable).
func (d Dial) Refused(err error) bool {
	return errors.Is(err, packets.ErrorRefusedBadUsernameOrPassword) || errors.Is(err, packets.ErrorRefusedNotAuthorised) ||
		(err != nil && (strings.Contains(err.Error(), "not Authorized") || strings.Contains(err.Error(), "bad user name or password")))
}

// CredentialsRefused is the error to report when Refused: it names the
// user and the broker, never the password.
func (d Dial) CredentialsRefused() error {
	return fmt.Errorf("broker %s refused the credentials of user %q: check the username and the password file", Redact(d.Broker), d.Username)
}

// ErrText is a connection error's text; a connection attempt that ended
// without one timed out.
func ErrText(err error) string {
	if err == nil {
		return "timed out"
	}
	return err.Error()
}

// Redact removes any password from a broker URL before it is shown.
func Redact(raw string) string {
	u, err := url.Parse(raw)
	if err != nil {
		return "(unparsable broker URL)"
	}
	if u.User != nil {
		u.User = url.User(u.User.Username())
	}
	return u.String()
}

// address turns mqtt:// and mqtts:// into paho's address and TLS settings.
func (d Dial) address() (string, *tls.Config, error) {
	u, err := url.Parse(d.Broker)
	if err != nil || u.Host == "" {
		return "", nil, fmt.Errorf("broker %q: want mqtt://host:port or mqtts://host:port", Redact(d.Broker))
	}
	if u.User != nil {
		if _, has := u.User.Password(); has {
			return "", nil, errors.New("broker URL must not carry a password: use a password file or an environment variable")
		}
	}
	port := u.Port()
	switch u.Scheme {
	case "mqtt", "tcp":
		if port == "" {
			port = "1883"
		}
		return "tcp://" + net.JoinHostPort(u.Hostname(), port), nil, nil
	case "mqtts", "ssl", "tls":
		if port == "" {
			port = "8883"
		}
	default:
		return "", nil, fmt.Errorf("broker %q: scheme %q, want mqtt or mqtts", Redact(d.Broker), u.Scheme)
	}
	tc := &tls.Config{MinVersion: tls.VersionTLS12, ServerName: u.Hostname()}
	if d.CAFile != "" {
		pem, err := os.ReadFile(d.CAFile)
		if err != nil {
			return "", nil, fmt.Errorf("CA file: %w", err)
		}
		pool := x509.NewCertPool()
		if !pool.AppendCertsFromPEM(pem) {
			return "", nil, fmt.Errorf("CA file %s has no PEM certificate", d.CAFile)
		}
		tc.RootCAs = pool
	}
	if d.CertFile != "" || d.KeyFile != "" {
		cert, err := tls.LoadX509KeyPair(d.CertFile, d.KeyFile)
		if err != nil {
			return "", nil, fmt.Errorf("client certificate: %w", err)
		}
		tc.Certificates = []tls.Certificate{cert}
	}
	return "ssl://" + net.JoinHostPort(u.Hostname(), port), tc, nil
}
