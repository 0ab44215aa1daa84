package stream

import (
	"context"
	"errors"
	"fmt"
	"io"
	"sort"
	"strings"
	"sync"
	"time"

	"breathd/device"
	"breathd/mechanics"

	"github.com/rs/zerolog"
)

// Sink receives each device's breaths. It is called from the device's
// loop and must not keep b or w after it returns; w.Trend() gives the
// rolling summary, computed once per breath for all sinks that ask.
type Sink interface {
	Breath(device string, b *mechanics.Breath, w *mechanics.Window)
}

// Sinks passes each breath to every sink in turn.
type Sinks []Sink

// Breath calls every sink.
func (s Sinks) Breath(device string, b *mechanics.Breath, w *mechanics.Window) {
	for _, k := range s {
		k.Breath(device, b, w)
	}
}

// Config is one device's loop settings.
type Config struct {
	Device    string                 // device id, for logs and reports
	Format    Format                 // how to decode the stream
	Mechanics mechanics.Config       // breath detection and metrics
	Window    mechanics.WindowConfig // the rolling window
	Sink      Sink                   // receives breaths; may be nil
	Every     time.Duration          // how often Report is called while running; default 5 s
	// Report, if set, is called every Every from a separate goroutine and
	// once more, with Final set, when Run ends.
	Report func(Status)
	Log    zerolog.Logger
}

// Status is a snapshot of one device's loop.
type Status struct {
	Device    string
	Counts    Counts
	Breaths   int64           // breaths completed
	Drops     mechanics.Drops // breaths in progress dropped, by cause
	Health    device.Health   // the source's, when it reports one
	HasHealth bool
	Elapsed   time.Duration // since Run started
	Final     bool
}

// Run reads src until it ends or ctx is done, decoding it with cfg.Format.
// It closes src when ctx is done so that a blocked read returns, and
// always closes it before returning. The end of src and a cancelled ctx
// are clean ends (nil error); a stream that cannot be decoded, or a read
// error, is returned.
func Run(ctx context.Context, src io.ReadCloser, cfg Config) (Status, error) {
	l := &loop{cfg: cfg, src: src, start: time.Now()}
	dec, err := NewDecoder(snapReader{l}, cfg.Format)
	if err == nil {
		// sized for up to 1000 Hz whatever the stream turns out to be
		l.seg, err = mechanics.NewSegmenter(cfg.Mechanics, 1000)
	}
	if err == nil {
		l.win, err = mechanics.NewWindow(cfg.Window)
	}
	if err != nil {
		src.Close()
		return Status{Device: cfg.Device}, err
	}
	l.dec = dec
	if p, ok := src.(device.Paced); ok {
		l.pacer = p.Pacer()
	}
	stop := context.AfterFunc(ctx, func() { src.Close() })
	defer stop()
	var wg sync.WaitGroup
	done := make(chan struct{})
	if cfg.Report != nil {
		every := cfg.Every
		if every <= 0 {
			every = 5 * time.Second
		}
		wg.Go(func() { l.reportEvery(every, done) })
	}
	err = l.run(ctx)
	close(done)
	wg.Wait()
	src.Close()
	st := l.status()
	st.Final = true
	if cfg.Report != nil {
		cfg.Report(st)
	}
	return st, err
}

type loop struct {
	cfg   Config
	src   io.ReadCloser
	dec   *Decoder
	seg   *mechanics.Segmenter
	win   *mechanics.Window
	pacer *device.Pacer
	start time.Time

	mu    sync.Mutex
	snap  Counts
	snapB int64
	snapD mechanics.Drops
}

func (l *loop) run(ctx context.Context) error {
	var s Sample
	for {
		err := l.dec.Decode(&s)
		if err != nil {
			var le *LineError
			switch {
			case errors.As(err, &le):
				l.badLine(le)
				continue
			case errors.Is(err, io.EOF), ctx.Err() != nil:
				l.snapshot()
				return nil
			}
			l.snapshot()
			var fe *FormatError
			if errors.As(err, &fe) {
				return fmt.Errorf("%s: cannot decode the stream: %w", l.cfg.Device, err)
			}
			return fmt.Errorf("%s: read: %w", l.cfg.Device, err)
		}
		if l.pacer != nil {
			if l.pacer.Wait(ctx, s.T) != nil {
				l.snapshot()
				return nil
			}
		}
		if b := l.seg.Add(s.T, s.Paw, s.Flow, s.Gap); b != nil {
			l.win.Add(b)
			if l.cfg.Sink != nil {
				l.cfg.Sink.Breath(l.cfg.Device, b, l.win)
			}
		}
	}
}

// badLine logs the first bad lines of each cause, then every 1000th.
func (l *loop) badLine(le *LineError) {
	c := l.dec.counts.Bad[le.Cause]
	if c <= 3 || c%1000 == 0 {
		l.cfg.Log.Debug().Int64("line", le.Line).Str("cause", le.Cause.String()).Int64("count", c).Msg("bad line skipped")
	}
}

// snapReader takes a counters snapshot before every read of the source,
// so the reporter sees every sample decoded before the loop waits for
// more, at no cost per sample.
type snapReader struct{ l *loop }

func (r snapReader) Read(p []byte) (int, error) {
	r.l.snapshot()
	return r.l.src.Read(p)
}

func (l *loop) snapshot() {
	l.mu.Lock()
	l.snap = l.dec.counts
	l.snapB, l.snapD = l.seg.Breaths(), l.seg.Drops()
	l.mu.Unlock()
}

func (l *loop) status() Status {
	l.mu.Lock()
	st := Status{Device: l.cfg.Device, Counts: l.snap, Breaths: l.snapB, Drops: l.snapD, Elapsed: time.Since(l.start)}
	l.mu.Unlock()
	if h, ok := l.src.(device.HealthReporter); ok {
		st.Health, st.HasHealth = h.Health(), true
	}
	return st
}

func (l *loop) reportEvery(every time.Duration, done <-chan struct{}) {
	t := time.NewTicker(every)
	defer t.Stop()
	for {
		select {
		case <-done:
			return
		case <-t.C:
			l.cfg.Report(l.status())
		}
	}
}

// String renders a status as one console line.
func (st Status) String() string {
	c := &st.Counts
	var b strings.Builder
	fmt.Fprintf(&b, "%s  samples %d", st.Device, c.Samples)
	if r := c.RateHz(); r > 0 {
		fmt.Fprintf(&b, "  rate %.1f Hz", r)
	}
	if c.Samples > 0 {
		fmt.Fprintf(&b, "  span %.1f s", c.LastT-c.FirstT)
	}
	fmt.Fprintf(&b, "  breaths %d", st.Breaths)
	if d := st.Drops; d.Gap+d.Open+d.TooLong > 0 {
		fmt.Fprintf(&b, " (dropped: gap %d, open circuit %d, too long %d)", d.Gap, d.Open, d.TooLong)
	}
	fmt.Fprintf(&b, "  bad %d", c.BadTotal())
	if c.BadTotal() > 0 {
		b.WriteString(" (" + badCauses(c) + ")")
	}
	fmt.Fprintf(&b, "  gaps %d", c.Gaps)
	if c.Resyncs > 0 {
		fmt.Fprintf(&b, "  clock resets %d", c.Resyncs)
	}
	if st.HasHealth && (st.Health.Outages > 0 || !st.Health.Connected) {
		state := "connected"
		if !st.Health.Connected {
			state = "LOST"
		}
		fmt.Fprintf(&b, "  port %s, lost %d×", state, st.Health.Outages)
	}
	if st.Final {
		b.WriteString("  (end)")
	}
	return b.String()
}

func badCauses(c *Counts) string {
	var parts []string
	for i, n := range c.Bad {
		if n > 0 {
			parts = append(parts, fmt.Sprintf("%s %d", Cause(i), n))
		}
	}
	sort.Strings(parts)
	return strings.Join(parts, ", ")
}
