// Package config reads breathd's YAML configuration and scenario files.
// Every error names the file, the line and the key (file:line: key:
// problem), and keeps its cause for errors.Is and errors.As.
package config

import (
	"errors"
	"fmt"
	"io/fs"
	"os"
	"strings"
	"time"

	"breathd/alerts"
	"breathd/device"
	"breathd/mechanics"
	"breathd/mechanics/lungsim"
	"breathd/stream/lines"
	"breathd/stream/publish"

	"github.com/rs/zerolog"
)

// Config is the YAML configuration file. configs/breathd.example.yaml
// documents every key.
type Config struct {
	LogLevel    string        `yaml:"log_level"`
	ReportEvery time.Duration `yaml:"report_every"`
	StateDir    string        `yaml:"state_dir"` // durable event queues; default: in memory only
	MQTT        MQTT          `yaml:"mqtt"`
	Embedded    Embedded      `yaml:"embedded_broker"`
	HTTP        HTTP          `yaml:"http"`
	Devices     []Device      `yaml:"devices"`

	yamlFile `yaml:"-"`
}

// Device is one device: its source (exactly one of Serial, File, Stdin,
// Sim), patient, rules, measurement, format and recording.
type Device struct {
	ID      string               `yaml:"id"`
	Serial  *device.SerialConfig `yaml:"serial"`
	File    *FileSource          `yaml:"file"`
	Stdin   bool                 `yaml:"stdin"`
	Sim     *SimSource           `yaml:"simulate"`
	Patient mechanics.Patient    `yaml:"patient"`
	Rules   []alerts.Override    `yaml:"rules"` // overrides of the default rules by id, or new rules
	Measure Measurement          `yaml:"measurement"`
	// Asynchrony sets the patient–ventilator asynchrony detectors'
	// thresholds (each 0 or absent: its default).
	Asynchrony mechanics.AsynchronyConfig `yaml:"asynchrony"`

	rules     []alerts.Rule    // the defaults merged with Rules
	mechanics mechanics.Config // from Patient and Measure
	Format    Format           `yaml:"format"`
	Record    *Record          `yaml:"record"`
}

// FileSource is a recording read as a device.
type FileSource struct {
	Path  string  `yaml:"path"`
	Speed float64 `yaml:"speed"` // 0: as fast as possible
}

// SimSource is a simulated ventilator as a device.
type SimSource struct {
	Scenario string  `yaml:"scenario"` // scenario file; relative paths are from the working directory
	Speed    float64 `yaml:"speed"`    // 1 real time (default), N times faster
	Seed     uint64  `yaml:"seed"`     // overrides the scenario's seed when set

	scenario lungsim.Scenario
}

// Format is how a device's lines are decoded (see package lines).
type Format struct {
	Columns   []string          `yaml:"columns"`
	Delimiter string            `yaml:"delimiter"`
	RateHz    float64           `yaml:"rate_hz"`
	Units     map[string]string `yaml:"units"`
	FlowSign  float64           `yaml:"flow_sign"`
	GapLimit  time.Duration     `yaml:"gap_limit"`
}

// Measurement describes how a device measures: the circuit between
// the flow sensor and the patient, and the delay between its channels.
type Measurement struct {
	// CircuitCompliance, mL/cmH2O: with flow measured at the ventilator,
	// the gas compressed in the circuit is taken off the volumes.
	CircuitCompliance float64 `yaml:"circuit_compliance"`
	// FlowDelay is "auto" (default: estimated) or how far the flow channel
	// lags the pressure channel, as a duration ("20ms", "-10ms", "0").
	FlowDelay string `yaml:"flow_delay"`
}

// Mechanics is the computation's configuration for a patient measured so.
func (m Measurement) Mechanics(p mechanics.Patient) (mechanics.Config, error) {
	c := mechanics.Config{Sex: p.Sex, HeightCm: p.HeightCm, CircuitCompliance: m.CircuitCompliance}
	if d := strings.TrimSpace(m.FlowDelay); d != "" && d != "auto" {
		v, err := time.ParseDuration(d)
		if d == "0" {
			v, err = 0, nil
		}
		if err != nil {
			return c, fmt.Errorf("flow delay %q: want auto or a duration such as 20ms", m.FlowDelay)
		}
		c.FlowDelay, c.FlowDelayFixed = v.Seconds(), true
	}
	c.Defaults()
	return c, c.Validate()
}

// Record is where a device's raw stream is recorded.
type Record struct {
	Dir        string        `yaml:"dir"`
	MaxMiB     int64         `yaml:"max_mib"`
	ClockEvery time.Duration `yaml:"clock_every"`
	EDF        bool          `yaml:"edf"` // also write the decoded samples as EDF+ beside each raw file
}

// Lines is the decoder's format.
func (f Format) Lines() lines.Format {
	return lines.Format{Columns: f.Columns, Delimiter: f.Delimiter, RateHz: f.RateHz,
		Units: f.Units, FlowSign: f.FlowSign, GapLimit: f.GapLimit}
}

// Load reads and validates a configuration file. Every error names
// the file, the line and the key.
func Load(path string) (*Config, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		if errors.Is(err, os.ErrNotExist) {
			return nil, fmt.Errorf("config file %s: %w (configs/breathd.example.yaml is a start)", path, fs.ErrNotExist)
		}
		return nil, fmt.Errorf("config file: %w", err)
	}
	return Parse(path, data)
}

func Parse(path string, data []byte) (*Config, error) {
	c := &Config{}
	f, err := decodeStrict(path, data, c)
	if err != nil {
		return nil, err
	}
	c.yamlFile = *f
	if err := f.explain(c.validate()); err != nil {
		return nil, err
	}
	return c, nil
}

func (c *Config) validate() error {
	if _, err := ParseLevel(c.LogLevel); err != nil {
		return field(err, "log_level")
	}
	if err := CheckEvery(c.ReportEvery); err != nil {
		return field(err, "report_every")
	}
	if err := c.MQTT.Validate(); err != nil {
		return err
	}
	if len(c.Devices) == 0 {
		return field(errors.New("no devices: list at least one"), "devices")
	}
	seen := map[string]bool{}
	for i := range c.Devices {
		d := &c.Devices[i]
		if err := publish.CheckDevice(d.ID); err != nil {
			return field(err, "devices", i, "id")
		}
		if seen[d.ID] {
			return field(fmt.Errorf("id %q used twice", d.ID), "devices", i, "id")
		}
		seen[d.ID] = true
		if err := d.validate(i); err != nil {
			return err
		}
	}
	return nil
}

func (d *Device) validate(i int) error {
	sources := 0
	if d.Serial != nil {
		sources++
		if err := d.Serial.Validate(); err != nil {
			return field(err, "devices", i, "serial")
		}
	}
	if d.File != nil {
		sources++
		if d.File.Path == "" {
			return field(errors.New("path is empty"), "devices", i, "file", "path")
		}
		if !(d.File.Speed >= 0 && d.File.Speed <= MaxSpeed) {
			return field(errors.New("speed must be 0 (as fast as possible) or more"), "devices", i, "file", "speed")
		}
	}
	if d.Stdin {
		sources++
	}
	if d.Sim != nil {
		sources++
		if !(d.Sim.Speed >= 0 && d.Sim.Speed <= MaxSpeed) {
			return field(errors.New("speed must be 1 (real time) or more"), "devices", i, "simulate", "speed")
		}
		sc, err := LoadScenario(d.Sim.Scenario)
		if err != nil {
			return field(err, "devices", i, "simulate", "scenario")
		}
		if d.Sim.Seed != 0 {
			sc.Seed = d.Sim.Seed
		}
		d.Sim.scenario = sc
	}
	if sources != 1 {
		return field(fmt.Errorf("give exactly one source (serial, file, stdin or simulate); found %d", sources), "devices", i)
	}
	if d.Patient.Sex != "" || d.Patient.HeightCm != 0 {
		if _, err := mechanics.PredictedBodyWeight(d.Patient.Sex, d.Patient.HeightCm); err != nil {
			return field(err, "devices", i, "patient")
		}
	}
	mc, err := d.Measure.Mechanics(d.Patient)
	if err != nil {
		return field(err, "devices", i, "measurement")
	}
	mc.Asynchrony = d.Asynchrony
	mc.Asynchrony.Defaults()
	if err := mc.Asynchrony.Validate(); err != nil {
		return field(err, "devices", i, "asynchrony")
	}
	d.mechanics = mc
	rules, err := alerts.Merge(alerts.Defaults(), d.Rules)
	if err != nil {
		return field(err, "devices", i, "rules")
	}
	d.rules = rules
	if err := d.Format.Lines().Validate(); err != nil {
		return field(err, "devices", i, "format")
	}
	if d.Record != nil {
		if d.Record.Dir == "" {
			return field(errors.New("dir is empty"), "devices", i, "record", "dir")
		}
		if d.Record.MaxMiB < 0 || d.Record.MaxMiB > MaxRecordMiB {
			return field(fmt.Errorf("%d: want 0 (no rotation) to %d", d.Record.MaxMiB, MaxRecordMiB), "devices", i, "record", "max_mib")
		}
		if err := CheckEvery(d.Record.ClockEvery); err != nil {
			return field(err, "devices", i, "record", "clock_every")
		}
	}
	return nil
}

// MQTT is the publishing part of the configuration (file and flags).
type MQTT struct {
	Broker       string `yaml:"broker"`    // mqtt://host:port or mqtts://…; empty: the embedded broker
	Root         string `yaml:"root"`      // topic root; default breathd
	ClientID     string `yaml:"client_id"` // prefix of the per-device client ids
	Username     string `yaml:"username"`
	PasswordFile string `yaml:"password_file"` // the password, alone in a file
	PasswordEnv  string `yaml:"password_env"`  // or the name of an environment variable holding it
	CAFile       string `yaml:"ca_file"`
	CertFile     string `yaml:"cert_file"`
	KeyFile      string `yaml:"key_file"`
	BreathQoS    int    `yaml:"breath_qos"` // 0 (default) or 1
	Wave         bool   `yaml:"wave"`       // also publish the waveform at 25 Hz on <root>/<device>/wave
	Off          bool   `yaml:"off"`        // do not publish at all

	StatusEvery time.Duration `yaml:"status_every"` // default 10s
}

// Embedded is the embedded broker's part.
type Embedded struct {
	Listen       string `yaml:"listen"`        // default 127.0.0.1:1883
	PasswordFile string `yaml:"password_file"` // "user:password" or "ack user:password" lines; required off loopback
	CertFile     string `yaml:"cert_file"`     // TLS certificate (PEM); required off loopback
	KeyFile      string `yaml:"key_file"`      // its key (PEM)
	NoAnonymous  bool   `yaml:"no_anonymous"`  // refuse clients without a user name (by default they may read)
	MaxClients   int64  `yaml:"max_clients"`   // default 64
}

// HTTP is the operations listener (/metrics, /healthz): off unless Listen
// is set; loopback only unless PasswordFile, CertFile and KeyFile are set.
type HTTP struct {
	Listen       string `yaml:"listen"`        // e.g. 127.0.0.1:9464
	PasswordFile string `yaml:"password_file"` // the broker's format; basic authentication when set
	CertFile     string `yaml:"cert_file"`     // TLS certificate (PEM)
	KeyFile      string `yaml:"key_file"`      // its key (PEM)
}

// Validate checks the publishing settings, from the file or from flags, as
// the publisher will: the topic root, breath_qos and status_every. Errors
// carry the key path under mqtt.
func (c *MQTT) Validate() error {
	if c.Root != "" {
		if err := publish.ValidateTopicParts(c.Root, "x"); err != nil {
			return field(err, "mqtt")
		}
	}
	if c.BreathQoS < 0 || c.BreathQoS > 1 {
		return field(fmt.Errorf("%d: want 0 or 1", c.BreathQoS), "mqtt", "breath_qos")
	}
	if err := CheckEvery(c.StatusEvery); err != nil {
		return field(err, "mqtt", "status_every")
	}
	return nil
}

// MinEvery is the shortest period of a report, a status or a clock
// line: anything shorter only burns the processor.
const MinEvery = 100 * time.Millisecond

// MaxSpeed is the fastest replay factor (0 is as fast as possible).
const MaxSpeed = 1e6

// MaxRecordMiB is the largest recording file before rotation, MiB (1 TiB).
const MaxRecordMiB = 1 << 20

// CheckEvery accepts 0 (the default) or a period of at least MinEvery.
func CheckEvery(d time.Duration) error {
	if d != 0 && d < MinEvery {
		return fmt.Errorf("%v: want 0 (the default) or at least %v", d, MinEvery)
	}
	return nil
}

// Dial is how a client reaches the broker at url with these settings.
func (c *MQTT) Dial(url, password string) publish.Dial {
	return publish.Dial{Broker: url, Username: c.Username, Password: password,
		CAFile: c.CAFile, CertFile: c.CertFile, KeyFile: c.KeyFile}
}

// Password reads the MQTT password from its file or the environment.
func (c *MQTT) Password() (string, error) {
	switch {
	case c.PasswordFile != "" && c.PasswordEnv != "":
		return "", errors.New("give the MQTT password by a file or an environment variable, not both")
	case c.PasswordFile != "":
		b, err := os.ReadFile(c.PasswordFile)
		if err != nil {
			return "", fmt.Errorf("MQTT password file: %w", err)
		}
		return strings.TrimRight(string(b), "\r\n"), nil
	case c.PasswordEnv != "":
		v, ok := os.LookupEnv(c.PasswordEnv)
		if !ok {
			return "", fmt.Errorf("environment variable %s (the MQTT password) is not set", c.PasswordEnv)
		}
		return v, nil
	}
	return "", nil
}

// ParseLevel reads a log level; "" is info.
func ParseLevel(s string) (zerolog.Level, error) {
	if s == "" {
		return zerolog.InfoLevel, nil
	}
	l, err := zerolog.ParseLevel(strings.ToLower(s))
	if err != nil || l == zerolog.NoLevel {
		return 0, fmt.Errorf("log level %q: want trace, debug, info, warn or error", s)
	}
	return l, nil
}

// MergedRules are the device's rules: the defaults merged with its overrides.
func (d *Device) MergedRules() []alerts.Rule { return d.rules }

// Mechanics is the computation's configuration for the device's patient
// and measurement.
func (d *Device) Mechanics() mechanics.Config { return d.mechanics }

// Loaded is the scenario the simulated device plays, read from its file.
func (s *SimSource) Loaded() lungsim.Scenario { return s.scenario }

// Path is the file the configuration was read from.
func (c *Config) Path() string { return c.path }
