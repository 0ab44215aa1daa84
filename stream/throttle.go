package stream

import (
	"sync"
	"time"
)

// Throttle lets a repeated log line through at most once per interval and
// counts the ones it held back, so that a stream of faults cannot flood
// the log: the first passes, then one per interval saying how many were
// held back since. Safe for concurrent use.
type Throttle struct {
	Every time.Duration // default one minute

	mu   sync.Mutex
	last time.Time
	held int64
}

// Allow reports whether to log now, and how many were held back since the
// last line that was let through.
func (t *Throttle) Allow(now time.Time) (ok bool, held int64) {
	t.mu.Lock()
	defer t.mu.Unlock()
	every := t.Every
	if every <= 0 {
		every = time.Minute
	}
	if !t.last.IsZero() && now.Sub(t.last) < every {
		t.held++
		return false, 0
	}
	t.last, held, t.held = now, t.held, 0
	return true, held
}
