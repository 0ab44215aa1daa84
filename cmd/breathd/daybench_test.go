package main

import (
	"bytes"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"
	"time"
)

// baselineSource is the plain way to read a stream — bufio.Scanner, split
// on commas, strconv.ParseFloat — built as a program of its own so that
// its wall time and peak RSS are measured like breathd's.
const baselineSource = `package main

import (
	"bufio"
	"bytes"
	"fmt"
	"os"
	"strconv"
)

func main() {
	f, err := os.Open(os.Args[1])
	if err != nil {
		fmt.Fprintln(os.Stderr, err)
		os.Exit(1)
	}
	sc := bufio.NewScanner(f)
	var n int64
	var sum float64
	for sc.Scan() {
		rest, more := sc.Bytes(), true
		for more {
			var field []byte
			field, rest, more = bytes.Cut(rest, []byte{','})
			if v, err := strconv.ParseFloat(string(field), 64); err == nil {
				sum += v
			}
		}
		n++
	}
	fmt.Println(n, sum)
}
`

func goBuild(t *testing.T, dir, out string, args ...string) {
	t.Helper()
	cmd := exec.Command("go", append([]string{"build", "-o", out}, args...)...)
	cmd.Dir = dir
	if b, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("go build: %v\n%s", err, b)
	}
}

type measured struct {
	wall   time.Duration
	rssMB  float64
	output string
}

// measure runs a command under /usr/bin/time for its peak RSS (a child's
// own rusage would count the test process's pages it was forked with).
func measure(t *testing.T, cmd *exec.Cmd) measured {
	t.Helper()
	timeBin, err := exec.LookPath("/usr/bin/time")
	if err != nil {
		t.Skip("needs /usr/bin/time (apt-get install time) for the peak RSS")
	}
	timed := exec.Command(timeBin, append([]string{"-f", "rss_kb %M"}, cmd.Args...)...)
	var out bytes.Buffer
	timed.Stdout, timed.Stderr = &out, &out
	start := time.Now()
	if err := timed.Run(); err != nil {
		t.Fatalf("%v: %v\n%s", cmd.Args, err, out.String())
	}
	wall := time.Since(start)
	var kb float64
	lines := strings.Split(strings.TrimSpace(out.String()), "\n")
	fmt.Sscanf(lines[len(lines)-1], "rss_kb %f", &kb)
	return measured{wall, kb / 1024, out.String()}
}

// TestDayLongEndToEnd is the end-to-end benchmark: it generates a 24 h,
// 100 Hz stream with the simulator, runs breathd analyze on it, and the
// plain baseline on the same file, and reports samples/s, wall time and
// peak RSS of both, and breathd's peak RSS on a 1 h file. It runs only
// with BREATHD_BENCH_DAY=1 (it writes 175 MB and takes a minute).
func TestDayLongEndToEnd(t *testing.T) {
	if os.Getenv("BREATHD_BENCH_DAY") != "1" {
		t.Skip("set BREATHD_BENCH_DAY=1 to run the day-long end-to-end benchmark")
	}
	dir := t.TempDir()
	day, hour := filepath.Join(dir, "day.txt"), filepath.Join(dir, "hour.txt")
	for _, c := range []struct{ path, dur string }{{day, "24h"}, {hour, "1h"}} {
		if code, _, errs := runCLI(t, "simulate", "--scenario", "configs/scenarios/steady-vc.yaml", "--duration", c.dur, "--out", c.path); code != 0 {
			t.Fatal(errs)
		}
	}
	bin, baseDir := filepath.Join(dir, "breathd"), filepath.Join(dir, "baseline")
	goBuild(t, root, bin, "./cmd/breathd")
	os.MkdirAll(baseDir, 0o755)
	os.WriteFile(filepath.Join(baseDir, "go.mod"), []byte("module baseline\n\ngo 1.26\n"), 0o644)
	os.WriteFile(filepath.Join(baseDir, "main.go"), []byte(baselineSource), 0o644)
	goBuild(t, baseDir, filepath.Join(dir, "plain"), ".")
	const samples = 24 * 3600 * 100
	an := measure(t, exec.Command(bin, "analyze", day))
	hr := measure(t, exec.Command(bin, "analyze", hour))
	bl := measure(t, exec.Command(filepath.Join(dir, "plain"), day))
	t.Logf("breathd analyze, 24 h at 100 Hz: %.2f s wall, %.1f M samples/s, peak RSS %.1f MB (1 h file: %.1f MB)",
		an.wall.Seconds(), samples/an.wall.Seconds()/1e6, an.rssMB, hr.rssMB)
	t.Logf("baseline bufio.Scanner + strconv.ParseFloat, same file: %.2f s wall, %.1f M lines/s, peak RSS %.1f MB",
		bl.wall.Seconds(), samples/bl.wall.Seconds()/1e6, bl.rssMB)
	t.Logf("ratio (baseline wall / breathd wall, breathd doing all the analysis): %.2f", bl.wall.Seconds()/an.wall.Seconds())
}
