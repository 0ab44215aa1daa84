package main

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"os"
	"regexp"
	"strconv"
	"strings"
	"time"

	"breathd/alerts"
	"breathd/device"
	"breathd/mechanics"
	"breathd/mechanics/lungsim"
	"breathd/stream/lines"

	"go.yaml.in/yaml/v3"
)

// config is the YAML configuration file. configs/breathd.example.yaml
// documents every key.
type config struct {
	LogLevel    string         `yaml:"log_level"`
	ReportEvery time.Duration  `yaml:"report_every"`
	StateDir    string         `yaml:"state_dir"` // durable event queues; default: in memory only
	MQTT        mqttConfig     `yaml:"mqtt"`
	Embedded    embeddedConfig `yaml:"embedded_broker"`
	Devices     []deviceConfig `yaml:"devices"`

	yamlFile `yaml:"-"`
}

// yamlFile is a YAML document with what its error messages need.
type yamlFile struct {
	path string     // the file it came from
	root *yaml.Node // for line numbers
}

type deviceConfig struct {
	ID      string               `yaml:"id"`
	Serial  *device.SerialConfig `yaml:"serial"`
	File    *fileSource          `yaml:"file"`
	Stdin   bool                 `yaml:"stdin"`
	Sim     *simSource           `yaml:"simulate"`
	Patient mechanics.Patient    `yaml:"patient"`
	Rules   []alerts.Rule        `yaml:"rules"` // overrides of the default rules by id, or new rules
	Measure measurementConfig    `yaml:"measurement"`

	rules     []alerts.Rule // the defaults merged with Rules
	mechanics mechanics.Config
	Format    formatConfig  `yaml:"format"`
	Record    *recordConfig `yaml:"record"`
}

type fileSource struct {
	Path  string  `yaml:"path"`
	Speed float64 `yaml:"speed"` // 0: as fast as possible
}

// simSource is a simulated ventilator as a device.
type simSource struct {
	Scenario string  `yaml:"scenario"` // scenario file; relative paths are from the working directory
	Speed    float64 `yaml:"speed"`    // 1 real time (default), N times faster
	Seed     uint64  `yaml:"seed"`     // overrides the scenario's seed when set

	scenario lungsim.Scenario
}

type formatConfig struct {
	Columns   []string          `yaml:"columns"`
	Delimiter string            `yaml:"delimiter"`
	RateHz    float64           `yaml:"rate_hz"`
	Units     map[string]string `yaml:"units"`
	FlowSign  float64           `yaml:"flow_sign"`
	GapLimit  time.Duration     `yaml:"gap_limit"`
}

// measurementConfig describes how a device measures: the circuit between
// the flow sensor and the patient, and the delay between its channels.
type measurementConfig struct {
	// CircuitCompliance, mL/cmH2O: with flow measured at the ventilator,
	// the gas compressed in the circuit is taken off the volumes.
	CircuitCompliance float64 `yaml:"circuit_compliance"`
	// FlowDelay is "auto" (default: estimated) or how far the flow channel
	// lags the pressure channel, as a duration ("20ms", "-10ms", "0").
	FlowDelay string `yaml:"flow_delay"`
}

// mechanics is the computation's configuration for a patient measured so.
func (m measurementConfig) mechanics(p mechanics.Patient) (mechanics.Config, error) {
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

type recordConfig struct {
	Dir        string        `yaml:"dir"`
	MaxMiB     int64         `yaml:"max_mib"`
	ClockEvery time.Duration `yaml:"clock_every"`
}

func (f formatConfig) format() lines.Format {
	return lines.Format{Columns: f.Columns, Delimiter: f.Delimiter, RateHz: f.RateHz,
		Units: f.Units, FlowSign: f.FlowSign, GapLimit: f.GapLimit}
}

// fieldError is a validation error at a key path such as
// devices[0].serial.baud.
type fieldError struct {
	path []any // string keys and int indices
	err  error
}

func (e *fieldError) Error() string { return pathString(e.path) + ": " + e.err.Error() }

func pathString(path []any) string {
	var b strings.Builder
	for _, p := range path {
		switch v := p.(type) {
		case int:
			fmt.Fprintf(&b, "[%d]", v)
		case string:
			if b.Len() > 0 {
				b.WriteByte('.')
			}
			b.WriteString(v)
		}
	}
	return b.String()
}

func field(err error, path ...any) error {
	if err == nil {
		return nil
	}
	return &fieldError{path: path, err: err}
}

var validID = regexp.MustCompile(`^[A-Za-z0-9_.-]{1,64}$`)

// loadConfig reads and validates a configuration file. Every error names
// the file, the line and the key.
func loadConfig(path string) (*config, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		if errors.Is(err, os.ErrNotExist) {
			return nil, fmt.Errorf("config file %s does not exist (configs/breathd.example.yaml is a start)", path)
		}
		return nil, fmt.Errorf("config file: %w", err)
	}
	return parseConfig(path, data)
}

func parseConfig(path string, data []byte) (*config, error) {
	c := &config{}
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

// decodeStrict decodes YAML into out; an unknown key is an error. Errors
// name the file, the line and the key.
func decodeStrict(path string, data []byte, out any) (*yamlFile, error) {
	f := &yamlFile{path: path, root: new(yaml.Node)}
	if err := yaml.Unmarshal(data, f.root); err != nil {
		return nil, f.yamlError(err)
	}
	dec := yaml.NewDecoder(bytes.NewReader(data))
	dec.KnownFields(true)
	if err := dec.Decode(out); err != nil {
		if errors.Is(err, io.EOF) {
			return nil, fmt.Errorf("%s: the file is empty", path)
		}
		return nil, f.yamlError(err)
	}
	return f, nil
}

// explain adds the file and line to a validation error.
func (f *yamlFile) explain(err error) error {
	if err == nil {
		return nil
	}
	var fe *fieldError
	if errors.As(err, &fe) {
		return fmt.Errorf("%s:%d: %v", f.path, f.line(fe.path), fe)
	}
	return fmt.Errorf("%s: %w", f.path, err)
}

var (
	reUnknown = regexp.MustCompile(`line (\d+): field (\S+) not found in type`)
	reLine    = regexp.MustCompile(`line (\d+): (.*)`)
)

// yamlError rewrites yaml.v3's messages as file:line: key: problem.
func (c *yamlFile) yamlError(err error) error {
	var te *yaml.TypeError
	if errors.As(err, &te) && len(te.Errors) > 0 {
		msg := te.Errors[0]
		if m := reUnknown.FindStringSubmatch(msg); m != nil {
			n, _ := strconv.Atoi(m[1])
			return fmt.Errorf("%s:%s: unknown key %q%s (see configs/breathd.example.yaml for the keys)", c.path, m[1], m[2], c.under(n))
		}
		if m := reLine.FindStringSubmatch(msg); m != nil {
			n, _ := strconv.Atoi(m[1])
			return fmt.Errorf("%s:%s: %s: %s", c.path, m[1], c.keyAt(n), typeProblem(m[2]))
		}
		return fmt.Errorf("%s: %s", c.path, msg)
	}
	msg := strings.TrimPrefix(err.Error(), "yaml: ")
	if m := reLine.FindStringSubmatch(msg); m != nil {
		return fmt.Errorf("%s:%s: %s", c.path, m[1], m[2])
	}
	return fmt.Errorf("%s: %s", c.path, msg)
}

var reType = regexp.MustCompile("cannot unmarshal !!(\\w+) `(.*)` into (\\S+)")

// typeProblem rewrites "cannot unmarshal !!str `fast` into int".
func typeProblem(msg string) string {
	m := reType.FindStringSubmatch(msg)
	if m == nil {
		return msg
	}
	want := map[string]string{"int": "a whole number", "int64": "a whole number", "float64": "a number",
		"bool": "true or false", "time.Duration": "a duration such as 500ms or 5s", "string": "text"}[m[3]]
	if want == "" {
		want = "a " + m[3]
	}
	if m[1] == "map" || m[1] == "seq" {
		return fmt.Sprintf("expected %s here, not a %s", want, map[string]string{"map": "section", "seq": "list"}[m[1]])
	}
	return fmt.Sprintf("%q is not %s", m[2], want)
}

// under names the section an unknown key stands in.
func (c *yamlFile) under(line int) string {
	if k := c.keyAt(line); strings.Contains(k, ".") || strings.Contains(k, "[") {
		if i := strings.LastIndexAny(k, ".["); i > 0 {
			return " in " + k[:i]
		}
	}
	return ""
}

// keyAt returns the key path of the key or value at a line.
func (c *yamlFile) keyAt(line int) string {
	var found []any
	var walk func(n *yaml.Node, path []any)
	walk = func(n *yaml.Node, path []any) {
		switch n.Kind {
		case yaml.DocumentNode:
			for _, ch := range n.Content {
				walk(ch, path)
			}
		case yaml.MappingNode:
			for i := 0; i+1 < len(n.Content); i += 2 {
				k, v := n.Content[i], n.Content[i+1]
				p := append(append([]any(nil), path...), k.Value)
				if k.Line == line || (v.Line == line && v.Kind == yaml.ScalarNode) {
					found = p
				}
				walk(v, p)
			}
		case yaml.SequenceNode:
			for i, ch := range n.Content {
				p := append(append([]any(nil), path...), i)
				if ch.Line == line && ch.Kind == yaml.ScalarNode {
					found = p
				}
				walk(ch, p)
			}
		}
	}
	walk(c.root, nil)
	if found == nil {
		return "value"
	}
	return pathString(found)
}

// line returns the line of a key path, or of its nearest existing parent.
func (c *yamlFile) line(path []any) int {
	n := c.root
	if n.Kind == yaml.DocumentNode && len(n.Content) > 0 {
		n = n.Content[0]
	}
	best := n.Line
	for _, p := range path {
		var next *yaml.Node
		switch v := p.(type) {
		case string:
			if n.Kind == yaml.MappingNode {
				for i := 0; i+1 < len(n.Content); i += 2 {
					if n.Content[i].Value == v {
						best = n.Content[i].Line
						next = n.Content[i+1]
					}
				}
			}
		case int:
			if n.Kind == yaml.SequenceNode && v < len(n.Content) {
				next = n.Content[v]
				best = next.Line
			}
		}
		if next == nil {
			break
		}
		n = next
	}
	return best
}

func (c *config) validate() error {
	if _, err := parseLevel(c.LogLevel); err != nil {
		return field(err, "log_level")
	}
	if c.ReportEvery < 0 {
		return field(errors.New("must not be negative"), "report_every")
	}
	if len(c.Devices) == 0 {
		return field(errors.New("no devices: list at least one"), "devices")
	}
	seen := map[string]bool{}
	for i := range c.Devices {
		d := &c.Devices[i]
		if !validID.MatchString(d.ID) {
			return field(fmt.Errorf("id %q: use 1–64 of A–Z a–z 0–9 _ . -", d.ID), "devices", i, "id")
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

func (d *deviceConfig) validate(i int) error {
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
		if d.File.Speed < 0 {
			return field(errors.New("speed must be 0 (as fast as possible) or more"), "devices", i, "file", "speed")
		}
	}
	if d.Stdin {
		sources++
	}
	if d.Sim != nil {
		sources++
		if d.Sim.Speed < 0 {
			return field(errors.New("speed must be 1 (real time) or more"), "devices", i, "simulate", "speed")
		}
		sc, err := loadScenario(d.Sim.Scenario)
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
	mc, err := d.Measure.mechanics(d.Patient)
	if err != nil {
		return field(err, "devices", i, "measurement")
	}
	d.mechanics = mc
	rules, err := alerts.Merge(alerts.Defaults(), d.Rules)
	if err != nil {
		return field(err, "devices", i, "rules")
	}
	d.rules = rules
	if err := d.Format.format().Validate(); err != nil {
		return field(err, "devices", i, "format")
	}
	if d.Record != nil {
		if d.Record.Dir == "" {
			return field(errors.New("dir is empty"), "devices", i, "record", "dir")
		}
		if d.Record.MaxMiB < 0 || d.Record.ClockEvery < 0 {
			return field(errors.New("max_mib and clock_every must not be negative"), "devices", i, "record")
		}
	}
	return nil
}
