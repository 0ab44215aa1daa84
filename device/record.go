package device

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"sync"
	"sync/atomic"
	"time"

	"github.com/rs/zerolog"
)

// RecordConfig says where and how a Recorder writes.
type RecordConfig struct {
	Dir        string        // directory of the recording files; created if missing
	Name       string        // file name prefix, usually the device id
	MaxBytes   int64         // start a new file past this size; default 64 MiB
	ClockEvery time.Duration // write a clock directive this often; default 1 min
	// Header returns the format directive (without "# ") written at the top
	// of every file. It is called from the reading goroutine.
	Header func() string
	Now    func() time.Time // default time.Now; for tests
}

// Recorder passes a source's bytes through unchanged and writes a copy to
// recording files. Each file starts with comment lines that make it replay
// without flags:
//
//	# breathd recording v1 name=bed1
//	# breathd format columns=t,paw,flow delimiter=comma
//	# breathd clock 2026-12-01T08:00:00.000Z
//
// and a clock directive follows every ClockEvery, always at a line boundary.
// A file ends and the next begins when it passes MaxBytes or the UTC day
// changes. A failure to write is logged and counted but never stops the
// source.
type Recorder struct {
	src io.ReadCloser
	cfg RecordConfig
	log zerolog.Logger

	// mu guards the file: the reading goroutine writes it, Close (from any
	// goroutine, e.g. on SIGTERM) ends it
	mu        sync.Mutex
	closed    bool
	f         *os.File
	size      int64
	day       int // UTC year*400+yday of the open file
	nextClock time.Time
	lineStart bool // the last byte written ended a line

	writeErrs atomic.Int64
	files     atomic.Int64
	current   atomic.Pointer[string] // the open file's path
	failing   bool
}

// NewRecorder wraps src. The directory must be writable now.
func NewRecorder(src io.ReadCloser, cfg RecordConfig, log zerolog.Logger) (*Recorder, error) {
	if cfg.MaxBytes <= 0 {
		cfg.MaxBytes = 64 << 20
	}
	if cfg.ClockEvery <= 0 {
		cfg.ClockEvery = time.Minute
	}
	if cfg.Now == nil {
		cfg.Now = time.Now
	}
	if cfg.Header == nil {
		cfg.Header = func() string { return "breathd format" }
	}
	if cfg.Name == "" {
		cfg.Name = "stream"
	}
	if err := os.MkdirAll(cfg.Dir, 0o750); err != nil {
		return nil, fmt.Errorf("recording directory: %w", err)
	}
	probe, err := os.CreateTemp(cfg.Dir, ".probe-*")
	if err != nil {
		return nil, fmt.Errorf("recording directory %s is not writable: %w", cfg.Dir, err)
	}
	probe.Close()
	os.Remove(probe.Name())
	return &Recorder{src: src, cfg: cfg, log: log, lineStart: true}, nil
}

// Read reads from the source and records what it returns.
func (r *Recorder) Read(p []byte) (int, error) {
	n, err := r.src.Read(p)
	if n > 0 {
		r.mu.Lock()
		if !r.closed {
			r.record(p[:n])
		}
		r.mu.Unlock()
	}
	return n, err
}

// Close closes the source, which ends a Read in progress, and the open
// file; what is read after it is not recorded. It may be called from any
// goroutine, more than once.
func (r *Recorder) Close() error {
	err := r.src.Close()
	r.mu.Lock()
	defer r.mu.Unlock()
	r.closed = true
	if r.f != nil {
		r.f.Sync()
		r.f.Close()
		r.f = nil
	}
	return err
}

// SetHeader replaces the format directive written at the top of each new
// file, e.g. with the format as decoded so far (columns from the stream's
// header, the delimiter detected). It must be called before reading or
// from the reading goroutine.
func (r *Recorder) SetHeader(h func() string) { r.cfg.Header = h }

// WriteErrors is the number of writes that failed.
func (r *Recorder) WriteErrors() int64 { return r.writeErrs.Load() }

// Files is the number of recording files started.
func (r *Recorder) Files() int64 { return r.files.Load() }

// Source is the source the recorder wraps: HealthOf and PacerOf look
// through it, so that a recorder claims neither a health nor a pace its
// source does not have.
func (r *Recorder) Source() io.ReadCloser { return r.src }

// File is the path of the file being written, "" before the first.
func (r *Recorder) File() string {
	if p := r.current.Load(); p != nil {
		return *p
	}
	return ""
}

// RecordStats are the recorder's counts, for the status.
func (r *Recorder) RecordStats() RecordStats {
	return RecordStats{Files: r.files.Load(), WriteErrors: r.writeErrs.Load()}
}

func (r *Recorder) record(b []byte) {
	for len(b) > 0 {
		now := r.cfg.Now()
		if r.lineStart && r.due(now) {
			r.directives(now)
		}
		// write up to and including the first LF when a directive is due,
		// else everything
		chunk := b
		if r.due(now) {
			if i := bytes.IndexByte(b, '\n'); i >= 0 {
				chunk = b[:i+1]
			}
		}
		r.write(chunk)
		r.lineStart = chunk[len(chunk)-1] == '\n'
		b = b[len(chunk):]
	}
}

// due says whether a new file or a clock directive is wanted. After a
// failed open the next try waits for the next clock time.
func (r *Recorder) due(now time.Time) bool {
	return !now.Before(r.nextClock) || (r.f != nil && (r.size >= r.cfg.MaxBytes || dayOf(now) != r.day))
}

func dayOf(t time.Time) int {
	t = t.UTC()
	return t.Year()*400 + t.YearDay()
}

// directives starts a new file if needed and writes a clock directive.
func (r *Recorder) directives(now time.Time) {
	if r.f == nil || r.size >= r.cfg.MaxBytes || dayOf(now) != r.day {
		r.rotate(now)
	}
	r.nextClock = now.Add(r.cfg.ClockEvery)
	if r.f != nil {
		r.write([]byte("# breathd clock " + now.UTC().Format("2006-01-02T15:04:05.000Z07:00") + "\n"))
		r.f.Sync()
	}
}

func (r *Recorder) rotate(now time.Time) {
	if r.f != nil {
		r.f.Sync()
		r.f.Close()
		r.f = nil
	}
	base := r.cfg.Name + "-" + now.UTC().Format("20060102T150405Z")
	var f *os.File
	var err error
	for i := 0; i < 100; i++ {
		name := base + ".txt"
		if i > 0 {
			name = fmt.Sprintf("%s-%d.txt", base, i)
		}
		f, err = os.OpenFile(filepath.Join(r.cfg.Dir, name), os.O_WRONLY|os.O_CREATE|os.O_EXCL, 0o640)
		if !errors.Is(err, os.ErrExist) {
			break
		}
	}
	r.day = dayOf(now)
	if err != nil {
		r.fail(err)
		return
	}
	r.f, r.size = f, 0
	r.files.Add(1)
	path := f.Name()
	r.current.Store(&path)
	r.log.Info().Str("file", f.Name()).Msg("recording")
	r.write([]byte("# breathd recording v1 name=" + r.cfg.Name + "\n# " + r.cfg.Header() + "\n"))
}

func (r *Recorder) write(b []byte) {
	if r.f == nil {
		r.writeErrs.Add(1)
		return
	}
	n, err := r.f.Write(b)
	r.size += int64(n)
	if err != nil {
		r.fail(err)
		return
	}
	if r.failing {
		r.failing = false
		r.log.Info().Msg("recording works again")
	}
}

func (r *Recorder) fail(err error) {
	r.writeErrs.Add(1)
	if !r.failing {
		r.failing = true
		r.log.Error().Err(err).Msg("recording failed; the stream goes on unrecorded until writing works again")
	}
}
