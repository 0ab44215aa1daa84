package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"os"
	"strings"
	"sync"
	"time"

	"breathd/alerts"
	"breathd/cmd/breathd/internal/config"
	"breathd/device"
	"breathd/mechanics"
	"breathd/stream"
	"breathd/stream/edfrec"
	"breathd/stream/lines"
	"breathd/stream/payload"
	"breathd/stream/publish"
	"breathd/stream/web"

	"github.com/mattn/go-isatty"
	"github.com/rs/zerolog"
)

// deviceRun is one device ready to start.
type deviceRun struct {
	id        string
	src       io.ReadCloser
	format    lines.Format
	mechanics mechanics.Config
	rules     []alerts.Rule
	live      bool
	recording string // the file replayed: a run of it that decodes nothing is an error
	recordEDF bool   // an EDF+ copy beside the raw recording
}

func cmdReplay(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("replay", "replay [flags] FILE|-", stderr)
	var ff formatFlags
	ff.register(fs)
	speed := fs.String("speed", "1", "1 for real time, N for N times faster, max for as fast as possible")
	id := fs.String("id", "", "device id (default: the file's base name)")
	record := fs.String("record", "", "also record the stream raw into this directory")
	recordEDF := fs.Bool("record-edf", false, "with --record: also write the decoded samples as EDF+ beside each raw file")
	level := fs.String("log-level", "info", "log level: debug, info, warn or error")
	every := fs.Duration("report-every", 5*time.Second, "how often to print the counters")
	var pf mechanicsFlags
	pf.register(fs)
	var mf mqttFlags
	mf.register(fs)
	httpListen := fs.String("http", "", "serve /metrics and /healthz on this address, e.g. 127.0.0.1:9464 (default: off)")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if fs.NArg() != 1 {
		return usagef("replay takes one recording (a file, or - for stdin); got %d", fs.NArg())
	}
	if *recordEDF && *record == "" {
		return usagef("--record-edf needs --record DIR")
	}
	if err := config.CheckEvery(*every); err != nil {
		return usagef("--report-every %w", err)
	}
	mcfg, err := pf.config()
	if err != nil {
		return err
	}
	path := fs.Arg(0)
	lvl, err := config.ParseLevel(*level)
	if err != nil {
		return usagef("%w", err)
	}
	f, err := ff.format()
	if err != nil {
		return err
	}
	sp, err := parseSpeed(*speed)
	if err != nil {
		return err
	}
	dev := *id
	if dev == "" {
		dev = idFromPath(path)
	}
	if err := publish.CheckDevice(dev); err != nil {
		return usagef("--id: %w", err)
	}
	log := newLogger(stderr, lvl)
	var src io.ReadCloser
	if path == "-" {
		var err error
		if src, err = device.Stdin(); err != nil {
			return err
		}
	} else {
		file, err := device.OpenFile(path, sp)
		if err != nil {
			return err
		}
		src = file
	}
	if *record != "" {
		rec, err := device.NewRecorder(src, device.RecordConfig{Dir: *record, Name: dev, Header: f.Directive}, log)
		if err != nil {
			src.Close()
			return err
		}
		src = rec
	}
	var mc config.MQTT
	var ec config.Embedded
	var stateDir string
	mf.apply(&mc, &ec, &stateDir)
	sess, err := startMQTT(mc, ec, stateDir, log)
	if err != nil {
		src.Close()
		return err
	}
	ws, err := startHTTP(config.HTTP{Listen: *httpListen}, log)
	if err != nil {
		sess.close()
		src.Close()
		return err
	}
	return runDevices(ctx, []deviceRun{{id: dev, src: src, format: f, mechanics: mcfg, rules: alerts.Defaults(),
		live: sp > 0 || path == "-", recording: path, recordEDF: *recordEDF}}, setup{every: *every, stdout: stdout, log: log, sess: sess, web: ws, rows: true})
}

func cmdRun(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("run", "run --config FILE [flags]", stderr)
	path := fs.String("config", "", "configuration file (YAML; see configs/breathd.example.yaml)")
	level := fs.String("log-level", "", "log level, overriding the file's log_level")
	every := fs.Duration("report-every", 0, "how often to print the counters, overriding report_every (default 5s)")
	var mf mqttFlags
	mf.register(fs)
	httpListen := fs.String("http", "", "serve /metrics and /healthz on this address, overriding http.listen")
	breathRows := fs.Bool("breath-rows", false, "print a row per breath even when stdout is not a terminal (a service's journal gets only events and counters)")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if *path == "" {
		return usagef("run needs --config FILE (configs/breathd.example.yaml is a start)")
	}
	if fs.NArg() > 0 {
		return usagef("run takes no arguments besides flags; got %q", fs.Args())
	}
	if err := config.CheckEvery(*every); err != nil {
		return usagef("--report-every %w", err)
	}
	cfg, err := config.Load(*path)
	if err != nil {
		return err
	}
	if *level != "" {
		cfg.LogLevel = *level
	}
	lvl, err := config.ParseLevel(cfg.LogLevel)
	if err != nil {
		return usagef("%w", err)
	}
	if *every > 0 {
		cfg.ReportEvery = *every
	}
	if cfg.ReportEvery == 0 {
		cfg.ReportEvery = 5 * time.Second
	}
	log := newLogger(stderr, lvl)
	var runs []deviceRun
	closeAll := func() {
		for _, r := range runs {
			r.src.Close()
		}
	}
	for i := range cfg.Devices {
		d := &cfg.Devices[i]
		dlog := log.With().Str("device", d.ID).Logger()
		src, err := openSource(d, dlog)
		if err != nil {
			closeAll()
			return fmt.Errorf("device %s: %w", d.ID, err)
		}
		dlog.Info().Str("source", describeSource(d)).Msg("device opened")
		runs = append(runs, deviceRun{id: d.ID, src: src, format: d.Format.Lines(),
			mechanics: d.Mechanics(), rules: d.MergedRules(),
			live: d.File == nil || d.File.Speed > 0, recordEDF: d.Record != nil && d.Record.EDF})
	}
	mf.apply(&cfg.MQTT, &cfg.Embedded, &cfg.StateDir)
	sess, err := startMQTT(cfg.MQTT, cfg.Embedded, cfg.StateDir, log)
	if err != nil {
		closeAll()
		return err
	}
	if *httpListen != "" {
		cfg.HTTP.Listen = *httpListen
	}
	ws, err := startHTTP(cfg.HTTP, log)
	if err != nil {
		sess.close()
		closeAll()
		return err
	}
	stopNotify := notifySystemd(log)
	defer stopNotify()
	rows := *breathRows
	if f, ok := stdout.(*os.File); ok && isatty.IsTerminal(f.Fd()) {
		rows = true
	}
	return runDevices(ctx, runs, setup{every: cfg.ReportEvery, stdout: stdout, log: log, sess: sess, web: ws, rows: rows})
}

// openSource opens a device's byte source, wrapped in a recorder when the
// device records.
func openSource(d *config.Device, log zerolog.Logger) (io.ReadCloser, error) {
	var src io.ReadCloser
	switch {
	case d.Serial != nil:
		s, err := device.OpenSerial(*d.Serial, log)
		if err != nil {
			return nil, err
		}
		src = s
	case d.File != nil:
		f, err := device.OpenFile(d.File.Path, d.File.Speed)
		if err != nil {
			return nil, err
		}
		src = f
	case d.Sim != nil:
		speed := d.Sim.Speed
		if speed == 0 {
			speed = 1
		}
		src = device.NewSim(d.Sim.Loaded(), device.SimFormat{Delimiter: ',', Header: true}, speed, nil)
	default:
		var err error
		if src, err = device.Stdin(); err != nil {
			return nil, err
		}
	}
	if d.Record == nil {
		return src, nil
	}
	f := d.Format.Lines()
	rec, err := device.NewRecorder(src, device.RecordConfig{Dir: d.Record.Dir, Name: d.ID,
		MaxBytes: d.Record.MaxMiB << 20, ClockEvery: d.Record.ClockEvery, Header: f.Directive}, log)
	if err != nil {
		src.Close()
		return nil, err
	}
	return rec, nil
}

// runDevices runs every device in its own goroutine until all end or ctx
// is done, printing their breaths, events and counters, and publishing
// them when sess is set. A device that fails is logged and does not stop
// the others.
// setup is how runDevices runs its devices: the counters' period, where
// rows and counters go, the log, the MQTT session and HTTP listener (nil
// when off), and whether each breath gets a row.
type setup struct {
	every  time.Duration
	stdout io.Writer
	log    zerolog.Logger
	sess   *mqttSession
	web    *web.Server
	rows   bool
}

func runDevices(ctx context.Context, runs []deviceRun, o setup) error {
	every, stdout, log, sess, ws := o.every, o.stdout, o.log, o.sess, o.web
	defer sess.close()
	if ws != nil {
		defer ws.Close()
	}
	log.Info().Str("version", versionString()).Int("devices", len(runs)).Msg("breathd started (advisory research software, not a medical device)")
	con := newConsole(stdout)
	con.quiet = !o.rows
	run := publish.NewRun() // one id for this run of breathd, in event ids, records and the status
	report := func(st stream.Status) {
		con.mu.Lock()
		defer con.mu.Unlock()
		fmt.Fprintln(stdout, st.String())
	}
	errs := make([]error, len(runs))
	var wg sync.WaitGroup
	for i, r := range runs {
		wg.Go(func() {
			dlog := log.With().Str("device", r.id).Logger()
			ctl := &stream.Control{}
			sinks := stream.Sinks{con}
			var pub *publish.Publisher
			if sess != nil {
				var err error
				if pub, err = sess.publisher(r.id, run, r.rules, ctl); err != nil {
					r.src.Close()
					errs[i] = fmt.Errorf("device %s: %w", r.id, err)
					return
				}
				sinks = append(sinks, pub)
			}
			var samples *edfrec.Recording // the EDF+ copy beside the raw recording
			var sampleSinks stream.SampleSinks
			if rf, ok := r.src.(edfrec.RawFile); ok && r.recordEDF {
				samples = edfrec.New(rf, dlog)
				sinks, sampleSinks = append(sinks, samples), append(sampleSinks, samples)
			}
			if pub != nil && sess.cfg.Wave {
				sampleSinks = append(sampleSinks, pub.WaveSink())
			}
			if ws != nil {
				wd := &web.Device{ID: r.id, Status: ctl.Status, Events: &web.EventCounts{}, Live: web.NewLive(), Ack: ctl.Ack}
				sinks, sampleSinks = append(sinks, wd.Live), append(sampleSinks, wd.Live)
				if pub != nil {
					wd.Publisher = func() (payload.Counters, bool) { return pub.Counters(), pub.Connected() }
				}
				sinks = append(sinks, wd.Events)
				ws.Add(wd)
			}
			st, err := stream.Run(ctx, r.src, stream.Config{Device: r.id, Format: r.format, Mechanics: r.mechanics,
				Rules: r.rules, Live: r.live, Every: every, Report: report, Log: dlog, Sink: sinks, Control: ctl, Run: run, Samples: samplesOf(sampleSinks)})
			if samples != nil {
				samples.Close()
			}
			if err == nil && r.recording != "" && ctx.Err() == nil {
				err = nothingDecoded(r.recording, st)
			}
			if pub != nil {
				closePublisher(pub, dlog)
			}
			if err != nil {
				dlog.Error().Err(err).Msg("device stopped")
				errs[i] = err
			}
			c := st.Counts
			dlog.Info().Int64("samples", c.Samples).Int64("breaths", st.Breaths).Int64("events", st.Events).
				Int64("bad_lines", c.BadTotal()).Int64("gaps", c.Gaps).Msg("final counters")
		})
	}
	wg.Wait()
	log.Info().Msg("breathd stopped")
	return errors.Join(errs...)
}

func cmdCheck(args []string, stdout, stderr io.Writer) error {
	fs := newFlags("check", "check FILE", stderr)
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if fs.NArg() != 1 {
		return usagef("check takes one configuration file; got %d", fs.NArg())
	}
	cfg, err := config.Load(fs.Arg(0))
	if err != nil {
		return err
	}
	fmt.Fprintf(stdout, "%s is valid: %d device(s)\n", cfg.Path(), len(cfg.Devices))
	for _, d := range cfg.Devices {
		format := strings.TrimSpace(strings.TrimPrefix(d.Format.Lines().Directive(), "breathd format"))
		if format == "" {
			format = "detected from the stream"
		}
		fmt.Fprintf(stdout, "  %-16s %s; format %s", d.ID, describeSource(&d), format)
		if m := d.Mechanics(); m.CircuitCompliance > 0 {
			fmt.Fprintf(stdout, "; circuit %g mL/cmH2O", m.CircuitCompliance)
		}
		if m := d.Mechanics(); m.FlowDelayFixed {
			fmt.Fprintf(stdout, "; flow delay %g ms as configured", m.FlowDelay*1000)
		}
		if d.Record != nil {
			fmt.Fprintf(stdout, "; recording to %s", d.Record.Dir)
		}
		fmt.Fprintln(stdout)
	}
	return nil
}

func describeSource(d *config.Device) string {
	switch {
	case d.Serial != nil:
		s := d.Serial
		baud := s.Baud
		if baud == 0 {
			baud = 115200
		}
		if s.SerialNumber != "" {
			return fmt.Sprintf("USB serial port with serial number %s at %d baud", s.SerialNumber, baud)
		}
		return fmt.Sprintf("serial %s at %d baud", s.Path, baud)
	case d.File != nil:
		if d.File.Speed == 0 {
			return fmt.Sprintf("file %s as fast as possible", d.File.Path)
		}
		return fmt.Sprintf("file %s at %g× speed", d.File.Path, d.File.Speed)
	case d.Sim != nil:
		return fmt.Sprintf("simulated patient %q from %s", d.Sim.Loaded().Name, d.Sim.Scenario)
	}
	return "standard input"
}

func cmdPorts(args []string, stdout, stderr io.Writer) error {
	fs := newFlags("ports", "ports", stderr)
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	ports, err := device.Ports()
	if err != nil {
		return err
	}
	if len(ports) == 0 {
		fmt.Fprintln(stdout, "no serial ports found (a USB adapter appears as /dev/ttyUSB* or /dev/ttyACM*)")
		return nil
	}
	for _, p := range ports {
		if p.USB {
			fmt.Fprintf(stdout, "%-20s USB %s:%s serial %q %s\n", p.Path, p.VID, p.PID, p.SerialNumber, p.Product)
		} else {
			fmt.Fprintf(stdout, "%-20s\n", p.Path)
		}
	}
	return nil
}

// startHTTP starts the operations listener when one is configured.
func startHTTP(c config.HTTP, log zerolog.Logger) (*web.Server, error) {
	if c.Listen == "" {
		return nil, nil
	}
	return web.Start(web.Config{Listen: c.Listen, PasswordFile: c.PasswordFile, CertFile: c.CertFile, KeyFile: c.KeyFile}, log)
}

// samplesOf is the loop's sample sink: nil when there is none, so that the
// loop's per-sample call is skipped.
func samplesOf(s stream.SampleSinks) stream.SampleSink {
	switch len(s) {
	case 0:
		return nil
	case 1:
		return s[0]
	}
	return s
}
