// Package device provides breathd's byte sources: a serial port that is
// reopened when it disappears, a recorded file replayed on its own clock,
// standard input, and a recorder that keeps a raw copy of what came in.
//
// Every source is an io.ReadCloser: Read blocks until bytes arrive, Close
// (from any goroutine) unblocks it, and the end of a finite source is
// io.EOF. Sources that can say more implement optional interfaces:
// HealthReporter (a serial port's connection state) and Paced (a replay
// that must be slowed to its recorded rate).
package device

import (
	"context"
	"io"
	"time"
)

// Health is a source's connection state.
type Health struct {
	Connected bool      // the source is delivering
	Outages   int64     // times the source was lost
	Reopens   int64     // times it came back
	Since     time.Time // when Connected last changed
	LastError string    // the latest loss's cause, "" if none
}

// HealthReporter is implemented by sources that can be lost and found
// again. Health is safe to call from any goroutine.
type HealthReporter interface {
	Health() Health
}

// RecordStats are a recording's counts: files started and writes that
// failed.
type RecordStats struct{ Files, WriteErrors int64 }

// Recording is implemented by sources that record what they pass on.
type Recording interface{ RecordStats() RecordStats }

// wrapper is implemented by sources that wrap another (a Recorder).
type wrapper interface{ Source() io.ReadCloser }

// HealthOf returns the health of src, or of the source it wraps, and
// false when neither reports one.
func HealthOf(src io.Reader) (Health, bool) {
	for {
		if h, ok := src.(HealthReporter); ok {
			return h.Health(), true
		}
		w, ok := src.(wrapper)
		if !ok {
			return Health{}, false
		}
		src = w.Source()
	}
}

// PacerOf returns the pacer of src, or of the source it wraps, or nil.
func PacerOf(src io.Reader) *Pacer {
	for {
		if p, ok := src.(Paced); ok {
			return p.Pacer()
		}
		w, ok := src.(wrapper)
		if !ok {
			return nil
		}
		src = w.Source()
	}
}

// Paced is implemented by sources whose samples must be released at the
// stream's own pace (a replay at a finite speed).
type Paced interface {
	Pacer() *Pacer
}

// Pacer releases samples at Speed times their stream time: 1 is real time,
// N is N times faster, 0 means as fast as possible.
type Pacer struct {
	Speed float64

	started bool
	wall0   time.Time
	t0      float64
	timer   *time.Timer
}

// Wait blocks until stream time t (s) is due, or ctx ends. The first call
// anchors stream time to now. It does not allocate after the first call.
func (p *Pacer) Wait(ctx context.Context, t float64) error {
	if p == nil || p.Speed <= 0 {
		return nil
	}
	if !p.started || t < p.t0 {
		p.started, p.wall0, p.t0 = true, time.Now(), t
		return nil
	}
	due := p.wall0.Add(time.Duration((t - p.t0) / p.Speed * float64(time.Second)))
	d := time.Until(due)
	if d < time.Millisecond {
		return nil
	}
	if p.timer == nil {
		p.timer = time.NewTimer(d)
	} else {
		p.timer.Reset(d)
	}
	select {
	case <-p.timer.C:
		return nil
	case <-ctx.Done():
		p.timer.Stop()
		return ctx.Err()
	}
}
