// Package publish sends one device's breaths, trends, events, active rules
// and status to an MQTT broker (paho), with the events and the active set
// kept in a durable queue on disk until the broker has them; it takes
// acknowledgements on the device's ack topic and validates topic parts.
package publish

import (
	"context"
	"crypto/rand"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"breathd/alerts"
	"breathd/mechanics"
	"breathd/stream"
	"breathd/stream/lines"
	"breathd/stream/payload"

	mqtt "github.com/eclipse/paho.mqtt.golang"
	"github.com/rs/zerolog"
	"golang.org/x/sys/unix"
)

// Config configures one device's MQTT publisher.
type Config struct {
	Dial            // the broker and how to reach it
	Root     string // topic root; default "breathd"
	Device   string // device id, validated
	ClientID string // fixed, for a persistent session; default breathd-<host>-<device>
	StateDir string // the device's durable queue; "" keeps it in memory only
	// BreathQoS is the QoS of breath records (0 or 1; default 0).
	BreathQoS   byte
	StatusEvery time.Duration // periodic status; default 10 s
	Version     string        // breathd's version, in the status payload
	Run         string        // this run's id, in the status and records; default random
	Rules       []alerts.Rule // the device's rules, stated on the meta topic
	// Status returns the device's counters for the status payload.
	Status func() stream.Status
	Log    zerolog.Logger
}

var (
	validDevice = regexp.MustCompile(`^[A-Za-z0-9_.-]{1,64}$`)
	validRoot   = regexp.MustCompile(`^[A-Za-z0-9_.-]+(/[A-Za-z0-9_.-]+)*$`)
)

// ValidateTopicParts checks a topic root and a device id so that no
// payload can reach another device's topics.
func ValidateTopicParts(root, device string) error {
	if !validRoot.MatchString(root) || len(root) > 128 {
		return fmt.Errorf("topic root %q: use segments of A–Z a–z 0–9 _ . - separated by /", root)
	}
	return CheckDevice(device)
}

// CheckDevice checks a device id: 1–64 of A–Z a–z 0–9 _ . -, and not "."
// or "..", so that it is one topic level and a file name of its own.
func CheckDevice(id string) error {
	if !validDevice.MatchString(id) || id == "." || id == ".." {
		return fmt.Errorf("device id %q: use 1–64 of A–Z a–z 0–9 _ . -", id)
	}
	return nil
}

// breathQueue bounds the breath and trend records waiting to be sent.
const breathQueue = 1024

type record struct {
	topic   string
	qos     byte
	retain  bool
	payload []byte
}

// Publisher sends one device's breaths, trends, events, active rules and
// status to an MQTT broker through paho. Events and active rules are QoS 1
// through a durable queue (spool); breath records and trends go through a
// bounded queue of breathQueue and are sent only while connected: when the
// broker is away or the queue is full they are dropped and counted. It is
// a Sink and an EventSink.
type Publisher struct {
	cfg     Config
	client  mqtt.Client
	sp      *spool
	topics  struct{ breath, trend, event, active, status, meta, wave, ack string }
	metaDue atomic.Bool // the meta topic is to be (re)published

	q0      chan record
	kick    chan struct{}
	done    chan struct{}
	wg      sync.WaitGroup
	stopped atomic.Bool

	dropped    atomic.Int64 // breath and trend records not sent
	sent       atomic.Int64 // messages the broker took
	reconnects atomic.Int64
	acks       atomic.Int64 // acknowledgements received
	rejected   atomic.Int64 // ack messages refused
	statusSeq  atomic.Int64
	activeSeq  atomic.Int64
	statusDue  atomic.Bool
	ackFn      atomic.Pointer[func(id string) error]
	lastActive atomic.Pointer[[]byte]

	src      payload.Source  // this run, in the status
	lock     *os.File        // held while publishing the device from this machine
	conflict atomic.Bool     // another breathd publishes the device: this one stopped
	warned   atomic.Bool     // the other one was reported
	diskWarn stream.Throttle // disk errors of the queue: one line a minute at most

	// events handed over by the device loop, persisted in order by
	// persistEvents so that no disk write happens on the sample path
	evMu    sync.Mutex
	evQueue []eventItem
	evKick  chan struct{}
	evDone  chan struct{} // closed when persistEvents has ended
}

// eventItem is an event with the active set after it, copied out of the
// device loop.
type eventItem struct {
	ev     alerts.Event
	active []alerts.Active
}

// A Publisher is a sink of the device loop, for breaths and for events.
var (
	_ stream.Sink      = (*Publisher)(nil)
	_ stream.EventSink = (*Publisher)(nil)
)

// New checks the configuration and the state directory and
// connects in the background. Wrong credentials are an error at once; a
// broker that cannot be reached yet is retried, with the events queued.
func New(cfg Config) (*Publisher, error) {
	if cfg.Root == "" {
		cfg.Root = "breathd"
	}
	if err := ValidateTopicParts(cfg.Root, cfg.Device); err != nil {
		return nil, err
	}
	if cfg.StatusEvery <= 0 {
		cfg.StatusEvery = 10 * time.Second
	}
	if cfg.BreathQoS > 1 {
		return nil, errors.New("breath QoS: 0 or 1")
	}
	if cfg.ClientID == "" {
		host, _ := os.Hostname()
		cfg.ClientID = "breathd-" + sanitize(host) + "-" + cfg.Device
	}
	opts, err := cfg.Dial.Options()
	if err != nil {
		return nil, err
	}
	lock, err := lockDevice(cfg)
	if err != nil {
		return nil, err
	}
	sp, err := openSpool(cfg.StateDir)
	if err != nil {
		unlock(lock)
		return nil, err
	}
	p := &Publisher{cfg: cfg, sp: sp, q0: make(chan record, breathQueue), kick: make(chan struct{}, 1), done: make(chan struct{}),
		evKick: make(chan struct{}, 1), evDone: make(chan struct{}), lock: lock}
	host, _ := os.Hostname()
	run := cfg.Run
	if run == "" {
		run = NewRun()
	}
	p.src = payload.Source{Run: run, Host: host, Since: time.Now(), Version: cfg.Version}
	base := cfg.Root + "/" + cfg.Device + "/"
	p.topics.breath, p.topics.trend, p.topics.event = base+"breath", base+"trend", base+"event"
	p.topics.meta, p.topics.wave = base+"meta", base+"wave"
	p.topics.active, p.topics.status, p.topics.ack = base+"active", base+"status", base+"ack"

	p.options(opts)
	client := mqtt.NewClient(opts)
	tok := client.Connect()
	if !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		err := tok.Error()
		if cfg.Dial.Refused(err) {
			sp.close()
			unlock(lock)
			return nil, cfg.Dial.CredentialsRefused()
		}
		client.Disconnect(0)
		cfg.Log.Warn().Str("broker", Redact(cfg.Broker)).Str("cause", ErrText(err)).
			Msg("broker not reachable; events are queued and sent when it is")
		opts.SetConnectRetry(true).SetConnectRetryInterval(2 * time.Second)
		client = mqtt.NewClient(opts)
		client.Connect() // completes in the background
	}
	p.client = client
	p.statusDue.Store(true)
	p.metaDue.Store(true)
	p.setActive(nil) // this run's rules start with none raised
	go p.persistEvents()
	p.wg.Go(p.sendQueued)
	p.wg.Go(p.sendRecords)
	p.wg.Go(p.statusTicks)
	return p, nil
}

func sanitize(s string) string {
	b := []byte(s)
	for i, c := range b {
		if !(c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z' || c >= '0' && c <= '9' || c == '-' || c == '_' || c == '.') {
			b[i] = '_'
		}
	}
	return string(b)
}

// options adds the publisher's session, will and handlers to opts.
func (p *Publisher) options(opts *mqtt.ClientOptions) {
	cfg := &p.cfg
	opts.SetClientID(cfg.ClientID).
		SetCleanSession(false).SetOrderMatters(false).SetResumeSubs(true).
		SetAutoReconnect(true).SetMaxReconnectInterval(15*time.Second).
		SetConnectTimeout(5*time.Second).SetKeepAlive(15*time.Second).SetPingTimeout(5*time.Second).
		SetWriteTimeout(5*time.Second).SetStore(mqtt.NewOrderedMemoryStore()).
		SetBinaryWill(p.topics.status, payload.Will(cfg.Device, "connection lost"), 1, true)
	opts.SetOnConnectHandler(func(c mqtt.Client) {
		cfg.Log.Info().Str("broker", Redact(cfg.Broker)).Msg("connected to the MQTT broker")
		p.statusDue.Store(true)
		if last := p.lastActive.Load(); last != nil {
			p.sp.setActive(*last)
		}
		c.Subscribe(p.topics.ack, 1, p.onAck)
		c.Subscribe(p.topics.status, 1, p.onStatus)
		p.nudge()
	})
	opts.SetConnectionLostHandler(func(_ mqtt.Client, err error) {
		cfg.Log.Warn().Str("cause", ErrText(err)).Msg("lost the MQTT broker; reconnecting")
	})
	opts.SetReconnectingHandler(func(mqtt.Client, *mqtt.ClientOptions) { p.reconnects.Add(1) })
}

func (p *Publisher) nudge() {
	select {
	case p.kick <- struct{}{}:
	default:
	}
}

// SetAck sets the function that acknowledges an event id.
func (p *Publisher) SetAck(fn func(id string) error) { p.ackFn.Store(&fn) }

// ackID is a well-formed event id: device/rule/run-seq.
var ackID = regexp.MustCompile(`^([A-Za-z0-9_.-]{1,64})/[a-z0-9_]{1,48}/[0-9a-z]{1,16}-[0-9]{1,18}$`)

// maxAck bounds an acknowledgement's payload: an event id, perhaps in
// JSON, is some tens of bytes.
const maxAck = 1024

// ParseAck reads an acknowledgement message: an event id, as plain text
// or as {"id": "…"}. It accepts only well-formed ids of this device.
func ParseAck(device string, payload []byte) (string, error) {
	if len(payload) > maxAck {
		return "", fmt.Errorf("ack: %d bytes is too long for an event id (at most %d)", len(payload), maxAck)
	}
	text := strings.TrimSpace(string(payload))
	if strings.HasPrefix(text, "{") {
		var m struct {
			ID string `json:"id"`
		}
		if err := json.Unmarshal([]byte(text), &m); err != nil {
			return "", fmt.Errorf("ack: not JSON with an id: %w", err)
		}
		text = m.ID
	}
	sub := ackID.FindStringSubmatch(text)
	if sub == nil {
		return "", fmt.Errorf("ack: %q is not an event id (device/rule/run-seq)", truncate(text, 80))
	}
	if sub[1] != device {
		return "", fmt.Errorf("ack: event %q belongs to another device", text)
	}
	return text, nil
}

func truncate(s string, n int) string {
	if len(s) > n {
		return s[:n] + "…"
	}
	return s
}

func (p *Publisher) onAck(_ mqtt.Client, m mqtt.Message) {
	id, err := ParseAck(p.cfg.Device, m.Payload())
	if err == nil {
		if fn := p.ackFn.Load(); fn != nil {
			err = (*fn)(id)
		} else {
			err = errors.New("acknowledgements are not taken yet")
		}
	}
	if errors.Is(err, alerts.ErrAcknowledged) {
		p.cfg.Log.Debug().Str("event", id).Msg("acknowledged before: nothing to do")
		return
	}
	if err != nil {
		p.rejected.Add(1)
		p.cfg.Log.Info().Err(err).Msg("acknowledgement refused")
		return
	}
	p.acks.Add(1)
	p.cfg.Log.Info().Str("event", id).Msg("event acknowledged")
}

// Breath queues the breath record and the trend. It never blocks.
func (p *Publisher) Breath(_ string, b *mechanics.Breath, w *mechanics.Window) {
	if p.stopped.Load() || p.conflict.Load() {
		return
	}
	at := b.At // the trend is as of the breath's end
	if !at.IsZero() {
		at = at.Add(time.Duration((b.TEnd - b.TStart) * float64(time.Second)))
	}
	p.offer(record{topic: p.topics.breath, qos: p.cfg.BreathQoS, payload: payload.Breath(p.cfg.Device, p.src.Run, b)})
	p.offer(record{topic: p.topics.trend, retain: true, payload: payload.Trend(p.cfg.Device, b.Seq, w.Trend(), at)})
}

func (p *Publisher) offer(r record) {
	select {
	case p.q0 <- r:
	default:
		p.dropped.Add(1)
	}
}

// Event queues the event and the new set of active rules durably.
func (p *Publisher) Event(ev *alerts.Event, active []alerts.Active) {
	it := eventItem{ev: *ev, active: append([]alerts.Active(nil), active...)}
	p.evMu.Lock()
	p.evQueue = append(p.evQueue, it)
	p.evMu.Unlock()
	select {
	case p.evKick <- struct{}{}:
	default:
	}
}

// persistEvents writes the events handed over by Event to the durable
// queue, in order, with the active set after each, until Close has handed
// over the last.
func (p *Publisher) persistEvents() {
	defer close(p.evDone)
	for {
		p.evMu.Lock()
		items := p.evQueue
		p.evQueue = nil
		p.evMu.Unlock()
		for i := range items {
			it := &items[i]
			if err := p.sp.push(p.topics.event, payload.Event(&it.ev)); err != nil {
				if ok, held := p.diskWarn.Allow(time.Now()); ok {
					p.cfg.Log.Error().Err(err).Str("event", it.ev.ID).Int64("held_back", held).Msg("could not queue the event on disk")
				}
			}
			p.setActive(it.active)
		}
		if len(items) > 0 {
			p.nudge()
			continue
		}
		if p.stopped.Load() {
			return
		}
		<-p.evKick
	}
}

// setActive makes active the retained set of raised rules to deliver.
func (p *Publisher) setActive(active []alerts.Active) {
	payload := payload.Active(p.cfg.Device, p.activeSeq.Add(1), active, time.Now())
	p.lastActive.Store(&payload)
	if err := p.sp.setActive(payload); err != nil {
		if ok, held := p.diskWarn.Allow(time.Now()); ok {
			p.cfg.Log.Error().Err(err).Int64("held_back", held).Msg("could not keep the active rules on disk")
		}
	}
}

// sendQueued delivers the durable queue in order, then the active rules,
// then a due status, one QoS 1 message at a time while connected.
func (p *Publisher) sendQueued() {
	t := time.NewTicker(500 * time.Millisecond)
	defer t.Stop()
	for {
		select {
		case <-p.done:
			return
		case <-p.kick:
		case <-t.C:
		}
		for p.client.IsConnectionOpen() {
			if m, ok := p.sp.head(); ok {
				if !p.publish1(m.Topic, false, m.Payload) {
					break
				}
				if err := p.sp.ack(m.Seq); err != nil {
					if ok, held := p.diskWarn.Allow(time.Now()); ok {
						p.cfg.Log.Error().Err(err).Int64("held_back", held).Msg("could not record a delivered event on disk")
					}
				}
				continue
			}
			if a := p.sp.takeActive(); a != nil {
				if !p.publish1(p.topics.active, true, a) {
					break
				}
				p.sp.activeDone(a)
				continue
			}
			if p.statusDue.Swap(false) {
				if !p.publish1(p.topics.status, true, p.statusPayload("online", "")) {
					p.statusDue.Store(true)
					break
				}
			}
			if p.metaDue.Swap(false) {
				meta := payload.Meta(p.cfg.Device, p.src.Run, p.cfg.Version, p.cfg.Rules, time.Now())
				if !p.publish1(p.topics.meta, true, meta) {
					p.metaDue.Store(true)
					break
				}
			}
			break
		}
	}
}

// publish1 sends one QoS 1 message and waits for the broker's
// acknowledgement (10 s at most); false means "not delivered yet".
func (p *Publisher) publish1(topic string, retain bool, payload []byte) bool {
	tok := p.client.Publish(topic, 1, retain, payload)
	select {
	case <-tok.Done():
	case <-time.After(10 * time.Second):
		return false
	case <-p.done:
		return false
	}
	if tok.Error() != nil {
		return false
	}
	p.sent.Add(1)
	return true
}

// sendRecords sends breath records and trends while connected and drops
// (counting) what comes while not.
func (p *Publisher) sendRecords() {
	for {
		select {
		case <-p.done:
			return
		case r := <-p.q0:
			if !p.client.IsConnectionOpen() {
				p.dropped.Add(1)
				continue
			}
			p.client.Publish(r.topic, r.qos, r.retain, r.payload)
			p.sent.Add(1)
		}
	}
}

func (p *Publisher) statusTicks() {
	t := time.NewTicker(p.cfg.StatusEvery)
	defer t.Stop()
	for {
		select {
		case <-p.done:
			return
		case <-t.C:
			p.statusDue.Store(true)
			p.nudge()
		}
	}
}

// Close drains the queues until ctx ends, publishes the retained offline
// status, and disconnects. It is safe to call once.
func (p *Publisher) Close(ctx context.Context) error {
	p.stopped.Store(true)
	select {
	case p.evKick <- struct{}{}:
	default:
	}
	<-p.evDone // every event handed over is in the queue
	for p.sp.depth() > 0 || len(p.q0) > 0 {
		p.nudge()
		select {
		case <-ctx.Done():
			goto out
		case <-time.After(20 * time.Millisecond):
		}
	}
out:
	left := p.sp.depth()
	close(p.done)
	p.wg.Wait()
	var err error
	if p.conflict.Load() {
		err = fmt.Errorf("device %s was not published: another breathd publishes it on this broker", p.cfg.Device)
	} else if p.client.IsConnectionOpen() {
		// a stopped device has no current trend and no raised rules: an
		// empty retained message removes them from the broker
		p.client.Publish(p.topics.trend, 1, true, []byte{})
		p.client.Publish(p.topics.active, 1, true, []byte{})
		tok := p.client.Publish(p.topics.status, 1, true, p.statusPayload("offline", "stopped"))
		select {
		case <-tok.Done():
			err = tok.Error()
		case <-ctx.Done():
			err = errors.New("the offline status was not confirmed before the deadline")
		}
	} else {
		err = errors.New("broker not connected: the offline status is left to the will")
	}
	p.client.Disconnect(250)
	p.sp.close()
	unlock(p.lock)
	switch {
	case left > 0 && p.cfg.StateDir != "":
		err = errors.Join(err, fmt.Errorf("%d queued messages not delivered; they stay in the state directory %s for the next start", left, p.cfg.StateDir))
	case left > 0:
		err = errors.Join(err, fmt.Errorf("%d queued messages not delivered and lost: there is no state directory (set state_dir or --state-dir to keep them)", left))
	}
	return err
}

// WaveSink is the opt-in waveform topic: the stream downsampled to
// stream.WaveHz, a chunk a second on <root>/<device>/wave, QoS 0, not
// retained; dropped and counted like breath records when the broker is
// away. Give it to the device loop as its SampleSink.
func (p *Publisher) WaveSink() stream.SampleSink {
	return &waveSink{p: p, paw: make([]float64, 0, stream.WaveHz), flow: make([]float64, 0, stream.WaveHz)}
}

type waveSink struct {
	p         *Publisher
	d         stream.Downsample
	t0        float64
	paw, flow []float64
}

// Sample takes a sample; a chunk is encoded once a second, not per sample.
func (w *waveSink) Sample(s *lines.Sample, _ stream.Timing) {
	t, paw, flow, ok := w.d.Add(s)
	if !ok {
		return
	}
	if len(w.paw) == 0 {
		w.t0 = t
	}
	w.paw, w.flow = append(w.paw, paw), append(w.flow, flow)
	if len(w.paw) == stream.WaveHz || s.Gap {
		w.p.offer(record{topic: w.p.topics.wave, payload: payload.Wave(w.p.cfg.Device, w.p.src.Run, w.t0, stream.WaveHz, w.paw, w.flow)})
		w.paw, w.flow = w.paw[:0], w.flow[:0]
	}
}

// NewRun makes a random run id: 8 hex digits.
func NewRun() string {
	b := make([]byte, 4)
	rand.Read(b)
	return hex.EncodeToString(b)
}

// Connected reports whether the publisher is connected to its broker now.
func (p *Publisher) Connected() bool { return p.client.IsConnectionOpen() }

// Counters returns the publisher's counts now.
func (p *Publisher) Counters() payload.Counters {
	unq, lastErr := p.sp.counts()
	return payload.Counters{QueueDepth: int64(p.sp.depth() + len(p.q0)), Dropped: p.dropped.Load(), Sent: p.sent.Load(),
		Reconnects: p.reconnects.Load(), Acks: p.acks.Load(), AcksRefused: p.rejected.Load(), Unqueued: unq, QueueError: lastErr}
}

func (p *Publisher) statusPayload(state, reason string) []byte {
	var st stream.Status
	if p.cfg.Status != nil {
		st = p.cfg.Status()
	}
	return payload.Status(p.cfg.Device, p.statusSeq.Add(1), state, reason, p.src, st, p.Counters(), time.Now())
}

// onStatus watches the device's status topic for another breathd
// publishing the same device: a live (not retained) online status of
// another run. The one that started later stops publishing and says so;
// the other warns once. A retained status is not taken as proof: it may
// outlive its publisher until the broker sends the will. Two publishers
// given the same client id (a client_id configured alike on two machines)
// share one session and take it from each other: each then receives only
// its own status, and this check cannot see the other.
func (p *Publisher) onStatus(_ mqtt.Client, m mqtt.Message) {
	if m.Retained() {
		return
	}
	var st struct {
		State, Run, Host string
		Since            time.Time
	}
	if json.Unmarshal(m.Payload(), &st) != nil || st.State != "online" || st.Run == "" || st.Run == p.src.Run {
		return
	}
	newer := st.Since.Before(p.src.Since) || (st.Since.Equal(p.src.Since) && st.Run < p.src.Run)
	if newer && p.conflict.CompareAndSwap(false, true) {
		p.cfg.Log.Error().Str("other_run", truncate(st.Run, 16)).Str("other_host", truncate(st.Host, 64)).
			Msgf("device %s is already published on this broker by another breathd (run %s on host %s): this one stops publishing it; give each device its own id",
				p.cfg.Device, truncate(st.Run, 16), truncate(st.Host, 64))
		go p.client.Disconnect(250) // not from paho's handler
		return
	}
	if !newer && p.warned.CompareAndSwap(false, true) {
		p.cfg.Log.Warn().Str("other_run", truncate(st.Run, 16)).Str("other_host", truncate(st.Host, 64)).
			Msgf("another breathd (run %s on host %s) started publishing device %s on this broker; it should stop, this one goes on",
				truncate(st.Run, 16), truncate(st.Host, 64), p.cfg.Device)
	}
}

// lockDevice takes a lock for publishing the device to this broker from
// this machine, so that two breathd processes here cannot share one
// client id and session; it says who holds it.
func lockDevice(cfg Config) (*os.File, error) {
	name := "breathd-" + sanitize(cfg.Broker+"-"+cfg.Root+"-"+cfg.Device) + ".lock"
	path := filepath.Join(os.TempDir(), name)
	f, err := os.OpenFile(path, os.O_RDWR|os.O_CREATE, 0o600)
	if err != nil {
		return nil, nil // no lock here: the broker-side check remains
	}
	if err := unix.Flock(int(f.Fd()), unix.LOCK_EX|unix.LOCK_NB); err != nil {
		b := make([]byte, 32)
		n, _ := f.ReadAt(b, 0)
		f.Close()
		return nil, fmt.Errorf("device %s is already published to %s by another breathd on this machine (pid %s): give each device its own id",
			cfg.Device, Redact(cfg.Broker), strings.TrimSpace(string(b[:n])))
	}
	f.Truncate(0)
	f.WriteAt([]byte(strconv.Itoa(os.Getpid())+"\n"), 0)
	return f, nil
}

func unlock(f *os.File) {
	if f != nil {
		os.Remove(f.Name())
		f.Close() // closing releases the lock
	}
}
