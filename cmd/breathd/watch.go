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
		screen := renderWatch(v.devices)
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
		return fmt.Sprintf("%s breath %v  rr %s  vti %s  ppeak %s  pplat %s  peep %s  dp %s  cstat %s  fit_r %s  fit_c %s  %v",
			dev, p["seq"], f(p["rr"], 1), f(p["vti"], 0), f(p["ppeak"], 1), f(p["pplat"], 1), f(p["peep"], 1),
			f(p["dp"], 1), f(p["cstat"], 1), f(p["fit_r"], 1), f(p["fit_c"], 1), p["flags"])
	case "event":
		return fmt.Sprintf("%s event %v %v [%v] %v %s  id %v", dev, p["transition"], p["rule"], p["level"], p["field"], f(p["value"], 2), p["id"])
	case "status":
		return fmt.Sprintf("%s status %v", dev, p["state"])
	}
	return ""
}

// renderWatch draws the live view: one block per device.
func renderWatch(devices map[string]*deviceView) string {
	var b strings.Builder
	fmt.Fprintf(&b, "breathd watch — %s — advisory only, not a medical device\n\n", time.Now().Format("15:04:05"))
	if len(devices) == 0 {
		b.WriteString("waiting for devices…\n")
	}
	names := make([]string, 0, len(devices))
	for n := range devices {
		names = append(names, n)
	}
	slices.Sort(names)
	for _, n := range names {
		d := devices[n]
		state := "?"
		if d.status != nil {
			state = fmt.Sprint(d.status["state"])
		}
		fmt.Fprintf(&b, "%-16s %s, last message %s ago\n", n, state, time.Since(d.seen).Round(time.Second))
		if p := d.breath; p != nil {
			fmt.Fprintf(&b, "  breath %v   rr %s  vti %s mL  ppeak %s  pplat %s  peep %s  dp %s cmH2O  cstat %s  fit_c %s mL/cmH2O  fit_r %s  mp %s J/min\n",
				p["seq"], f(p["rr"], 1), f(p["vti"], 0), f(p["ppeak"], 1), f(p["pplat"], 1), f(p["peep"], 1), f(p["dp"], 1),
				f(p["cstat"], 1), f(p["fit_c"], 1), f(p["fit_r"], 1), f(p["mp"], 1))
		}
		if p := d.trend; p != nil {
			fields, _ := p["fields"].(map[string]any)
			med := func(name string) string {
				s, _ := fields[name].(map[string]any)
				return f(s["median"], 1)
			}
			rise, _ := p["rise"].(map[string]any)
			fmt.Fprintf(&b, "  window %v breaths: dp %s  cstat %s  fit_r %s  ppeak %s   compliance %s/h   peak rise: %v\n",
				p["breaths"], med("dp"), med("cstat"), med("fit_r"), med("ppeak"), f(p["compliance_slope"], 1), rise["cause"])
		}
		if len(d.active) == 0 {
			b.WriteString("  rules raised: none\n")
		}
		for _, a := range d.active {
			m, _ := a.(map[string]any)
			fmt.Fprintf(&b, "  RAISED %v [%v] %v = %s\n", m["rule"], m["level"], m["field"], f(m["value"], 2))
		}
		b.WriteString("\n")
	}
	return b.String()
}
