package device

import (
	"errors"
	"fmt"
	"io"
	"io/fs"
	"strings"
	"sync"
	"sync/atomic"
	"syscall"
	"time"

	"github.com/rs/zerolog"
	"go.bug.st/serial"
)

// SerialConfig is a serial port's settings.
type SerialConfig struct {
	Path string `yaml:"path"` // e.g. /dev/ttyUSB0 or /dev/serial/by-id/…
	// SerialNumber, instead of Path, finds the port by its USB serial
	// number each time it is opened, so a re-plugged adapter is found
	// whatever name it gets.
	SerialNumber string  `yaml:"serial_number"`
	Baud         int     `yaml:"baud"`      // default 115200
	DataBits     int     `yaml:"data_bits"` // 5…8, default 8
	Parity       string  `yaml:"parity"`    // none (default), even, odd, mark, space
	StopBits     float64 `yaml:"stop_bits"` // 1 (default), 1.5, 2

	MinBackoff time.Duration `yaml:"-"` // first reopen delay; default 100 ms
	MaxBackoff time.Duration `yaml:"-"` // longest reopen delay; default 5 s
}

var parities = map[string]serial.Parity{
	"": serial.NoParity, "none": serial.NoParity, "even": serial.EvenParity,
	"odd": serial.OddParity, "mark": serial.MarkParity, "space": serial.SpaceParity,
}

// Validate reports the first setting that cannot be used.
func (c SerialConfig) Validate() error {
	_, err := c.mode()
	if err == nil && (c.Path == "") == (c.SerialNumber == "") {
		err = errors.New("give the port's path or its USB serial number (one of them)")
	}
	return err
}

func (c SerialConfig) mode() (*serial.Mode, error) {
	m := &serial.Mode{BaudRate: 115200, DataBits: 8}
	if c.Baud != 0 {
		if c.Baud < 50 || c.Baud > 4000000 {
			return nil, fmt.Errorf("baud %d out of range (50…4000000)", c.Baud)
		}
		m.BaudRate = c.Baud
	}
	if c.DataBits != 0 {
		if c.DataBits < 5 || c.DataBits > 8 {
			return nil, fmt.Errorf("data_bits %d: want 5, 6, 7 or 8", c.DataBits)
		}
		m.DataBits = c.DataBits
	}
	p, ok := parities[strings.ToLower(c.Parity)]
	if !ok {
		return nil, fmt.Errorf("parity %q: want none, even, odd, mark or space", c.Parity)
	}
	m.Parity = p
	switch c.StopBits {
	case 0, 1:
		m.StopBits = serial.OneStopBit
	case 1.5:
		m.StopBits = serial.OnePointFiveStopBits
	case 2:
		m.StopBits = serial.TwoStopBits
	default:
		return nil, fmt.Errorf("stop_bits %g: want 1, 1.5 or 2", c.StopBits)
	}
	return m, nil
}

// Serial is a serial port that is reopened, with backoff and forever, when
// it disappears. The outage is logged and counted; the partial line at the
// moment of loss is ended with an LF so it cannot merge with the first line
// after the port comes back.
type Serial struct {
	cfg  SerialConfig
	mode *serial.Mode
	log  zerolog.Logger

	mu      sync.Mutex
	port    serial.Port // nil while lost
	done    chan struct{}
	closing atomic.Bool
	once    sync.Once

	pendingLF bool // owned by the reading goroutine

	hmu    sync.Mutex
	health Health
}

// OpenSerial opens the port. A port that cannot be opened now is an error
// that says what to do; once open, losses are recovered inside Read.
func OpenSerial(cfg SerialConfig, log zerolog.Logger) (*Serial, error) {
	mode, err := cfg.mode()
	if err != nil {
		return nil, err
	}
	if cfg.MinBackoff <= 0 {
		cfg.MinBackoff = 100 * time.Millisecond
	}
	if cfg.MaxBackoff <= 0 {
		cfg.MaxBackoff = 5 * time.Second
	}
	path, err := cfg.resolve()
	if err != nil {
		return nil, err
	}
	p, err := serial.Open(path, mode)
	if err != nil {
		return nil, explainOpen(path, err)
	}
	s := &Serial{cfg: cfg, mode: mode, log: log, port: p, done: make(chan struct{})}
	s.health = Health{Connected: true, Since: time.Now()}
	return s, nil
}

// explainOpen turns an open error into one line saying what is wrong and
// what to do.
func explainOpen(path string, err error) error {
	var pe *serial.PortError
	if errors.As(err, &pe) {
		switch pe.Code() {
		case serial.PortBusy:
			return fmt.Errorf("serial port %s is in use by another program: stop it, or read its recording instead", path)
		case serial.PermissionDenied:
			return fmt.Errorf("no permission to open serial port %s: add the user to the dialout group", path)
		case serial.PortNotFound:
			return fmt.Errorf("serial port %s: %w: check the cable and the path (breathd ports lists the ports)", path, fs.ErrNotExist)
		}
		return fmt.Errorf("serial port %s: %s", path, pe.Error())
	}
	if errors.Is(err, fs.ErrNotExist) {
		return fmt.Errorf("serial port %s: %w: check the cable and the path (breathd ports lists the ports)", path, fs.ErrNotExist)
	}
	if errors.Is(err, syscall.ENOTTY) {
		return fmt.Errorf("%s is not a serial port", path)
	}
	return fmt.Errorf("serial port %s: %w", path, err)
}

// Read reads from the port, reopening it when it was lost. After Close it
// returns io.EOF.
func (s *Serial) Read(p []byte) (int, error) {
	for {
		if s.closing.Load() {
			return 0, io.EOF
		}
		s.mu.Lock()
		port := s.port
		s.mu.Unlock()
		if port == nil {
			if !s.reopen() {
				return 0, io.EOF
			}
			continue
		}
		if s.pendingLF && len(p) > 0 {
			s.pendingLF = false
			p[0] = '\n'
			return 1, nil
		}
		n, err := port.Read(p)
		if n > 0 {
			return n, nil
		}
		if err == nil {
			continue
		}
		if s.closing.Load() {
			return 0, io.EOF
		}
		s.lost(port, err)
	}
}

// lost closes a failed port and records the outage. Every read error is
// treated as a loss: EIO and ENXIO on unplug, a PortClosed without our own
// Close, or anything else — a device never stops on a read error.
func (s *Serial) lost(port serial.Port, err error) {
	port.Close()
	s.mu.Lock()
	if s.port == port {
		s.port = nil
	}
	s.mu.Unlock()
	s.pendingLF = true
	s.hmu.Lock()
	s.health.Connected = false
	s.health.Outages++
	s.health.Since = time.Now()
	s.health.LastError = readErrText(err)
	s.hmu.Unlock()
	s.log.Warn().Str("port", s.cfg.Path).Str("cause", readErrText(err)).Msg("serial port lost; reopening")
}

func readErrText(err error) string {
	var pe *serial.PortError
	if errors.As(err, &pe) {
		return pe.Error()
	}
	return err.Error()
}

// reopen tries to open the port until it succeeds (true) or Close is
// called (false), waiting MinBackoff, doubling up to MaxBackoff.
func (s *Serial) reopen() bool {
	delay := s.cfg.MinBackoff
	for tries := 1; ; tries++ {
		select {
		case <-s.done:
			return false
		case <-time.After(delay):
		}
		path, err := s.cfg.resolve()
		var p serial.Port
		if err == nil {
			p, err = serial.Open(path, s.mode)
		}
		if err == nil {
			s.mu.Lock()
			if s.closing.Load() {
				s.mu.Unlock()
				p.Close()
				return false
			}
			s.port = p
			s.mu.Unlock()
			s.hmu.Lock()
			out := time.Since(s.health.Since)
			s.health.Connected, s.health.Since = true, time.Now()
			s.health.Reopens++
			s.hmu.Unlock()
			s.log.Info().Str("port", s.cfg.Path).Dur("outage", out).Int("tries", tries).Msg("serial port back")
			return true
		}
		if tries == 1 || tries%20 == 0 {
			s.log.Debug().Str("port", s.cfg.Path).Int("tries", tries).Err(err).Msg("serial port still absent")
		}
		delay = min(2*delay, s.cfg.MaxBackoff)
	}
}

// Close closes the port and unblocks a pending Read. It is safe to call
// more than once and from any goroutine.
func (s *Serial) Close() error {
	var err error
	s.once.Do(func() {
		s.closing.Store(true)
		close(s.done)
		s.mu.Lock()
		if s.port != nil {
			err = s.port.Close()
		}
		s.mu.Unlock()
	})
	return err
}

// Health returns the port's connection state.
func (s *Serial) Health() Health {
	s.hmu.Lock()
	defer s.hmu.Unlock()
	return s.health
}

// resolve returns the port's path: Path, or the port whose USB serial
// number is SerialNumber.
func (c SerialConfig) resolve() (string, error) {
	if c.SerialNumber == "" {
		return c.Path, nil
	}
	ports, err := enumeratePorts()
	if err != nil {
		return "", fmt.Errorf("list serial ports: %w", err)
	}
	for _, p := range ports {
		if p.USB && strings.EqualFold(p.SerialNumber, c.SerialNumber) {
			return p.Path, nil
		}
	}
	return "", fmt.Errorf("no USB serial port with serial number %q is plugged in (breathd ports lists them)", c.SerialNumber)
}

// PortInfo describes one serial port of the machine.
type PortInfo struct {
	Path         string
	USB          bool
	VID, PID     string
	SerialNumber string
	Product      string
}

// Ports lists the machine's serial ports with their USB details.
func Ports() ([]PortInfo, error) {
	list, err := enumeratePorts()
	if err != nil {
		return nil, fmt.Errorf("list serial ports: %w", err)
	}
	return list, nil
}
