// Package web is breathd's HTTP listener: the bedside page (/, its live
// stream /live and /ack), /metrics in the Prometheus text exposition format
// (through the Prometheus Go client) and /healthz. It reads each device's counters when asked, from the same
// snapshot the status topic publishes; nothing is counted twice and the
// per-sample path is not touched.
//
// Like the embedded broker, it listens on loopback only unless it is given
// a password file (the broker's format: "user:password" lines) and a TLS
// certificate and key; with a password file every request needs HTTP basic
// authentication.
package web

import (
	"cmp"
	"context"
	"crypto/tls"
	"encoding/json"
	"errors"
	"fmt"
	"net"
	"net/http"
	"slices"
	"sync"
	"time"

	"breathd/alerts"
	"breathd/mechanics"
	"breathd/stream"
	"breathd/stream/broker"
	"breathd/stream/lines"
	"breathd/stream/payload"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"github.com/prometheus/client_golang/prometheus/promhttp"
	"github.com/rs/zerolog"
)

// Config is where and how the listener listens.
type Config struct {
	Listen       string // host:port
	PasswordFile string // required off loopback
	CertFile     string // TLS, required off loopback
	KeyFile      string
}

// ErrOpen is returned for a listener beyond loopback without a password
// file and TLS.
var ErrOpen = errors.New("an HTTP listener beyond loopback needs a password file and a TLS certificate and key")

// Device is what the listener reads of one device.
type Device struct {
	ID     string
	Status func() stream.Status
	// Publisher returns the publisher's counters and whether it is
	// connected; nil when the device does not publish.
	Publisher func() (payload.Counters, bool)
	Events    *EventCounts
	// Live is what the page shows of it (nil: not on the page); Ack
	// acknowledges one of its raised rules.
	Live *Live
	Ack  func(id string) error
}

// EventCounts counts a device's rule transitions by rule and transition:
// a sink of the device loop.
type EventCounts struct {
	mu sync.Mutex
	n  map[[2]string]int64
}

// Breath does nothing: only events are counted.
func (*EventCounts) Breath(string, *mechanics.Breath, *mechanics.Window) {}

// Event counts one transition.
func (e *EventCounts) Event(ev *alerts.Event, _ []alerts.Active) {
	e.mu.Lock()
	defer e.mu.Unlock()
	if e.n == nil {
		e.n = map[[2]string]int64{}
	}
	e.n[[2]string{ev.Rule, string(ev.Transition)}]++
}

func (e *EventCounts) each(f func(rule, transition string, n int64)) {
	e.mu.Lock()
	defer e.mu.Unlock()
	keys := make([][2]string, 0, len(e.n))
	for k := range e.n {
		keys = append(keys, k)
	}
	slices.SortFunc(keys, func(a, b [2]string) int { return cmp.Or(cmp.Compare(a[0], b[0]), cmp.Compare(a[1], b[1])) })
	for _, k := range keys {
		f(k[0], k[1], e.n[k])
	}
}

// Server is the running listener.
type Server struct {
	srv   *http.Server
	ln    net.Listener
	log   zerolog.Logger
	users broker.Users  // nil without a password file
	done  chan struct{} // closed by Close: the page's streams end

	mu      sync.Mutex
	devices []*Device
}

// Start listens on cfg.Listen and serves until Close.
func Start(cfg Config, log zerolog.Logger) (*Server, error) {
	secure := cfg.PasswordFile != "" && cfg.CertFile != "" && cfg.KeyFile != ""
	if !broker.IsLoopback(cfg.Listen) && !secure {
		return nil, fmt.Errorf("http listen %s: %w (or listen on 127.0.0.1)", cfg.Listen, ErrOpen)
	}
	if (cfg.CertFile == "") != (cfg.KeyFile == "") {
		return nil, errors.New("http: give both the TLS certificate and its key")
	}
	var users broker.Users
	if cfg.PasswordFile != "" {
		var err error
		if users, err = broker.ReadUsers(cfg.PasswordFile); err != nil {
			return nil, fmt.Errorf("http: %w", err)
		}
	}
	s := &Server{log: log, users: users, done: make(chan struct{})}
	reg := prometheus.NewRegistry()
	reg.MustRegister(collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}), (*collector)(s))
	mux := http.NewServeMux()
	mux.Handle("GET /metrics", promhttp.HandlerFor(reg, promhttp.HandlerOpts{ErrorLog: promLog{log}}))
	mux.HandleFunc("GET /healthz", s.healthz)
	s.pageRoutes(mux)
	var h http.Handler = mux
	if users != nil {
		h = basicAuth(users, mux)
	}
	s.srv = &http.Server{Handler: h, ReadHeaderTimeout: 5 * time.Second, ReadTimeout: 10 * time.Second,
		WriteTimeout: 30 * time.Second, IdleTimeout: time.Minute, MaxHeaderBytes: 16 << 10}
	ln, err := net.Listen("tcp", cfg.Listen)
	if err != nil {
		return nil, fmt.Errorf("http listen %s: %w", cfg.Listen, err)
	}
	if cfg.CertFile != "" {
		cert, err := tls.LoadX509KeyPair(cfg.CertFile, cfg.KeyFile)
		if err != nil {
			ln.Close()
			return nil, fmt.Errorf("http: TLS: %w", err)
		}
		ln = tls.NewListener(ln, &tls.Config{Certificates: []tls.Certificate{cert}, MinVersion: tls.VersionTLS12})
	}
	s.ln = ln
	go func() {
		if err := s.srv.Serve(ln); err != nil && !errors.Is(err, http.ErrServerClosed) {
			log.Error().Err(err).Msg("HTTP listener stopped")
		}
	}()
	log.Info().Str("listen", ln.Addr().String()).Bool("tls", cfg.CertFile != "").Msg("HTTP listener started (/metrics, /healthz)")
	return s, nil
}

// Addr is the address listened on (with the port chosen for ":0").
func (s *Server) Addr() string { return s.ln.Addr().String() }

// Add makes a device known to /metrics and /healthz.
func (s *Server) Add(d *Device) {
	s.mu.Lock()
	defer s.mu.Unlock()
	s.devices = append(s.devices, d)
}

// Close stops the listener, waiting a moment for requests in flight.
func (s *Server) Close() error {
	close(s.done)
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Second)
	defer cancel()
	return s.srv.Shutdown(ctx)
}

func (s *Server) snapshot() []*Device {
	s.mu.Lock()
	defer s.mu.Unlock()
	return slices.Clone(s.devices)
}

// reading reports whether a device's source delivers: its loop runs and
// a source that can be lost is connected.
func reading(st stream.Status) bool {
	return !st.Final && (!st.HasHealth || st.Health.Connected)
}

type deviceHealth struct {
	Device    string `json:"device"`
	Reading   bool   `json:"reading"`
	Publisher string `json:"publisher"` // connected, disconnected or none
	Samples   int64  `json:"samples"`
}

// healthz answers 200 when every device reads and every publisher is
// connected, 503 with the reasons otherwise.
func (s *Server) healthz(w http.ResponseWriter, _ *http.Request) {
	devs := s.snapshot()
	body := struct {
		Status  string         `json:"status"`
		Reasons []string       `json:"reasons,omitempty"`
		Devices []deviceHealth `json:"devices"`
	}{Status: "ok", Devices: []deviceHealth{}}
	for _, d := range devs {
		st := d.Status()
		h := deviceHealth{Device: d.ID, Reading: reading(st), Publisher: "none", Samples: st.Counts.Samples}
		if !h.Reading {
			body.Reasons = append(body.Reasons, d.ID+": source not reading")
		}
		if d.Publisher != nil {
			h.Publisher = "disconnected"
			if _, ok := d.Publisher(); ok {
				h.Publisher = "connected"
			} else {
				body.Reasons = append(body.Reasons, d.ID+": not connected to the MQTT broker")
			}
		}
		body.Devices = append(body.Devices, h)
	}
	if len(devs) == 0 {
		body.Reasons = append(body.Reasons, "no device")
	}
	code := http.StatusOK
	if len(body.Reasons) > 0 {
		body.Status, code = "unhealthy", http.StatusServiceUnavailable
	}
	w.Header().Set("Content-Type", "application/json")
	w.Header().Set("Cache-Control", "no-store")
	w.WriteHeader(code)
	json.NewEncoder(w).Encode(body)
}

func basicAuth(users broker.Users, next http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		name, pass, ok := r.BasicAuth()
		if !ok || !users.Check(name, pass) {
			w.Header().Set("WWW-Authenticate", `Basic realm="breathd"`)
			http.Error(w, "authentication required", http.StatusUnauthorized)
			return
		}
		next.ServeHTTP(w, r)
	})
}

// collector turns the devices' counters into metrics at each scrape.
type collector Server

var (
	labels      = []string{"device"}
	descSamples = prometheus.NewDesc("breathd_samples_total", "Samples decoded.", labels, nil)
	descBreaths = prometheus.NewDesc("breathd_breaths_total", "Breaths completed.", labels, nil)
	descBad     = prometheus.NewDesc("breathd_bad_lines_total", "Lines skipped, by cause.", []string{"device", "cause"}, nil)
	descEvents  = prometheus.NewDesc("breathd_events_total", "Rule transitions, by rule and transition.", []string{"device", "rule", "transition"}, nil)
	descGaps    = prometheus.NewDesc("breathd_gaps_total", "Time steps over the gap limit.", labels, nil)
	descDropped = prometheus.NewDesc("breathd_records_dropped_total", "Breath records and trends not published (broker away or queue full).", labels, nil)
	descQueue   = prometheus.NewDesc("breathd_publish_queue_depth", "Messages waiting to be published.", labels, nil)
	descUp      = prometheus.NewDesc("breathd_source_up", "1 while the device's source delivers.", labels, nil)
	descConnect = prometheus.NewDesc("breathd_publisher_connected", "1 while the device's publisher is connected to its broker.", labels, nil)
	descOutages = prometheus.NewDesc("breathd_source_outages_total", "Times the source was lost.", labels, nil)
	allDescs    = []*prometheus.Desc{descSamples, descBreaths, descBad, descEvents, descGaps, descDropped, descQueue, descUp, descConnect, descOutages}
)

func (c *collector) Describe(ch chan<- *prometheus.Desc) {
	for _, d := range allDescs {
		ch <- d
	}
}

func (c *collector) Collect(ch chan<- prometheus.Metric) {
	for _, d := range (*Server)(c).snapshot() {
		st := d.Status()
		counter := func(desc *prometheus.Desc, v int64, lv ...string) {
			ch <- prometheus.MustNewConstMetric(desc, prometheus.CounterValue, float64(v), append([]string{d.ID}, lv...)...)
		}
		gauge := func(desc *prometheus.Desc, v float64) {
			ch <- prometheus.MustNewConstMetric(desc, prometheus.GaugeValue, v, d.ID)
		}
		counter(descSamples, st.Counts.Samples)
		counter(descBreaths, st.Breaths)
		for cause := range lines.NumCauses {
			counter(descBad, st.Counts.Bad[cause], cause.String())
		}
		counter(descGaps, st.Counts.Gaps)
		counter(descOutages, st.Health.Outages)
		gauge(descUp, b2f(reading(st)))
		if d.Events != nil {
			d.Events.each(func(rule, transition string, n int64) { counter(descEvents, n, rule, transition) })
		}
		if d.Publisher != nil {
			pc, ok := d.Publisher()
			counter(descDropped, pc.Dropped)
			gauge(descQueue, float64(pc.QueueDepth))
			gauge(descConnect, b2f(ok))
		}
	}
}

func b2f(b bool) float64 {
	if b {
		return 1
	}
	return 0
}

// promLog passes the metrics handler's errors to the log.
type promLog struct{ log zerolog.Logger }

func (p promLog) Println(v ...any) { p.log.Error().Msg(fmt.Sprint(v...)) }
