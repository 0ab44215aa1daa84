package main

import (
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"syscall"
	"testing"

	"github.com/rs/zerolog"
)

// TestJournalPrefixes: under systemd, with JOURNAL_STREAM naming breathd's
// stderr, each log line starts with the "<N>" syslog priority of its
// level (sd-daemon(3): 7 debug, 6 info, 4 warning, 3 err, 2 crit), as
// plain text without breathd's own time; another stream, or none, gets no
// prefix. From memory of the sd-daemon manual.
func TestJournalPrefixes(t *testing.T) {
	for l, want := range map[zerolog.Level]int{zerolog.DebugLevel: 7, zerolog.InfoLevel: 6, zerolog.WarnLevel: 4, zerolog.ErrorLevel: 3, zerolog.FatalLevel: 2} {
		if got := journalPriority(l); got != want {
			t.Errorf("%v: <%d>, want <%d>", l, got, want)
		}
	}
	path := filepath.Join(t.TempDir(), "journal")
	f, err := os.Create(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	var st syscall.Stat_t
	syscall.Fstat(int(f.Fd()), &st)
	env := fmt.Sprintf("%d:%d", st.Dev, st.Ino)
	if !toJournal(env, f) || toJournal("", f) || toJournal(fmt.Sprintf("%d:%d", st.Dev, st.Ino+1), f) || toJournal(env, os.Stdin) {
		t.Fatal("the journal stream is not told from another")
	}
	log := zerolog.New(newJournalWriter(f)).With().Timestamp().Logger()
	log.Info().Str("device", "bed1").Msg("device opened")
	log.Warn().Msg("lost the MQTT broker")
	log.Error().Msg("device stopped")
	data, _ := os.ReadFile(path)
	lines := strings.Split(strings.TrimSuffix(string(data), "\n"), "\n")
	for i, prefix := range []string{"<6>", "<4>", "<3>"} {
		if i >= len(lines) || !strings.HasPrefix(lines[i], prefix) || strings.Contains(lines[i], `{"level"`) {
			t.Errorf("line %d %q: want %s and plain text", i, lines, prefix)
		}
	}
	if !strings.Contains(lines[0], "device opened") || !strings.Contains(lines[0], "device=bed1") {
		t.Errorf("line %q", lines[0])
	}
}

// TestServiceLogging: run under a journal stream logs a start line and the
// final counters at a clean stop, each with its priority, and prints no
// breath rows on a stdout that is not a terminal. Common practice, no
// source.
func TestServiceLogging(t *testing.T) {
	dir := t.TempDir()
	conf := filepath.Join(dir, "bed.yaml")
	os.WriteFile(conf, []byte("devices:\n  - id: bed1\n    file: {path: testdata/bad-lines.txt, speed: 0}\n"), 0o600)
	errPath := filepath.Join(dir, "journal")
	errFile, _ := os.Create(errPath)
	defer errFile.Close()
	var st syscall.Stat_t
	syscall.Fstat(int(errFile.Fd()), &st)
	cmd := breathd("run", "--no-mqtt", "--config", conf)
	cmd.Env = append(cmd.Env, fmt.Sprintf("JOURNAL_STREAM=%d:%d", st.Dev, st.Ino))
	out := &syncBuffer{}
	cmd.Stdout, cmd.Stderr = out, errFile
	if err := cmd.Run(); err != nil {
		t.Fatal(err)
	}
	journal, _ := os.ReadFile(errPath)
	for _, want := range []string{"<6>INF breathd started", "<6>INF final counters", "samples=500", "breaths=2", "bad_lines=7", "<6>INF breathd stopped"} {
		if !strings.Contains(string(journal), want) {
			t.Errorf("no %q in the journal:\n%s", want, journal)
		}
	}
	if strings.Contains(out.String(), "device     breath") || !strings.Contains(out.String(), "samples 500") {
		t.Errorf("stdout of a service:\n%s", out.String())
	}
}
