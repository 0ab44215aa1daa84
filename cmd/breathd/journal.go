package main

import (
	"bytes"
	"fmt"
	"io"
	"os"
	"strconv"
	"strings"
	"sync"

	"github.com/rs/zerolog"
	"golang.org/x/sys/unix"
)

// journalPriority is the syslog priority systemd's journal reads from a
// "<N>" line prefix (sd-daemon(3)) for a zerolog level.
func journalPriority(l zerolog.Level) int {
	switch l {
	case zerolog.TraceLevel, zerolog.DebugLevel:
		return 7 // debug
	case zerolog.InfoLevel, zerolog.NoLevel:
		return 6 // info
	case zerolog.WarnLevel:
		return 4 // warning
	case zerolog.ErrorLevel:
		return 3 // err
	}
	return 2 // crit: fatal, panic
}

// toJournal reports whether f is the stream systemd gave the service for
// its journal: JOURNAL_STREAM names its device and inode (systemd.exec(5)).
func toJournal(env string, f *os.File) bool {
	dev, ino, ok := strings.Cut(env, ":")
	if !ok || f == nil {
		return false
	}
	var st unix.Stat_t
	if unix.Fstat(int(f.Fd()), &st) != nil {
		return false
	}
	return dev == strconv.FormatUint(uint64(st.Dev), 10) && ino == strconv.FormatUint(st.Ino, 10)
}

// journalWriter writes each log line as plain text (the journal keeps its
// own time) behind the "<N>" prefix of its level, in one write.
type journalWriter struct {
	mu   sync.Mutex
	out  io.Writer
	buf  bytes.Buffer
	text zerolog.ConsoleWriter
}

func newJournalWriter(out io.Writer) *journalWriter {
	j := &journalWriter{out: out}
	j.text = zerolog.ConsoleWriter{Out: &j.buf, NoColor: true, PartsExclude: []string{zerolog.TimestampFieldName}}
	return j
}

func (j *journalWriter) Write(p []byte) (int, error) { return j.WriteLevel(zerolog.NoLevel, p) }

// WriteLevel writes one event of level l.
func (j *journalWriter) WriteLevel(l zerolog.Level, p []byte) (int, error) {
	j.mu.Lock()
	defer j.mu.Unlock()
	j.buf.Reset()
	fmt.Fprintf(&j.buf, "<%d>", journalPriority(l))
	if _, err := j.text.Write(p); err != nil {
		return 0, err
	}
	if _, err := j.out.Write(j.buf.Bytes()); err != nil {
		return 0, err
	}
	return len(p), nil
}
