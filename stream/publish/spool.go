package publish

import (
	"bufio"
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
)

// spool is one device's durable queue of QoS 1 event messages and its
// latest active-rules payload, kept in a state directory so that they
// survive a broker outage and a restart:
//
//	events.log   one JSON line per event message, appended and synced
//	events.done  the sequence number of the last one the broker acknowledged
//	active.json  the latest active-rules payload not yet delivered
//
// A message may be delivered twice (after a crash between the broker's
// acknowledgement and events.done); every payload carries its id and
// sequence number so that subscribers can drop duplicates. Without a
// directory the queue lives in memory only.
type spool struct {
	dir string

	mu       sync.Mutex
	file     *os.File
	pending  []spoolMsg
	nextSeq  int64
	done     int64
	active   []byte // not yet delivered; nil when delivered
	unqueued int64  // messages that could not be written to disk
	lastErr  string
}

type spoolMsg struct {
	Seq     int64           `json:"seq"`
	Topic   string          `json:"topic"`
	Payload json.RawMessage `json:"payload"`
}

// fileMode is the mode of every file of the queue: breathd's user reads
// and writes, its group reads.
const fileMode = 0o640

// maxPending bounds the queue in memory and on disk, below MQTT's 65 535
// message ids; beyond it the oldest events are dropped and counted.
const maxPending = 50000

// openSpool opens (or creates) the queue in dir; "" for memory only. The
// directory must be writable.
func openSpool(dir string) (*spool, error) {
	s := &spool{dir: dir, nextSeq: 1}
	if dir == "" {
		return s, nil
	}
	if err := os.MkdirAll(dir, 0o750); err != nil {
		return nil, fmt.Errorf("state directory: %w", err)
	}
	probe, err := os.CreateTemp(dir, ".probe-*")
	if err != nil {
		return nil, fmt.Errorf("state directory %s is not writable: %w", dir, err)
	}
	probe.Close()
	os.Remove(probe.Name())
	if b, err := os.ReadFile(filepath.Join(dir, "events.done")); err == nil {
		s.done, _ = strconv.ParseInt(strings.TrimSpace(string(b)), 10, 64)
	}
	s.nextSeq = s.done + 1
	if f, err := os.Open(filepath.Join(dir, "events.log")); err == nil {
		sc := bufio.NewScanner(f)
		sc.Buffer(make([]byte, 64<<10), 1<<20)
		for sc.Scan() {
			var m spoolMsg
			if json.Unmarshal(sc.Bytes(), &m) != nil {
				continue // a line cut by a crash
			}
			if m.Seq >= s.nextSeq {
				s.nextSeq = m.Seq + 1
			}
			if m.Seq > s.done {
				s.pending = append(s.pending, m)
			}
		}
		f.Close()
	}
	// an earlier run's active set is not this run's: its rules may have
	// changed, and its events are acknowledged by ids of that run; the
	// publisher starts from its own (empty) set
	os.Remove(filepath.Join(dir, "active.json"))
	s.file, err = os.OpenFile(filepath.Join(dir, "events.log"), os.O_WRONLY|os.O_CREATE|os.O_APPEND, fileMode)
	if err != nil {
		return nil, fmt.Errorf("state directory: %w", err)
	}
	return s, nil
}

// push queues one message, on disk first.
func (s *spool) push(topic string, payload []byte) error {
	s.mu.Lock()
	defer s.mu.Unlock()
	m := spoolMsg{Seq: s.nextSeq, Topic: topic, Payload: json.RawMessage(payload)}
	s.nextSeq++
	if len(s.pending) >= maxPending {
		s.pending = s.pending[1:]
		s.unqueued++
	}
	s.pending = append(s.pending, m)
	if s.file == nil {
		return nil
	}
	line, _ := json.Marshal(m)
	_, err := s.file.Write(append(line, '\n'))
	if err == nil {
		err = s.file.Sync()
	}
	if err != nil {
		s.unqueued++
		s.lastErr = err.Error()
		return fmt.Errorf("event queue on disk: %w (kept in memory only)", err)
	}
	return nil
}

// setActive replaces the active-rules payload to deliver.
func (s *spool) setActive(payload []byte) error {
	s.mu.Lock()
	defer s.mu.Unlock()
	s.active = payload
	if s.dir == "" {
		return nil
	}
	return writeFileSync(filepath.Join(s.dir, "active.json"), payload)
}

func writeFileSync(path string, data []byte) error {
	tmp := path + ".tmp"
	f, err := os.OpenFile(tmp, os.O_WRONLY|os.O_CREATE|os.O_TRUNC, fileMode)
	if err != nil {
		return err
	}
	_, err = f.Write(data)
	if err == nil {
		err = f.Sync()
	}
	if cerr := f.Close(); err == nil {
		err = cerr
	}
	if err == nil {
		err = os.Rename(tmp, path)
	}
	return err
}

// head returns the oldest undelivered message.
func (s *spool) head() (spoolMsg, bool) {
	s.mu.Lock()
	defer s.mu.Unlock()
	if len(s.pending) == 0 {
		return spoolMsg{}, false
	}
	return s.pending[0], true
}

// ack drops the delivered head and records it on disk.
func (s *spool) ack(seq int64) error {
	s.mu.Lock()
	defer s.mu.Unlock()
	if len(s.pending) == 0 || s.pending[0].Seq != seq {
		return nil
	}
	s.pending = s.pending[1:]
	s.done = seq
	if s.dir == "" {
		return nil
	}
	if err := writeFileSync(filepath.Join(s.dir, "events.done"), []byte(strconv.FormatInt(seq, 10)+"\n")); err != nil {
		s.lastErr = err.Error()
		return err
	}
	if len(s.pending) == 0 {
		// everything delivered: start the log afresh
		if st, err := s.file.Stat(); err == nil && st.Size() > 1<<20 {
			s.file.Truncate(0)
		}
	}
	return nil
}

// takeActive returns the active payload to deliver, if any.
func (s *spool) takeActive() []byte {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.active
}

// activeDone marks payload delivered unless a newer one replaced it.
func (s *spool) activeDone(payload []byte) {
	s.mu.Lock()
	defer s.mu.Unlock()
	if len(s.active) == len(payload) && string(s.active) == string(payload) {
		s.active = nil
	}
}

// depth is the number of undelivered messages (events and active).
func (s *spool) depth() int {
	s.mu.Lock()
	defer s.mu.Unlock()
	n := len(s.pending)
	if s.active != nil {
		n++
	}
	return n
}

func (s *spool) counts() (unqueued int64, lastErr string) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.unqueued, s.lastErr
}

func (s *spool) close() error {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.file == nil {
		return nil
	}
	err := s.file.Close()
	s.file = nil
	return errors.Join(err)
}
