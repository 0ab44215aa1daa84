package main

import (
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// TestTruncatedGzipOnStdin: standard input that starts with a cut gzip
// header is one clear error line, not a panic; a gzip file cut in half
// gives its good part and then says so. (Issue 16, item 3.)
func TestTruncatedGzipOnStdin(t *testing.T) {
	t.Parallel() // a process of its own
	cmd := breathd("analyze", "-")
	cmd.Stdin = strings.NewReader("\x1f\x8b\x08\x00")
	out, err := cmd.CombinedOutput()
	if err == nil || strings.Contains(string(out), "panic") || strings.Count(strings.TrimSpace(string(out)), "\n") != 0 ||
		!strings.Contains(string(out), "gzip") {
		t.Errorf("cut gzip header on stdin: %v\n%s", err, out)
	}
	// half a gzip file: the good part is analysed, then one line says the rest is cut
	demo, _ := os.ReadFile(filepath.Join(root, "testdata", "demo.txt.gz"))
	half := filepath.Join(t.TempDir(), "half.txt.gz")
	os.WriteFile(half, demo[:len(demo)/2], 0o600)
	out, err = breathd("analyze", half).CombinedOutput()
	if err == nil || !strings.Contains(string(out), "unexpected EOF") || !strings.Contains(string(out), " breaths in ") {
		t.Errorf("half a gzip file: %v\n%s", err, out)
	}
}
