package main

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"math"
	"os"
	"slices"
	"strings"
	"sync"
	"time"
	"unicode"
	"unicode/utf8"

	"breathd/cmd/breathd/internal/config"
	"breathd/stream/broker"
	"breathd/stream/publish"

	paho "github.com/eclipse/paho.mqtt.golang"
	"github.com/mattn/go-isatty"
	"golang.org/x/sys/unix"
)

// deviceView is what watch knows of one device.
type deviceView struct {
	breath map[string]any
	trend  map[string]any
	active []any
	status map[string]any
	seen   time.Time
}

func cmdWatch(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("watch", "watch [flags]", stderr)
	url := fs.String("broker", "mqtt://"+broker.DefaultListen, "MQTT broker to watch, mqtt://host:port or mqtts://host:port")
	root := fs.String("root", "breathd", "topic root")
	only := fs.String("device", "", "show only this device")
	var cf clientFlags
	cf.register(fs)
	plain := fs.Bool("plain", false, "print plain lines even on a terminal")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	var mc config.MQTT
	cf.apply(&mc)
	pw, err := mc.Password()
	if err != nil {
		return err
	}
	dial := mc.Dial(*url, pw)
	opts, err := dial.Options()
	if err != nil {
		return err
	}
	opts.SetClientID(fmt.Sprintf("breathd-watch-%d", os.Getpid())).SetCleanSession(true).SetOrderMatters(false).
		SetAutoReconnect(true).SetMaxReconnectInterval(5 * time.Second)
	v := &watcher{root: *root, only: *only, out: stdout, devices: map[string]*deviceView{}, tty: !*plain}
	if f, ok := stdout.(*os.File); !ok || !isatty.IsTerminal(f.Fd()) {
		v.tty = false
	}
	opts.SetOnConnectHandler(func(c paho.Client) { c.Subscribe(*root+"/+/+", 0, v.handle) })
	client := paho.NewClient(opts)
	if tok := client.Connect(); !tok.WaitTimeout(6*time.Second) || tok.Error() != nil {
		if dial.Refused(tok.Error()) {
			return dial.CredentialsRefused()
		}
		return fmt.Errorf("cannot reach the broker at %s (%s): is breathd running (it starts one on %s), or give --broker",
			publish.Redact(*url), publish.ErrText(tok.Error()), broker.DefaultListen)
	}
	defer client.Disconnect(100)
	if !v.tty {
		<-ctx.Done()
		return nil
	}
	return v.redraw(ctx)
}

// watcher keeps the latest of each device's topics.
type watcher struct {
	root, only string
	out        io.Writer
	tty        bool // redraw the screen; else print a line per message

	mu      sync.Mutex
	devices map[string]*deviceView
}

// handle takes one message of <root>/<device>/<kind>.
func (v *watcher) handle(_ paho.Client, m paho.Message) {
	parts := strings.Split(strings.TrimPrefix(m.Topic(), v.root+"/"), "/")
	if len(parts) != 2 || (v.only != "" && parts[0] != v.only) {
		return
	}
	var p map[string]any
	if json.Unmarshal(m.Payload(), &p) != nil {
		return
	}
	// what arrives is untrusted: no control character reaches the terminal
	p = clean(p).(map[string]any)
	parts[0] = cleanText(parts[0])
	v.mu.Lock()
	defer v.mu.Unlock()
	d := v.devices[parts[0]]
	if d == nil {
		d = &deviceView{}
		v.devices[parts[0]] = d
	}
	d.seen = time.Now()
	switch parts[1] {
	case "breath":
		d.breath = p
	case "trend":
		d.trend = p
	case "active":
		d.active, _ = p["active"].([]any)
	case "status":
		d.status = p
	}
	if !v.tty {
		if line := watchLine(parts[0], parts[1], p); line != "" {
			fmt.Fprintln(v.out, line)
		}
	}
}

// redraw draws the screen every second until ctx ends.
func (v *watcher) redraw(ctx context.Context) error {
	tick := time.NewTicker(time.Second)
	defer tick.Stop()
	for {
		v.mu.Lock()
		w, h := terminalSize(v.out)
		screen := renderWatch(v.devices, w, h)
		v.mu.Unlock()
		fmt.Fprint(v.out, "\x1b[H\x1b[2J"+screen)
		select {
		case <-ctx.Done():
			return nil
		case <-tick.C:
		}
	}
}

// clean returns v with every string cleaned by cleanText, keys too.
func clean(v any) any {
	switch x := v.(type) {
	case string:
		return cleanText(x)
	case []any:
		for i := range x {
			x[i] = clean(x[i])
		}
		return x
	case map[string]any:
		out := make(map[string]any, len(x))
		for k, e := range x {
			out[cleanText(k)] = clean(e)
		}
		return out
	}
	return v
}

// cleanText replaces control characters (escape sequences, newlines,
// C1 controls) and bidirectional overrides with "?", and invalid UTF-8
// with U+FFFD, and cuts the text at 200 characters.
func cleanText(s string) string {
	s = strings.ToValidUTF8(s, "\uFFFD")
	if utf8.RuneCountInString(s) > 200 {
		s = string([]rune(s)[:200]) + "…"
	}
	return strings.Map(func(r rune) rune {
		if unicode.IsControl(r) || unicode.Is(unicode.Bidi_Control, r) {
			return '?'
		}
		return r
	}, s)
}

// f formats a JSON number, "-" for null.
func f(v any, dec int) string {
	x, ok := v.(float64)
	if !ok || math.IsNaN(x) {
		return "-"
	}
	return fmt.Sprintf("%.*f", dec, x)
}

// watchLine is the plain line for one message.
func watchLine(dev, kind string, p map[string]any) string {
	switch kind {
	case "breath":
		return fmt.Sprintf("%s breath %v  rr %s  vti %s  ppeak %s  pplat %s  peep %s  dp %s  cstat %s  %v",
			dev, p["seq"], f(p["rr"], 1), f(p["vti"], 0), f(p["ppeak"], 1), f(p["pplat"], 1), f(p["peep"], 1),
			f(p["dp"], 1), f(p["cstat"], 1), p["flags"])
	case "event":
		return fmt.Sprintf("%s %v %v (%v): %v %s  id %v", dev, p["transition"], p["rule"], p["level"], p["field"], f(p["value"], 2), p["id"])
	case "status":
		return fmt.Sprintf("%s status %v", dev, p["state"])
	}
	return ""
}

// ieText writes the I:E ratio as the trade does: 1:2.0 for ie = te/ti = 2,
// 2.0:1 for an inverse ratio.
func ieText(v any) string {
	x, ok := v.(float64)
	switch {
	case !ok || math.IsNaN(x) || x <= 0:
		return "-"
	case x >= 1:
		return fmt.Sprintf("1:%.1f", x)
	}
	return fmt.Sprintf("%.1f:1", 1/x)
}

// renderWatch draws the live view in a width × height terminal: a block
// of at most five lines per device, every line cut to the width, and as
// many devices as fit, the rest counted on the last line.
func renderWatch(devices map[string]*deviceView, width, height int) string {
	width, height = max(width, 40), max(height, 8)
	lines := []string{
		"breathd watch " + time.Now().Format("15:04:05") + " · advisory only, not a medical device",
		"rr /min · VT mL · pressures cmH2O · C mL/cmH2O · R cmH2O·s/L · MP J/min",
	}
	if len(devices) == 0 {
		lines = append(lines, "", "waiting for devices…")
	}
	names := make([]string, 0, len(devices))
	for n := range devices {
		names = append(names, n)
	}
	slices.Sort(names)
	for k, n := range names {
		block := watchBlock(n, devices[n])
		if k == 0 {
			lines = append(lines, "")
		}
		if left := len(names) - k - 1; len(lines)+len(block) > height-min(left, 1) {
			lines = append(lines, fmt.Sprintf("… %d more device(s): a taller terminal, or --device NAME", len(names)-k))
			break
		}
		lines = append(lines, block...)
	}
	var b strings.Builder
	for _, l := range lines {
		b.WriteString(cut(l, width))
		b.WriteByte('\n')
	}
	return b.String()
}

// watchBlock is one device's lines: its state and counters, the last
// breath, the window, and the rules raised.
func watchBlock(name string, d *deviceView) []string {
	state, counts := "?", ""
	if st := d.status; st != nil {
		state = fmt.Sprint(st["state"])
		if c, ok := st["counters"].(map[string]any); ok {
			bad := 0.0
			if m, ok := c["bad_lines"].(map[string]any); ok {
				for _, v := range m {
					x, _ := v.(float64)
					bad += x
				}
			}
			rate := f(c["rate_hz"], 0)
			if rate == "0" {
				rate = "-" // not measured yet
			}
			counts = fmt.Sprintf(" · %s Hz · samples %s · bad %.0f · gaps %s", rate, f(c["samples"], 0), bad, f(c["gaps"], 0))
		}
		if h, _ := st["format_hint"].(string); h != "" {
			counts += " · check: " + h
		}
	}
	out := []string{fmt.Sprintf("%s  %s, heard %s ago%s", name, state, time.Since(d.seen).Round(time.Second), counts)}
	if p := d.breath; p != nil {
		out = append(out,
			fmt.Sprintf("  #%v  rr %s  VT %s  I:E %s  Ppeak %s  Pplat %s  PEEP %s  dP %s",
				p["seq"], f(p["rr"], 1), f(p["vti"], 0), ieText(p["ie"]), f(p["ppeak"], 1), f(p["pplat"], 1), f(p["peep"], 1), f(p["dp"], 1)),
			strings.TrimRight(fmt.Sprintf("  Cstat %s  fit C %s  fit R %s  MP %s  %v",
				f(p["cstat"], 1), f(p["fit_c"], 1), f(p["fit_r"], 1), f(p["mp"], 1), words(p["flags"])), " "))
	}
	if p := d.trend; p != nil {
		fields, _ := p["fields"].(map[string]any)
		med := func(name string) string {
			s, _ := fields[name].(map[string]any)
			return f(s["median"], 1)
		}
		slope := func(name string) string {
			if s := f(p[name], 1); s != "-" && !strings.HasPrefix(s, "-") {
				return "+" + s
			}
			return f(p[name], 1)
		}
		rise, _ := p["rise"].(map[string]any)
		out = append(out, fmt.Sprintf("  median of %v: dP %s  Cstat %s  fit R %s · per h: C %s dP %s · rise %v",
			p["breaths"], med("dp"), med("cstat"), med("fit_r"), slope("compliance_slope"), slope("dp_slope"), rise["cause"]))
	}
	var raised []string
	for _, a := range d.active {
		m, _ := a.(map[string]any)
		r := fmt.Sprintf("%v (%v, %v %s)", m["rule"], m["level"], m["field"], f(m["value"], 1))
		if m["acknowledged"] == true {
			r += " acknowledged"
		}
		raised = append(raised, r)
	}
	if len(raised) == 0 {
		out = append(out, "  raised: none")
	} else {
		out = append(out, fmt.Sprintf("  raised %d: %s", len(raised), strings.Join(raised, "; ")))
	}
	return out
}

// cut shortens s to width columns (runes), ending it with "…".
func cut(s string, width int) string {
	if utf8.RuneCountInString(s) <= width {
		return s
	}
	return string([]rune(s)[:width-1]) + "…"
}

// terminalSize is the size of w's terminal, 80×24 when it cannot tell.
func terminalSize(w io.Writer) (int, int) {
	if f, ok := w.(*os.File); ok {
		if ws, err := unix.IoctlGetWinsize(int(f.Fd()), unix.TIOCGWINSZ); err == nil && ws.Col > 0 && ws.Row > 0 {
			return int(ws.Col), int(ws.Row)
		}
	}
	return 80, 24
}

// words joins a JSON list (or a string) of words with spaces.
func words(v any) string {
	switch x := v.(type) {
	case string:
		return x
	case []any:
		out := make([]string, 0, len(x))
		for _, w := range x {
			out = append(out, fmt.Sprint(w))
		}
		return strings.Join(out, " ")
	}
	return ""
}
