package main

import (
	"bytes"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"unicode/utf16"
)

// sample is one line of the simulated stream the format cases start from.
type sample struct{ t, paw, flow float64 }

// baseStream is three minutes of the demo scenario, as numbers.
func baseStream(t *testing.T) []sample {
	t.Helper()
	path := filepath.Join(t.TempDir(), "base.txt")
	if code, _, errs := runCLI(t, "simulate", "--scenario", "configs/scenarios/demo.yaml", "--duration", "3m", "--out", path); code != 0 {
		t.Fatal(errs)
	}
	data, _ := os.ReadFile(path)
	var out []sample
	for _, line := range strings.Split(string(data), "\n") {
		f := strings.Split(line, ",")
		if len(f) != 3 || line[0] == '#' || line[0] == 't' {
			continue
		}
		var v [3]float64
		for i := range f {
			v[i], _ = strconv.ParseFloat(f[i], 64)
		}
		out = append(out, sample{v[0], v[1], v[2]})
	}
	return out
}

// write prints the samples with a header, a delimiter and a conversion.
func write(path, header, sep string, samples []sample, conv func(s sample) [3]string) {
	var b strings.Builder
	b.WriteString(header + "\n")
	for _, s := range samples {
		v := conv(s)
		b.WriteString(v[0] + sep + v[1] + sep + v[2] + "\n")
	}
	os.WriteFile(path, []byte(b.String()), 0o600)
}

func fx(v float64, d int) string { return strconv.FormatFloat(v, 'f', d, 64) }

// medianVTi reads analyze's summary.
func medianVTi(errs string) float64 {
	m := regexp.MustCompile(`vti (\d+\.\d)`).FindStringSubmatch(errs)
	if m == nil {
		return 0
	}
	v, _ := strconv.ParseFloat(m[1], 64)
	return v
}

// TestFormatsANewUserBrings: files in the formats real devices and
// spreadsheets write either decode to the same breaths as the plain file
// or make analyze print the hint that fixes them; a file of which nothing
// decodes makes analyze exit non-zero with one line. The conversions are
// the units' definitions (1 mbar = 100 Pa, 1 cmH2O = 98.0665 Pa, 1 L/s =
// 60 L/min). (Issue 17.)
func TestFormatsANewUserBrings(t *testing.T) {
	base := baseStream(t)
	dir := t.TempDir()
	plain := filepath.Join(dir, "plain.txt")
	write(plain, "t,paw,flow", ",", base, func(s sample) [3]string { return [3]string{fx(s.t, 2), fx(s.paw, 2), fx(s.flow, 2)} })
	code, _, errs := runCLI(t, "analyze", plain)
	want := medianVTi(errs)
	if code != 0 || want < 300 {
		t.Fatalf("plain file: exit %d\n%s", code, errs)
	}
	same := []struct {
		name, header, sep string
		conv              func(s sample) [3]string
		prefix            string
	}{
		{"units in the header", "Time [s];Paw [mbar];Flow [L/s]", ";", func(s sample) [3]string {
			return [3]string{fx(s.t, 2), fx(s.paw*0.980665, 3), fx(s.flow/60, 4)}
		}, ""},
		{"decimal comma", "t;paw;flow", ";", func(s sample) [3]string {
			c := func(v float64, d int) string { return strings.Replace(fx(v, d), ".", ",", 1) }
			return [3]string{c(s.t, 2), c(s.paw, 2), c(s.flow, 2)}
		}, ""},
		{"byte-order mark", "t,paw,flow", ",", func(s sample) [3]string { return [3]string{fx(s.t, 2), fx(s.paw, 2), fx(s.flow, 2)} }, "\xef\xbb\xbf"},
	}
	for _, c := range same {
		p := filepath.Join(dir, "same.txt")
		write(p, c.header, c.sep, base, c.conv)
		if c.prefix != "" {
			b, _ := os.ReadFile(p)
			os.WriteFile(p, append([]byte(c.prefix), b...), 0o600)
		}
		code, _, errs := runCLI(t, "analyze", p)
		if got := medianVTi(errs); code != 0 || got < want*0.99 || got > want*1.01 {
			t.Errorf("%s: exit %d, median vti %.1f (plain %.1f)\n%s", c.name, code, got, want, errs)
		}
	}
	hinted := []struct {
		name, fix string
		conv      func(s sample) [3]string
	}{
		{"flow in L/s", "--unit flow=L/s", func(s sample) [3]string { return [3]string{fx(s.t, 2), fx(s.paw, 2), fx(s.flow/60, 4)} }},
		{"flow in mL/s", "--unit flow=mL/s", func(s sample) [3]string { return [3]string{fx(s.t, 2), fx(s.paw, 2), fx(s.flow/60*1000, 1)} }},
		{"flow reversed", "--flow-sign -1", func(s sample) [3]string { return [3]string{fx(s.t, 2), fx(s.paw, 2), f(-s.flow, 2)} }},
		{"pressure in kPa", "--unit paw=kPa", func(s sample) [3]string { return [3]string{fx(s.t, 2), fx(s.paw*0.0980665, 4), fx(s.flow, 2)} }},
		{"time in ms", "--unit t=ms", func(s sample) [3]string { return [3]string{fx(s.t*1000, 0), fx(s.paw, 2), fx(s.flow, 2)} }},
	}
	for _, c := range hinted {
		p := filepath.Join(dir, "hinted.txt")
		write(p, "t,paw,flow", ",", base, c.conv)
		_, _, errs := runCLI(t, "analyze", p)
		if !strings.Contains(errs, "check: ") || !strings.Contains(errs, c.fix) {
			t.Errorf("%s: no hint with %q:\n%s", c.name, c.fix, errs)
		}
	}
	// nothing decodes: one line, exit non-zero
	var u16 bytes.Buffer
	u16.Write([]byte{0xff, 0xfe})
	for _, r := range utf16.Encode([]rune("t,paw,flow\n0,5,0\n")) {
		u16.Write([]byte{byte(r), byte(r >> 8)})
	}
	for name, c := range map[string]struct{ data, want string }{
		"UTF-16":      {u16.String(), "UTF-16"},
		"a PNG image": {"\x89PNG\r\n\x1a\n" + strings.Repeat("\x00", 64), "PNG image"},
		"no numbers":  {"a,b,c\nx,y,z\nq,r,s\n", "no sample decoded"},
		"empty":       {"", "the input is empty"},
	} {
		p := filepath.Join(dir, "nothing.txt")
		os.WriteFile(p, []byte(c.data), 0o600)
		code, _, errs := runCLI(t, "analyze", p)
		last := strings.TrimSpace(errs)
		last = last[strings.LastIndex(last, "\n")+1:]
		if code == 0 || !strings.HasPrefix(last, "breathd: ") || !strings.Contains(last, c.want) {
			t.Errorf("%s: exit %d, last line %q", name, code, last)
		}
	}
}
