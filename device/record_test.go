package device

import (
	"compress/gzip"
	"errors"
	"io"
	"io/fs"
	"os"
	"path/filepath"
	"runtime"
	"sort"
	"strings"
	"testing"
	"time"

	"github.com/rs/zerolog"
)

type fakeClock struct{ t time.Time }

func (c *fakeClock) now() time.Time { return c.t }

// chunks is a source that returns one chunk per Read.
type chunks struct{ parts []string }

func (c *chunks) Read(p []byte) (int, error) {
	if len(c.parts) == 0 {
		return 0, io.EOF
	}
	n := copy(p, c.parts[0])
	c.parts = c.parts[1:]
	return n, nil
}
func (c *chunks) Close() error { return nil }

func TestRecorderKeepsBytesAndAddsDirectives(t *testing.T) {
	dir := t.TempDir()
	clk := &fakeClock{time.Date(2026, 12, 1, 23, 59, 0, 0, time.UTC)}
	parts := []string{"t,paw,flow\n0.00,5", ".0,0.0\n0.01,5.1,1.0\n", "0.02,5.2,2.0\n0.0", "3,5.3,3.0\n"}
	src := &chunks{parts: append([]string(nil), parts...)}
	rec, err := NewRecorder(src, RecordConfig{Dir: dir, Name: "bed1", ClockEvery: 30 * time.Second,
		Header: func() string { return "breathd format delimiter=comma" }, Now: clk.now}, zerolog.Nop())
	if err != nil {
		t.Fatal(err)
	}
	var passed strings.Builder
	buf := make([]byte, 64)
	for i := 0; ; i++ {
		n, err := rec.Read(buf)
		passed.Write(buf[:n])
		if err != nil {
			break
		}
		clk.t = clk.t.Add(40 * time.Second) // a clock directive is due at every read; the day changes at read 2
	}
	rec.Close()
	if passed.String() != strings.Join(parts, "") {
		t.Fatalf("bytes passed through changed: %q", passed.String())
	}
	files, _ := filepath.Glob(filepath.Join(dir, "bed1-*.txt"))
	sort.Strings(files)
	if len(files) != 2 || rec.Files() != 2 {
		t.Fatalf("files %v", files)
	}
	var data []string
	for _, f := range files {
		b, _ := os.ReadFile(f)
		text := string(b)
		if !strings.HasPrefix(text, "# breathd recording v1 name=bed1\n# breathd format delimiter=comma\n# breathd clock ") {
			t.Errorf("%s starts %q", f, text[:60])
		}
		for _, l := range strings.Split(strings.TrimSuffix(text, "\n"), "\n") {
			if !strings.HasPrefix(l, "#") {
				data = append(data, l)
			}
		}
	}
	// Without directives, the files hold exactly the lines that came in.
	if strings.Join(data, "\n")+"\n" != strings.Join(parts, "") {
		t.Errorf("recorded lines %q", data)
	}
	if !strings.HasPrefix(filepath.Base(files[1]), "bed1-20261202T") {
		t.Errorf("second file %s is not the next day's", files[1])
	}
}

func TestRecorderRotatesBySize(t *testing.T) {
	dir := t.TempDir()
	line := "0.00,5.0,0.0\n"
	src := &chunks{parts: []string{strings.Repeat(line, 100), strings.Repeat(line, 100), strings.Repeat(line, 100)}}
	clk := &fakeClock{time.Date(2026, 12, 1, 8, 0, 0, 0, time.UTC)}
	rec, _ := NewRecorder(src, RecordConfig{Dir: dir, Name: "x", MaxBytes: 1000, Now: func() time.Time {
		clk.t = clk.t.Add(time.Second)
		return clk.t
	}}, zerolog.Nop())
	io.Copy(io.Discard, rec)
	rec.Close()
	if rec.Files() != 3 {
		t.Errorf("%d files, want 3", rec.Files())
	}
}

func TestRecorderUnwritableDirectory(t *testing.T) {
	if os.Geteuid() == 0 {
		// root writes anywhere: use a path under a file instead
		f := filepath.Join(t.TempDir(), "file")
		os.WriteFile(f, nil, 0o600)
		_, err := NewRecorder(&chunks{}, RecordConfig{Dir: filepath.Join(f, "rec")}, zerolog.Nop())
		if err == nil {
			t.Fatal("recording under a file accepted")
		}
		return
	}
	dir := t.TempDir()
	os.Chmod(dir, 0o500)
	if _, err := NewRecorder(&chunks{}, RecordConfig{Dir: dir}, zerolog.Nop()); err == nil {
		t.Fatal("read-only directory accepted")
	}
}

func TestFileGzipAndPacer(t *testing.T) {
	dir := t.TempDir()
	plain := filepath.Join(dir, "a.txt")
	os.WriteFile(plain, []byte("0,5,0\n"), 0o600)
	f, err := OpenFile(plain, 0)
	if err != nil {
		t.Fatal(err)
	}
	b, _ := io.ReadAll(f)
	f.Close()
	if string(b) != "0,5,0\n" {
		t.Errorf("plain read %q", b)
	}
	if _, err := OpenFile(filepath.Join(dir, "none.txt"), 0); !errors.Is(err, fs.ErrNotExist) {
		t.Errorf("missing file: %v", err)
	}
	if _, err := OpenFile(dir, 0); err == nil {
		t.Error("directory accepted as a recording")
	}
}

func TestFileReadsGzip(t *testing.T) {
	p := filepath.Join(t.TempDir(), "a.txt.gz")
	var buf strings.Builder
	zw := gzip.NewWriter(&buf)
	zw.Write([]byte("t,paw,flow\n0,5,0\n"))
	zw.Close()
	os.WriteFile(p, []byte(buf.String()), 0o600)
	f, err := OpenFile(p, 0)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	b, _ := io.ReadAll(f)
	if string(b) != "t,paw,flow\n0,5,0\n" {
		t.Errorf("gzip read %q", b)
	}
}

// TestRecorderCloseDuringRead: Close from another goroutine while the
// reading goroutine is recording (SIGTERM during a run with record:) is
// not a data race, and the file ends up closed. Run with -race. (Issue
// 16, item 10.)
func TestRecorderCloseDuringRead(t *testing.T) {
	pr, pw := io.Pipe()
	go func() {
		line := []byte("0.00,5.0,0.0\n")
		for {
			if _, err := pw.Write(line); err != nil {
				return
			}
		}
	}()
	rec, err := NewRecorder(pr, RecordConfig{Dir: t.TempDir(), Name: "race"}, zerolog.Nop())
	if err != nil {
		t.Fatal(err)
	}
	done := make(chan struct{})
	go func() {
		defer close(done)
		buf := make([]byte, 64)
		for {
			if _, err := rec.Read(buf); err != nil {
				return
			}
		}
	}()
	for rec.Files() == 0 {
		runtime.Gosched()
	}
	rec.Close()
	pw.CloseWithError(io.EOF)
	<-done
	if rec.WriteErrors() != 0 {
		t.Errorf("%d write errors", rec.WriteErrors())
	}
}
