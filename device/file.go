package device

import (
	"bufio"
	"compress/gzip"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"os"
	"sync/atomic"
	"syscall"
)

// File is a recorded stream read from disk, gzip-compressed or not (told
// by its first bytes), released at Pacer's speed.
type File struct {
	f     *os.File
	r     io.Reader
	pacer Pacer
	read  atomic.Int64 // bytes read from disk
	size  int64
}

// OpenFile opens a recording. speed is as for Pacer: 0 for as fast as
// possible.
func OpenFile(path string, speed float64) (*File, error) {
	f, err := os.Open(path)
	if err != nil {
		if errors.Is(err, fs.ErrNotExist) {
			return nil, fmt.Errorf("recording %s: %w", path, fs.ErrNotExist)
		}
		return nil, fmt.Errorf("open recording: %w", err)
	}
	st, err := f.Stat()
	if err == nil && st.IsDir() {
		f.Close()
		return nil, fmt.Errorf("%s is a directory, not a recording", path)
	}
	file := &File{f: f, pacer: Pacer{Speed: speed}}
	if err == nil {
		file.size = st.Size()
	}
	r, err := maybeGzip(countingReader{f, &file.read})
	if err != nil {
		f.Close()
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	file.r = r
	return file, nil
}

// maybeGzip returns a reader that decompresses r when it starts with the
// gzip magic bytes.
func maybeGzip(r io.Reader) (io.Reader, error) {
	br := bufio.NewReaderSize(r, 64<<10)
	magic, err := br.Peek(2)
	if err == nil && magic[0] == 0x1f && magic[1] == 0x8b {
		zr, err := gzip.NewReader(br)
		if err != nil {
			return nil, fmt.Errorf("gzip: %w", err)
		}
		return zr, nil
	}
	return br, nil
}

// Read reads the recording; its end is io.EOF.
func (f *File) Read(p []byte) (int, error) { return f.r.Read(p) }

// Close closes the file.
func (f *File) Close() error { return f.f.Close() }

// Progress returns the bytes read from disk so far and the file's size.
// It is safe to call from any goroutine.
func (f *File) Progress() (read, size int64) { return f.read.Load(), f.size }

type countingReader struct {
	r io.Reader
	n *atomic.Int64
}

func (c countingReader) Read(p []byte) (int, error) {
	n, err := c.r.Read(p)
	c.n.Add(int64(n))
	return n, err
}

// Pacer returns the file's pacer.
func (f *File) Pacer() *Pacer { return &f.pacer }

// Stdin is standard input as a source (gzip read transparently; a cut
// gzip header is an error); closing it unblocks a pending
// Read. (A read on os.Stdin as Go opens it blocks in the kernel and a
// Close does not end it, so SIGTERM could not stop breathd reading a quiet
// pipe: the descriptor is made non-blocking and reopened so that the
// runtime's poller owns it.)
func Stdin() (io.ReadCloser, error) {
	in := os.Stdin
	if err := syscall.SetNonblock(0, true); err == nil {
		in = os.NewFile(0, "/dev/stdin")
	}
	r, err := maybeGzip(in)
	if err != nil {
		stdinCloser{in}.Close()
		return nil, fmt.Errorf("standard input: %w", err)
	}
	return readCloser{r, stdinCloser{in}}, nil
}

// stdinCloser closes standard input and gives the descriptor back its
// blocking mode: the terminal or pipe is shared with the shell.
type stdinCloser struct{ f *os.File }

func (s stdinCloser) Close() error {
	syscall.SetNonblock(0, false)
	return s.f.Close()
}

type readCloser struct {
	io.Reader
	io.Closer
}
