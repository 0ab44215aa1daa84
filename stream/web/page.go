package web

import (
	"embed"
	"encoding/json"
	"errors"
	"fmt"
	"io/fs"
	"net/http"
	"time"

	"breathd/alerts"
	"breathd/stream"
	"breathd/stream/payload"
)

// The page: plain HTML, CSS and JavaScript of our own, and uPlot (MIT,
// from npm, its file committed) for the charts; nothing is fetched from
// elsewhere, for a board without internet.
//
//go:embed page
var pageFiles embed.FS

// jnum is a number in the page's JSON: null when not finite, 4 decimals.
type jnum = payload.Num

func row(r []float64) []jnum {
	out := make([]jnum, len(r))
	for i, v := range r {
		out[i] = jnum(v)
	}
	return out
}

// pageRoutes adds the page, its files, its live stream and the
// acknowledgement to mux.
func (s *Server) pageRoutes(mux *http.ServeMux) {
	static, _ := fs.Sub(pageFiles, "page")
	mux.Handle("GET /static/", http.StripPrefix("/static/", http.FileServerFS(static)))
	mux.HandleFunc("GET /{$}", func(w http.ResponseWriter, r *http.Request) {
		w.Header().Set("Content-Type", "text/html; charset=utf-8")
		w.Header().Set("Content-Security-Policy", "default-src 'self'; style-src 'self'; script-src 'self'; img-src 'self' data:")
		b, _ := pageFiles.ReadFile("page/index.html")
		w.Write(b)
	})
	mux.HandleFunc("GET /live", s.live)
	mux.HandleFunc("POST /ack", s.ack)
}

// canAck reports whether the request's user may acknowledge: a user of the
// password file with the ack grant. Without a password file nobody may.
func (s *Server) canAck(r *http.Request) bool {
	name, _, ok := r.BasicAuth()
	return ok && s.users != nil && s.users.CanAck(name) // basicAuth has checked the password
}

// ack acknowledges a raised rule: {"device": …, "id": <event id>}.
func (s *Server) ack(w http.ResponseWriter, r *http.Request) {
	if !s.canAck(r) {
		http.Error(w, "acknowledging needs a user with the ack grant (http.password_file: ack user:password)", http.StatusForbidden)
		return
	}
	var req struct{ Device, ID string }
	if err := json.NewDecoder(http.MaxBytesReader(w, r.Body, 1024)).Decode(&req); err != nil {
		http.Error(w, "want {\"device\": …, \"id\": …}", http.StatusBadRequest)
		return
	}
	for _, d := range s.snapshot() {
		if d.ID == req.Device && d.Ack != nil {
			err := d.Ack(req.ID)
			switch {
			case err == nil:
				name, _, _ := r.BasicAuth()
				s.log.Info().Str("device", d.ID).Str("event_id", req.ID).Str("user", name).Msg("acknowledged from the page")
				w.WriteHeader(http.StatusNoContent)
			case errors.Is(err, alerts.ErrAcknowledged):
				w.WriteHeader(http.StatusNoContent)
			default:
				http.Error(w, err.Error(), http.StatusConflict)
			}
			return
		}
	}
	http.Error(w, "no such device", http.StatusNotFound)
}

// cursor is what one page has been sent of a device.
type cursor struct {
	wave, breaths, events, active int64
	rise, asynchrony              string
}

// live streams the devices to one page as Server-Sent Events: at once the
// last 20 s of waveform, 24 h of breaths and the rule transitions kept,
// then what is new every 250 ms, and the status every second.
func (s *Server) live(w http.ResponseWriter, r *http.Request) {
	rc := http.NewResponseController(w)
	rc.SetWriteDeadline(time.Time{}) // a stream, not a response
	w.Header().Set("Content-Type", "text/event-stream")
	w.Header().Set("Cache-Control", "no-store")
	send := func(kind string, v any) error {
		b, _ := json.Marshal(v)
		if _, err := fmt.Fprintf(w, "event: %s\ndata: %s\n\n", kind, b); err != nil {
			return err
		}
		return rc.Flush()
	}
	devs := s.snapshot()
	ids := make([]string, len(devs))
	for i, d := range devs {
		ids[i] = d.ID
	}
	if send("hello", map[string]any{"advisory": stream.Advisory, "devices": ids, "can_ack": s.canAck(r)}) != nil {
		return
	}
	curs := make([]cursor, len(devs))
	for i, d := range devs {
		if d.Live == nil {
			continue
		}
		d.Live.mu.Lock()
		curs[i] = cursor{wave: max(0, d.Live.waveN-20*waveHz), breaths: max(0, d.Live.breathsN-breathsKeep),
			events: max(0, d.Live.eventsN-eventsKeep), active: -1}
		d.Live.mu.Unlock()
	}
	tick := time.NewTicker(250 * time.Millisecond)
	defer tick.Stop()
	for n := 0; ; n++ {
		for i, d := range devs {
			if err := s.sendNew(send, d, &curs[i]); err != nil {
				return
			}
			if n%4 == 0 && send("status", statusOf(d)) != nil {
				return
			}
		}
		select {
		case <-r.Context().Done():
			return
		case <-s.done:
			return
		case <-tick.C:
		}
	}
}

// sendNew sends what is new of a device since c, and moves c.
func (s *Server) sendNew(send func(string, any) error, d *Device, c *cursor) error {
	l := d.Live
	if l == nil {
		return nil
	}
	l.mu.Lock()
	var last []byte // the latest breath's payload, when a breath came since
	if c.breaths < l.breathsN {
		last = l.lastBreath
	}
	var wave, breaths [][]jnum
	for k := max(c.wave, l.waveN-waveKeep); k < l.waveN; k++ {
		wave = append(wave, row(l.wave[k%waveKeep][:]))
	}
	c.wave = l.waveN
	for k := max(c.breaths, l.breathsN-breathsKeep); k < l.breathsN; k++ {
		breaths = append(breaths, row(l.breaths[k%breathsKeep][:]))
	}
	c.breaths = l.breathsN
	var events []json.RawMessage
	for k := max(c.events, l.eventsN-eventsKeep); k < l.eventsN; k++ {
		events = append(events, eventJSON(&l.events[k%eventsKeep]))
	}
	c.events = l.eventsN
	var active []alerts.Active
	activeNew := c.active != l.activeSeq
	if activeNew {
		active = append([]alerts.Active(nil), l.active...)
		c.active = l.activeSeq
	}
	rise, asy := l.rise, l.asynchrony
	riseNew, asyNew := rise != c.rise, asy != c.asynchrony
	c.rise, c.asynchrony = rise, asy
	l.mu.Unlock()

	if len(wave) > 0 {
		if err := send("wave", map[string]any{"device": d.ID, "points": wave}); err != nil {
			return err
		}
	}
	if len(breaths) > 0 {
		if err := send("breaths", map[string]any{"device": d.ID, "fields": trendFields, "rows": breaths}); err != nil {
			return err
		}
	}
	if last != nil {
		if err := send("breath", map[string]any{"device": d.ID, "breath": json.RawMessage(last)}); err != nil {
			return err
		}
	}
	if riseNew {
		if err := send("rise", map[string]any{"device": d.ID, "text": rise}); err != nil {
			return err
		}
	}
	if asyNew {
		if err := send("asynchrony", map[string]any{"device": d.ID, "text": asy}); err != nil {
			return err
		}
	}
	if len(events) > 0 {
		if err := send("events", map[string]any{"device": d.ID, "events": events}); err != nil {
			return err
		}
	}
	if activeNew {
		list := make([]map[string]any, 0, len(active))
		for _, a := range active {
			list = append(list, map[string]any{"rule": a.Rule, "level": a.Level, "field": a.Field, "event_id": a.EventID,
				"since_t": jnum(a.Since), "since_at": stampOrNil(a.SinceAt), "value": jnum(a.Value), "acknowledged": a.Acked, "latching": a.Latching})
		}
		if err := send("active", map[string]any{"device": d.ID, "active": list}); err != nil {
			return err
		}
	}
	return nil
}

func stampOrNil(t time.Time) any {
	if t.IsZero() {
		return nil
	}
	return t.UTC().Format(time.RFC3339Nano)
}

func eventJSON(ev *alerts.Event) json.RawMessage {
	b, _ := json.Marshal(map[string]any{"rule": ev.Rule, "transition": ev.Transition, "level": ev.Level, "field": ev.Field,
		"value": jnum(ev.Value), "threshold": jnum(ev.Threshold), "low": jnum(ev.Low), "high": jnum(ev.High),
		"t": jnum(ev.T), "at": stampOrNil(ev.At), "id": ev.ID})
	return b
}

// statusOf is the page's status of a device.
func statusOf(d *Device) map[string]any {
	st := d.Status()
	age := any(nil)
	if d.Live != nil {
		d.Live.mu.Lock()
		if !d.Live.lastSampleAt.IsZero() {
			age = jnum(time.Since(d.Live.lastSampleAt).Seconds())
		}
		d.Live.mu.Unlock()
	}
	out := map[string]any{"device": d.ID, "reading": reading(st), "samples": st.Counts.Samples, "bad_lines": st.Counts.BadTotal(),
		"gaps": st.Counts.Gaps, "breaths": st.Breaths, "rate_hz": jnum(st.Counts.RateHz()), "last_sample_age": age, "format_hint": st.Hint}
	if d.Publisher != nil {
		_, ok := d.Publisher()
		out["publisher_connected"] = ok
	}
	return out
}
