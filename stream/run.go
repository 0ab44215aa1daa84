package stream

import (
	"context"
	"errors"
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"
	"sync"
	"time"

	"breathd/alerts"
	"breathd/device"
	"breathd/mechanics"
	"breathd/stream/lines"

	"github.com/rs/zerolog"
)

// Sink receives each device's breaths. It is called from the device's
// loop and must not keep b or w after it returns; w.Trend() gives the
// rolling summary, computed once per breath for all sinks that ask.
type Sink interface {
	Breath(device string, b *mechanics.Breath, w *mechanics.Window)
}

// SampleSink takes every decoded sample, with what the loop knows of the
// stream's timing.
type SampleSink interface {
	Sample(s *lines.Sample, t Timing)
}

// SampleSinks passes each sample to every sink in turn.
type SampleSinks []SampleSink

// Sample calls every sink.
func (s SampleSinks) Sample(x *lines.Sample, t Timing) {
	for _, k := range s {
		k.Sample(x, t)
	}
}

// Timing is what the loop knows of the stream's time.
type Timing interface {
	// WallAt is the wall-clock time of stream time t (zero when unknown).
	WallAt(t float64) time.Time
	// RateHz is the configured rate, or the measured one once the stream
	// spans 2 s; 0 before.
	RateHz() float64
}

// EventSink is implemented by sinks that also take rule events. Calls for
// one device are serialised but may come from different goroutines (the
// loop, the technical ticker, an acknowledgement). active is the set of
// rules raised after the event.
type EventSink interface {
	Event(ev *alerts.Event, active []alerts.Active)
}

// Sinks passes each breath and event to every sink in turn.
type Sinks []Sink

// Breath calls every sink.
func (s Sinks) Breath(device string, b *mechanics.Breath, w *mechanics.Window) {
	for _, k := range s {
		k.Breath(device, b, w)
	}
}

// Event calls every sink that takes events.
func (s Sinks) Event(ev *alerts.Event, active []alerts.Active) {
	for _, k := range s {
		if es, ok := k.(EventSink); ok {
			es.Event(ev, active)
		}
	}
}

// Config is one device's loop settings.
type Config struct {
	Device    string                 // device id, for logs and reports
	Format    lines.Format           // how to decode the stream
	Mechanics mechanics.Config       // breath detection and metrics
	Window    mechanics.WindowConfig // the rolling window
	Rules     []alerts.Rule          // the rules to evaluate (merged with the defaults by the caller); nil: none
	Sink      Sink                   // receives breaths (and events, if it is an EventSink); may be nil
	Control   *Control               // if set, lets other goroutines acknowledge events
	// Live says the source delivers in real time (a port, stdin, a paced
	// replay): technical rules are then also evaluated on a wall-clock
	// ticker, so that "no samples" is seen while nothing arrives.
	Live bool
	// Ahead decodes in a goroutine of its own, handing batches of samples
	// to the analysis, for a recording read as fast as possible on a
	// machine with a second core. Ignored for live or paced sources.
	Ahead bool
	Every time.Duration // how often Report is called while running; default 5 s
	// Samples, if set, is given every decoded sample on the loop's
	// goroutine (the EDF+ copy of a recording); it must not allocate.
	Samples SampleSink
	// Run names this run of the device in event ids (and, by the caller,
	// in records); default the start time in base 36.
	Run string
	// Report, if set, is called every Every from a separate goroutine and
	// once more, with Final set, when Run ends.
	Report func(Status)
	Log    zerolog.Logger
}

// Status is a snapshot of one device's loop.
type Status struct {
	Device    string
	Counts    lines.Counts
	Breaths   int64              // breaths completed
	Drops     mechanics.Drops    // breaths in progress dropped, by cause
	Channels  mechanics.Channels // the channels' delay, alignment and noise
	Events    int64              // rule transitions
	Health    device.Health      // the source's, when it reports one
	HasHealth bool
	Recording device.RecordStats // the raw recording's, when the source records
	Recorded  bool
	// Hint names the likely cause when the numbers look like a format read
	// wrongly, and the flag that fixes it; "" when they look right
	Hint    string
	Elapsed time.Duration // since Run started
	Final   bool
}

// Control acknowledges a device's events from outside its loop and reads
// its counters, which it keeps after Run ends.
type Control struct {
	mu    sync.Mutex
	l     *loop
	final *Status // the counters when Run ended
}

// ErrNotRunning is returned by Control.Ack before Run starts or after it
// ends.
var ErrNotRunning = errors.New("device not running")

// running returns the loop while Run runs, else nil.
func (c *Control) running() *loop {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.l
}

// Ack acknowledges the raised rule whose raising event has this id.
func (c *Control) Ack(id string) error {
	l := c.running()
	if l == nil {
		return ErrNotRunning
	}
	l.emu.Lock()
	defer l.emu.Unlock()
	evs, err := l.eng.Ack(id, l.lastT, time.Now())
	l.deliver(evs)
	return err
}

// Status returns the device's counters now, or as they were when Run
// ended (zero before it starts).
func (c *Control) Status() Status {
	l := c.running()
	if l == nil {
		c.mu.Lock()
		defer c.mu.Unlock()
		if c.final != nil {
			return *c.final
		}
		return Status{}
	}
	return l.status()
}

// headerSetter is a source that records (device.Recorder): it is told how
// to describe the stream once the decoder has seen its header.
type headerSetter interface {
	SetHeader(func() string)
}

// tickEvery is how often technical rules are evaluated, in stream time and
// on the wall-clock ticker.
const tickEvery = 1.0 // s

// Run reads src until it ends or ctx is done, decoding it with cfg.Format,
// finding breaths and evaluating rules. It closes src when ctx is done so
// that a blocked read returns, and always closes it before returning. The
// end of src and a cancelled ctx are clean ends (nil error); a stream that
// cannot be decoded, or a read error, is returned.
func Run(ctx context.Context, src io.ReadCloser, cfg Config) (Status, error) {
	l := &loop{cfg: cfg, src: src, start: time.Now(), lastBreathT: math.NaN(), lastT: math.NaN(), san: newSanity()}
	dec, err := lines.NewDecoder(snapReader{l}, cfg.Format)
	if err == nil {
		// sized for up to 1000 Hz whatever the stream turns out to be
		l.seg, err = mechanics.NewSegmenter(cfg.Mechanics, 1000)
	}
	if err == nil {
		l.win, err = mechanics.NewWindow(cfg.Window)
	}
	if err == nil {
		run := cfg.Run
		if run == "" {
			run = strconv.FormatInt(l.start.Unix(), 36)
		}
		l.eng, err = alerts.NewEngine(cfg.Device, run, cfg.Rules)
	}
	if err != nil {
		src.Close()
		return Status{Device: cfg.Device}, err
	}
	l.dec = dec
	if h, ok := src.(headerSetter); ok {
		// a recording's later files start with the format as decoded, header included
		h.SetHeader(func() string { return dec.Format().Directive() })
	}
	if es, ok := cfg.Sink.(EventSink); ok {
		l.events = es
	}
	l.pacer = device.PacerOf(src)
	if cfg.Ahead && !cfg.Live && (l.pacer == nil || l.pacer.Speed <= 0) {
		l.aheadOn, l.pacer, l.ahead = true, nil, &batch{}
	}
	if cfg.Control != nil {
		cfg.Control.mu.Lock()
		cfg.Control.l = l
		cfg.Control.mu.Unlock()
		defer func() {
			st := l.status()
			st.Final = true
			cfg.Control.mu.Lock()
			cfg.Control.l, cfg.Control.final = nil, &st
			cfg.Control.mu.Unlock()
		}()
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
	if cfg.Live {
		wg.Go(func() { l.wallTicks(done) })
	}
	if l.aheadOn {
		err = l.runAhead(ctx)
	} else {
		err = l.run(ctx)
	}
	close(done)
	wg.Wait()
	src.Close()
	l.snapshot()
	c := l.counts()
	l.setHint(l.san.hint(&c)) // a short stream may end before its first tick
	st := l.status()
	st.Final = true
	if cfg.Report != nil {
		cfg.Report(st)
	}
	return st, err
}

type loop struct {
	cfg    Config
	src    io.ReadCloser
	dec    *lines.Decoder
	seg    *mechanics.Segmenter
	win    *mechanics.Window
	pacer  *device.Pacer
	events EventSink
	start  time.Time

	// owned by the loop goroutine
	nextTick    float64
	prevT       float64
	lastBreathT float64
	ticks       int64
	badRing     [60]int64 // bad-line totals at the last 60 ticks
	sampleRing  [11]int64 // sample totals at the last 11 ticks
	tickTRing   [11]float64

	// emu guards the engine and lastT for the ticker and acknowledgements
	emu   sync.Mutex
	eng   *alerts.Engine
	lastT float64 // stream time of the latest sample, s
	nEv   int64

	// ahead is the batch being analysed when decoding runs ahead (nil
	// otherwise): its counters and clock stand for the decoder's
	ahead   *batch
	aheadOn bool // set before decoding starts

	headerWarn Throttle // unusable headers: logged once a minute at most
	nSamples   int64    // samples analysed (the decoder's count may run ahead)
	san        sanity   // signs of a format read wrongly
	hint       string   // the current one, "" when none

	mu    sync.Mutex // guards the snapshot
	snap  lines.Counts
	snapB int64
	snapD mechanics.Drops
	snapC mechanics.Channels
	snapE int64
	// snapHint is the hint as of the latest tick
	snapHint string
}

func (l *loop) run(ctx context.Context) error {
	var samples [runBatch]lines.Sample
	size := len(samples)
	if l.pacer != nil {
		size = 1 // the counters then never run ahead of the pacing
	}
	for {
		n, err := l.dec.DecodeBatch(samples[:size])
		for i := range samples[:n] {
			s := &samples[i]
			if l.pacer != nil && l.pacer.Wait(ctx, s.T) != nil {
				l.snapshot()
				return nil
			}
			l.sample(s)
		}
		if err == nil {
			continue
		}
		var le *lines.LineError
		switch {
		case errors.As(err, &le):
			l.badLine(le)
			continue
		case errors.Is(err, io.EOF), ctx.Err() != nil:
			l.snapshot()
			return nil
		}
		l.snapshot()
		var fe *lines.FormatError
		if errors.As(err, &fe) {
			return fmt.Errorf("%s: cannot decode the stream: %w", l.cfg.Device, err)
		}
		return fmt.Errorf("%s: read: %w", l.cfg.Device, err)
	}
}

// runBatch is the samples run decodes at a time: on a live source, the
// ones already read.
const runBatch = 256

// sample is the analysis of one sample.
func (l *loop) sample(s *lines.Sample) {
	l.nSamples++
	l.san.sample(s.Paw, s.Flow)
	if l.cfg.Samples != nil {
		l.cfg.Samples.Sample(s, l)
	}
	if b := l.seg.Add(s.T, s.Paw, s.Flow, s.Gap); b != nil {
		l.breath(b, s.T)
	}
	if s.T >= l.nextTick || s.Gap {
		l.tick(s)
	}
	l.prevT = s.T
}

// batch is a run of decoded samples handed from the decoding goroutine to
// the analysis (Config.Ahead), with the decoder's counters after it and
// the wall-clock anchor in force for all of its samples.
type batch struct {
	s      []lines.Sample
	counts lines.Counts
	wall   lines.Clock
	err    error
}

// batchSize is the samples a batch holds: 41 s at 100 Hz.
const batchSize = 4096

// runAhead is run with decoding in a goroutine of its own. The analysis
// of each sample is the same as in run; only the counters and the clock
// are taken from the batch.
func (l *loop) runAhead(ctx context.Context) error {
	full := make(chan *batch, 2)
	free := make(chan *batch, 3)
	for range 3 {
		free <- &batch{s: make([]lines.Sample, 0, batchSize)}
	}
	go l.decodeAhead(full, free)
	var err error
	for b := range full {
		l.ahead = b
		for i := range b.s {
			l.sample(&b.s[i])
		}
		l.snapshot()
		if b.err != nil {
			err = b.err
			continue // the decoder closes full after the last batch
		}
		free <- b
	}
	var le *lines.LineError
	switch {
	case err == nil, errors.Is(err, io.EOF), ctx.Err() != nil, errors.As(err, &le):
		return nil
	}
	var fe *lines.FormatError
	if errors.As(err, &fe) {
		return fmt.Errorf("%s: cannot decode the stream: %w", l.cfg.Device, err)
	}
	return fmt.Errorf("%s: read: %w", l.cfg.Device, err)
}

// decodeAhead fills batches until the stream ends; a batch ends early
// when a clock directive changes the wall-clock anchor.
func (l *loop) decodeAhead(full, free chan *batch) {
	defer close(full)
	b := <-free
	b.s = b.s[:0]
	for {
		// A clock directive can only come before the first sample of a
		// DecodeBatch; a batch is sent before a call that may meet one,
		// so that its samples share one wall-clock anchor.
		if len(b.s) > 0 && (len(b.s) == cap(b.s) || !l.dec.DataLineBuffered()) {
			b.counts = l.dec.Counts()
			full <- b
			b = <-free
			b.s, b.err = b.s[:0], nil
		}
		k := len(b.s)
		n, err := l.dec.DecodeBatch(b.s[k:cap(b.s)])
		if k == 0 {
			b.wall = l.dec.Clock()
		}
		b.s = b.s[:k+n]
		var le *lines.LineError
		if errors.As(err, &le) {
			l.badLine(le)
			continue
		}
		if err != nil {
			b.counts, b.err = l.dec.Counts(), err
			full <- b
			return
		}
	}
}

// breath takes a completed breath; cur is the stream time of the sample
// being analysed.
func (l *loop) breath(b *mechanics.Breath, cur float64) {
	b.At = l.wall(b.TStart, cur)
	l.san.breath(b)
	l.win.Add(b)
	l.lastBreathT = b.TEnd
	if l.cfg.Sink != nil {
		l.cfg.Sink.Breath(l.cfg.Device, b, l.win)
	}
	l.emu.Lock()
	l.lastT = b.TEnd
	l.deliver(l.eng.Breath(b, l.win, l.wall(b.TEnd, cur)))
	l.emu.Unlock()
}

// WallAt is the wall-clock time of stream time t (Timing).
func (l *loop) WallAt(t float64) time.Time { return l.wall(t, t) }

// RateHz is the configured rate, or the measured one once the stream spans
// 2 s (Timing).
func (l *loop) RateHz() float64 {
	f := l.cfg.Format
	if l.ahead == nil {
		f = l.dec.Format() // as completed by a recording's directive (decoding ahead, the decoder is its goroutine's)
	}
	if r := f.RateHz; r > 0 {
		return r
	}
	if c := l.counts(); c.Span() >= 2 {
		return c.RateHz()
	}
	return 0
}

// wall is the wall-clock time of stream time t, cur being the stream time
// of the sample being analysed: from the recording's clock directives when
// it has them; on a live source, when the sample at t was read (now, less
// the stream time since); else unknown (zero): a recording without a
// clock has no wall-clock time, and the time of its analysis is not one.
func (l *loop) wall(t, cur float64) time.Time {
	var a lines.Clock
	if l.ahead != nil {
		a = l.ahead.wall // decoding ahead: the decoder belongs to its goroutine
	} else {
		a = l.dec.Clock()
	}
	if w, ok := a.At(t); ok {
		return w
	}
	if l.cfg.Live {
		return time.Now().Add(-time.Duration((cur - t) * float64(time.Second)))
	}
	return time.Time{}
}

// counts are the decoder's counters as of the sample being analysed.
func (l *loop) counts() lines.Counts {
	if l.ahead != nil {
		return l.ahead.counts
	}
	return l.dec.Counts()
}

// deliver passes events to the sink; emu is held.
func (l *loop) deliver(evs []alerts.Event) {
	if len(evs) == 0 {
		return
	}
	l.nEv += int64(len(evs))
	if l.events == nil {
		return
	}
	active := l.eng.Active()
	for i := range evs {
		l.events.Event(&evs[i], active)
	}
}

// tick evaluates the technical rules in stream time.
func (l *loop) tick(s *lines.Sample) {
	c := l.counts()
	l.ticks++
	l.nextTick = s.T + tickEvery
	tech := alerts.Unknown()
	if l.ticks > 1 {
		tech.SinceSample = s.T - l.prevT
	}
	if !math.IsNaN(l.lastBreathT) {
		tech.SinceBreath = s.T - l.lastBreathT
	} else if c.Samples > 1 {
		tech.SinceBreath = s.T - c.FirstT
	}
	tech.CircuitOpen = 0
	if l.seg.Open() {
		tech.CircuitOpen = 1
	}
	i := l.ticks % int64(len(l.badRing))
	old := l.badRing[i]
	l.badRing[i] = c.BadTotal()
	if l.ticks > int64(len(l.badRing)) {
		tech.BadPerMin = float64(c.BadTotal() - old)
	} else {
		tech.BadPerMin = float64(c.BadTotal()) / math.Max(1, (s.T-c.FirstT)/60)
	}
	k := l.ticks % int64(len(l.sampleRing))
	oldN, oldT := l.sampleRing[k], l.tickTRing[k]
	l.sampleRing[k], l.tickTRing[k] = l.nSamples, s.T
	if want := l.cfg.Format.RateHz; want > 0 && l.ticks > int64(len(l.sampleRing)) && s.T > oldT {
		seen := float64(l.nSamples-oldN) / (s.T - oldT)
		tech.RateError = math.Abs(seen-want) / want * 100
	}
	if h, ok := device.HealthOf(l.src); ok && !h.Connected {
		tech.PortLost = 1
	} else {
		tech.PortLost = 0
	}
	tech.FormatSuspect = 0
	if h := l.san.hint(&c); h != "" {
		tech.FormatSuspect = 1
		if h != l.hint {
			l.cfg.Log.Warn().Str("hint", h).Msg("the numbers look like a format read wrongly")
		}
		l.setHint(h)
	} else if l.hint != "" {
		l.setHint("")
	}
	l.emu.Lock()
	l.lastT = s.T
	l.deliver(l.eng.Tick(tech, s.T, l.wall(s.T, s.T)))
	l.emu.Unlock()
}

// wallTicks evaluates "no samples" and "port lost" once a second of wall
// time while no samples arrive, in stream time extrapolated from the last
// sample.
func (l *loop) wallTicks(done <-chan struct{}) {
	t := time.NewTicker(time.Duration(tickEvery * float64(time.Second)))
	defer t.Stop()
	var lastN int64 = -1
	changed := time.Now()
	for {
		select {
		case <-done:
			return
		case now := <-t.C:
			st := l.status()
			lost := st.HasHealth && !st.Health.Connected
			if st.Counts.Samples != lastN {
				lastN, changed = st.Counts.Samples, now
				if !lost {
					continue // samples flow: the stream-time ticks see to it
				}
			}
			idle := now.Sub(changed).Seconds()
			if idle < 2*tickEvery && !lost {
				continue
			}
			// a lost port is told at every tick, so that port_lost is
			// raised after its two evaluations (2 s), not after the idle
			// time it takes to notice that no samples come
			tech := alerts.Unknown()
			if idle >= 2*tickEvery {
				tech.SinceSample = idle
			}
			tech.PortLost = 0
			if lost {
				tech.PortLost = 1
			}
			l.emu.Lock()
			at := l.lastT
			if math.IsNaN(at) {
				at = 0
			}
			l.deliver(l.eng.Tick(tech, at+idle, now))
			l.emu.Unlock()
		}
	}
}

// badLine logs the first bad lines of each cause, then every 1000th.
func (l *loop) badLine(le *lines.LineError) {
	c := l.dec.Counts().Bad[le.Cause]
	if le.Cause == lines.CauseBadHeader {
		if ok, held := l.headerWarn.Allow(time.Now()); ok {
			l.cfg.Log.Warn().Int64("line", le.Line).Err(l.dec.HeaderError()).Int64("held_back", held).Int64("count", c).
				Msg("a header line breathd cannot use was skipped: data lines are read with the configured columns (check --columns) until a usable header comes")
		}
		return
	}
	if c <= 3 || c%1000 == 0 {
		l.cfg.Log.Debug().Int64("line", le.Line).Str("cause", le.Cause.String()).Int64("count", c).Msg("bad line skipped")
	}
}

// snapReader takes a counters snapshot before every read of the source,
// so the reporter sees every sample decoded before the loop waits for
// more, at no cost per sample.
type snapReader struct{ l *loop }

func (r snapReader) Read(p []byte) (int, error) {
	if !r.l.aheadOn {
		r.l.snapshot() // decoding ahead, the analysis snapshots after each batch
	}
	return r.l.src.Read(p)
}

func (l *loop) snapshot() {
	l.emu.Lock()
	ev := l.nEv
	l.emu.Unlock()
	l.mu.Lock()
	l.snap = l.counts()
	l.snapB, l.snapD, l.snapC, l.snapE = l.seg.Breaths(), l.seg.Drops(), l.seg.Channels(), ev
	l.mu.Unlock()
}

// setHint records the current hint for the status; the loop's goroutine
// owns l.hint, the snapshot mutex guards the copy others read.
func (l *loop) setHint(h string) {
	l.hint = h
	l.mu.Lock()
	l.snapHint = h
	l.mu.Unlock()
}

func (l *loop) status() Status {
	l.mu.Lock()
	st := Status{Device: l.cfg.Device, Counts: l.snap, Breaths: l.snapB, Drops: l.snapD, Channels: l.snapC,
		Events: l.snapE, Elapsed: time.Since(l.start), Hint: l.snapHint}
	l.mu.Unlock()
	st.Health, st.HasHealth = device.HealthOf(l.src)
	if r, ok := l.src.(device.Recording); ok {
		st.Recording, st.Recorded = r.RecordStats(), true
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
		fmt.Fprintf(&b, "  span %.1f s", c.Span())
	}
	fmt.Fprintf(&b, "  breaths %d", st.Breaths)
	if d := st.Drops; d.Gap+d.Open+d.TooLong > 0 {
		fmt.Fprintf(&b, " (dropped: gap %d, open circuit %d, too long %d)", d.Gap, d.Open, d.TooLong)
	}
	if st.Events > 0 {
		fmt.Fprintf(&b, "  events %d", st.Events)
	}
	fmt.Fprintf(&b, "  bad %d", c.BadTotal())
	if c.BadTotal() > 0 {
		b.WriteString(" (" + c.BadCauses() + ")")
	}
	fmt.Fprintf(&b, "  gaps %d", c.Gaps)
	if c.Resyncs > 0 {
		fmt.Fprintf(&b, "  clock resets %d", c.Resyncs)
	}
	if st.HasHealth && (st.Health.Outages > 0 || !st.Health.Connected) {
		state := "connected"
		if !st.Health.Connected {
			state = "lost"
		}
		fmt.Fprintf(&b, "  port %s, lost %d×", state, st.Health.Outages)
	}
	if st.Final {
		b.WriteString("  (end)")
	}
	return b.String()
}
