package main

import (
	"context"
	"flag"
	"fmt"
	"net"
	"path/filepath"
	"strings"
	"sync"
	"time"

	"breathd/alerts"
	"breathd/cmd/breathd/internal/config"
	"breathd/stream"
	"breathd/stream/broker"
	"breathd/stream/publish"

	paho "github.com/eclipse/paho.mqtt.golang"
	"github.com/rs/zerolog"
)

// clientFlags are the flags of any MQTT client of breathd (run's
// publishers, watch): credentials and TLS.
type clientFlags struct {
	username, passwordFile, passwordEnv, caFile, certFile, keyFile string
}

func (m *clientFlags) register(fs *flag.FlagSet) {
	fs.StringVar(&m.username, "username", "", "MQTT username")
	fs.StringVar(&m.passwordFile, "password-file", "", "file holding the MQTT password")
	fs.StringVar(&m.passwordEnv, "password-env", "", "environment variable holding the MQTT password")
	fs.StringVar(&m.caFile, "ca-file", "", "mqtts: CA certificate file (PEM)")
	fs.StringVar(&m.certFile, "cert-file", "", "mqtts: client certificate (PEM)")
	fs.StringVar(&m.keyFile, "key-file", "", "mqtts: client key (PEM)")
}

// apply lays the flags that are set over c.
func (m *clientFlags) apply(c *config.MQTT) {
	setFlag(&c.Username, m.username)
	setFlag(&c.PasswordFile, m.passwordFile)
	setFlag(&c.PasswordEnv, m.passwordEnv)
	setFlag(&c.CAFile, m.caFile)
	setFlag(&c.CertFile, m.certFile)
	setFlag(&c.KeyFile, m.keyFile)
}

// setFlag sets *dst to v when the flag was given.
func setFlag(dst *string, v string) {
	if v != "" {
		*dst = v
	}
}

// mqttFlags registers the publishing flags, which override the file.
type mqttFlags struct {
	clientFlags
	broker, root, listen, brokerPasswords, stateDir string
	brokerCert, brokerKey                           string
	noMQTT, wave                                    bool
}

func (m *mqttFlags) register(fs *flag.FlagSet) {
	fs.StringVar(&m.broker, "broker", "", "MQTT broker, mqtt://host:port or mqtts://host:port (default: start the embedded one)")
	fs.StringVar(&m.listen, "listen", "", "where the embedded broker listens (default 127.0.0.1:1883)")
	fs.StringVar(&m.brokerPasswords, "broker-passwords", "", "password file of the embedded broker: user:password lines, ack user:password for who may acknowledge (required off loopback)")
	fs.StringVar(&m.brokerCert, "broker-cert", "", "TLS certificate (PEM) of the embedded broker (required off loopback)")
	fs.StringVar(&m.brokerKey, "broker-key", "", "its TLS key (PEM)")
	fs.StringVar(&m.root, "root", "", "topic root (default breathd)")
	m.clientFlags.register(fs)
	fs.StringVar(&m.stateDir, "state-dir", "", "directory for the durable event queue (default: in memory only)")
	fs.BoolVar(&m.noMQTT, "no-mqtt", false, "do not publish over MQTT")
	fs.BoolVar(&m.wave, "wave-topic", false, "also publish the waveform at 25 Hz on <root>/<device>/wave, a chunk a second (QoS 0)")
}

// apply lays the flags over the file's settings.
func (m *mqttFlags) apply(c *config.MQTT, e *config.Embedded, stateDir *string) {
	setFlag(&c.Broker, m.broker)
	setFlag(&c.Root, m.root)
	m.clientFlags.apply(c)
	setFlag(&e.Listen, m.listen)
	setFlag(&e.PasswordFile, m.brokerPasswords)
	setFlag(&e.CertFile, m.brokerCert)
	setFlag(&e.KeyFile, m.brokerKey)
	setFlag(stateDir, m.stateDir)
	c.Off = c.Off || m.noMQTT
	c.Wave = c.Wave || m.wave
}

// mqttSession is the broker (embedded or not) and the publishers of one
// run.
type mqttSession struct {
	cfg      config.MQTT
	password string
	url      string
	broker   *broker.Broker
	stateDir string
	log      zerolog.Logger
}

// startMQTT starts the embedded broker when no broker is configured.
func startMQTT(c config.MQTT, e config.Embedded, stateDir string, log zerolog.Logger) (*mqttSession, error) {
	if c.Off {
		return nil, nil
	}
	routePahoLogs(log)
	pw, err := c.Password()
	if err != nil {
		return nil, err
	}
	if err := c.Validate(); err != nil { // flags may have changed it since the file was read
		return nil, err
	}
	s := &mqttSession{cfg: c, password: pw, url: c.Broker, stateDir: stateDir, log: log}
	if s.url == "" {
		b, err := broker.Start(broker.Config{Listen: e.Listen, PasswordFile: e.PasswordFile, CertFile: e.CertFile,
			KeyFile: e.KeyFile, NoAnonymous: e.NoAnonymous, Root: c.Root, Limits: broker.Limits{Clients: e.MaxClients}}, log)
		if err != nil {
			return nil, err
		}
		s.broker, s.url = b, b.URL()
		// breathd's own publishers log in with this run's secret, over
		// loopback in the clear
		s.cfg.Username, s.password = b.Publisher()
		s.cfg.CAFile, s.cfg.CertFile, s.cfg.KeyFile = "", "", ""
		host, port, _ := net.SplitHostPort(b.LocalAddr())
		log.Info().Str("listen", b.Addr()).Msg("embedded MQTT broker started (mosquitto_sub -h " + host + " -p " + port + " -t 'breathd/#' -v)")
	}
	return s, nil
}

// publisher makes the publisher of one device.
func (s *mqttSession) publisher(dev, run string, rules []alerts.Rule, ctl *stream.Control) (*publish.Publisher, error) {
	dir := ""
	if s.stateDir != "" {
		dir = filepath.Join(s.stateDir, "queue", dev)
	}
	clientID := ""
	if s.cfg.ClientID != "" {
		clientID = s.cfg.ClientID + "-" + dev
	}
	p, err := publish.New(publish.Config{Dial: s.dial(), Root: s.cfg.Root, Device: dev, ClientID: clientID,
		StateDir: dir, BreathQoS: byte(s.cfg.BreathQoS), StatusEvery: s.cfg.StatusEvery, Version: versionString(),
		Run: run, Rules: rules, Status: ctl.Status, Log: s.log.With().Str("device", dev).Logger()})
	if err != nil {
		return nil, err
	}
	p.SetAck(ctl.Ack)
	return p, nil
}

// dial is how this run's clients reach the broker.
func (s *mqttSession) dial() publish.Dial { return s.cfg.Dial(s.url, s.password) }

// close stops the embedded broker.
func (s *mqttSession) close() {
	if s != nil && s.broker != nil {
		s.broker.Close()
	}
}

// drainDeadline is how long publishers may take to deliver what is queued
// when breathd stops.
const drainDeadline = 5 * time.Second

func closePublisher(p *publish.Publisher, log zerolog.Logger) {
	ctx, cancel := context.WithTimeout(context.Background(), drainDeadline)
	defer cancel()
	if err := p.Close(ctx); err != nil {
		log.Warn().Err(err).Msg("publisher closed")
	}
}

// pahoLog sends paho's log lines to zerolog.
type pahoLog struct {
	log   zerolog.Logger
	level zerolog.Level
}

func (p pahoLog) Println(v ...any) {
	p.log.WithLevel(p.level).Msg(strings.TrimSpace(fmt.Sprintln(v...)))
}
func (p pahoLog) Printf(format string, v ...any) {
	p.log.WithLevel(p.level).Msg(strings.TrimSpace(fmt.Sprintf(format, v...)))
}

var pahoOnce sync.Once

// routePahoLogs points paho's package-level loggers at zerolog, once per
// process (they are globals).
func routePahoLogs(log zerolog.Logger) {
	pahoOnce.Do(func() {
		l := log.With().Str("component", "mqtt").Logger()
		// paho reports every failed reconnection as an error: during an
		// outage that is expected, and breathd says so itself
		paho.ERROR = pahoLog{l, zerolog.DebugLevel}
		paho.CRITICAL = pahoLog{l, zerolog.ErrorLevel}
		paho.WARN = pahoLog{l, zerolog.DebugLevel}
	})
}
