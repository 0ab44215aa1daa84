package device

import (
	"io"
	"math"
	"strconv"
	"sync"
	"time"

	"breathd/mechanics/lungsim"
)

// SimFormat says how the simulated ventilator prints its lines.
type SimFormat struct {
	Delimiter byte    // ',' (default), ';', '\t' or ' '
	Header    bool    // print a header line naming the columns
	NoTime    bool    // leave out the t column (the reader then needs the rate)
	TScale    float64 // printed t = seconds × TScale (1 for s, 1000 for ms); 0: 1
	PawScale  float64 // printed paw = cmH2O × PawScale; 0: 1
	FlowScale float64 // printed flow = L/min × FlowScale, sign included; 0: 1
	// Directive, if set, is printed as a comment line first (a breathd
	// format directive), so that a reader needs no flags.
	Directive string
}

// Sim is a simulated ventilator as a byte source: the lung model's samples
// printed as sample lines, either as fast as the reader takes them or in
// real time.
type Sim struct {
	sim     *lungsim.Sim
	f       SimFormat
	speed   float64 // 1 real time, N times faster, 0 as fast as the reader takes it
	pDigits int     // decimals of paw
	fDigits int     // decimals of flow
	tDigits int     // decimals of t

	out   []byte // formatted, not yet read
	buf   []byte // out's backing array, reused
	s     lungsim.SimSample
	done  chan struct{}
	once  sync.Once
	t0    time.Time
	n     int64 // samples formatted
	head  bool  // header written
	timer *time.Timer
}

// Preamble is the number of lines printed before the first sample: the
// directive and the header, when set.
func (f SimFormat) Preamble() int64 {
	var n int64
	if f.Directive != "" {
		n++
	}
	if f.Header {
		n++
	}
	return n
}

// linesPerChunk is how many lines a fast Read formats at once.
const linesPerChunk = 512

// NewSim makes a simulated source for a scenario (defaults applied and
// validated by the caller), released at speed times real time (0: as fast
// as the reader takes it). truth, if set, receives each breath's truth.
func NewSim(sc lungsim.Scenario, f SimFormat, speed float64, truth func(lungsim.Truth)) *Sim {
	if f.Delimiter == 0 {
		f.Delimiter = ','
	}
	for _, p := range []*float64{&f.TScale, &f.PawScale, &f.FlowScale} {
		if *p == 0 {
			*p = 1
		}
	}
	sim := lungsim.NewSim(sc, truth)
	s := &Sim{sim: sim, f: f, speed: speed, done: make(chan struct{})}
	d := sim.Scenario().Sensor.Digits
	s.pDigits, s.fDigits = d+extraDigits(f.PawScale), d+extraDigits(f.FlowScale)
	s.tDigits = timeDigits(sim.RateHz() / f.TScale)
	return s
}

// extraDigits keeps the printed resolution when a unit makes the numbers
// smaller (kPa, L/s): one more decimal per factor of ten.
func extraDigits(scale float64) int {
	return max(0, int(math.Ceil(math.Log10(1/math.Abs(scale))-1e-9)))
}

// timeDigits is the number of decimals that print every sample time of a
// rate exactly, at most 6.
func timeDigits(rate float64) int {
	step := 1 / rate
	for d := 0; d < 6; d++ {
		x := step * math.Pow10(d)
		if math.Abs(x-math.Round(x)) < 1e-9 {
			return d
		}
	}
	return 6
}

// Read returns the next lines; at the end of the scenario io.EOF.
func (s *Sim) Read(p []byte) (int, error) {
	for len(s.out) == 0 {
		select {
		case <-s.done:
			return 0, io.EOF
		default:
		}
		if !s.fill() {
			return 0, io.EOF
		}
	}
	n := copy(p, s.out)
	s.out = s.out[n:]
	return n, nil
}

// fill formats the next lines: a chunk, or when paced every sample due by
// now (waiting for the next one). It reports false at the end.
func (s *Sim) fill() bool {
	buf := s.buf[:0]
	if !s.head {
		s.head = true
		s.t0 = time.Now()
		if s.f.Directive != "" {
			buf = append(buf, "# "+s.f.Directive+"\n"...)
		}
		if s.f.Header {
			buf = s.appendHeader(buf)
		}
	}
	count := linesPerChunk
	if s.speed > 0 {
		// Release what is due, in batches of about 40 ms like a serial
		// port's driver: one wake-up per sample would cost more than the
		// sample's whole analysis.
		rate := s.sim.RateHz() * s.speed // samples per wall-clock second
		batch := max(1, int64(rate*0.04))
		due := int64(time.Since(s.t0).Seconds()*rate) + 1
		if due < s.n+batch {
			wait := time.Duration(float64(s.n+batch-1)/rate*float64(time.Second)) - time.Since(s.t0)
			if s.timer == nil {
				s.timer = time.NewTimer(wait)
			} else {
				s.timer.Reset(wait)
			}
			select {
			case <-s.done:
				return false
			case <-s.timer.C:
			}
			due = s.n + batch
		}
		count = int(due - s.n)
	}
	for i := 0; i < count; i++ {
		if !s.sim.Next(&s.s) {
			s.buf, s.out = buf, buf
			return len(buf) > 0
		}
		s.n++
		buf = s.appendLine(buf)
	}
	s.buf, s.out = buf, buf
	return true
}

func (s *Sim) appendHeader(b []byte) []byte {
	d := s.f.Delimiter
	if !s.f.NoTime {
		b = append(b, 't', d)
	}
	b = append(b, "paw"...)
	b = append(b, d)
	b = append(b, "flow\n"...)
	return b
}

func (s *Sim) appendLine(b []byte) []byte {
	d := s.f.Delimiter
	if !s.f.NoTime {
		b = strconv.AppendFloat(b, s.s.T*s.f.TScale, 'f', s.tDigits, 64)
		b = append(b, d)
	}
	b = strconv.AppendFloat(b, s.s.Paw*s.f.PawScale, 'f', s.pDigits, 64)
	b = append(b, d)
	b = strconv.AppendFloat(b, s.s.Flow*s.f.FlowScale, 'f', s.fDigits, 64)
	return append(b, '\n')
}

// Close ends the stream; a blocked Read returns io.EOF.
func (s *Sim) Close() error {
	s.once.Do(func() { close(s.done) })
	return nil
}
