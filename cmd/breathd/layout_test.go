package main

import (
	"os/exec"
	"strings"
	"testing"
)

// TestPackageLayout: the dependency rules of DEVELOPERS.md, on the
// packages as go list sees them (direct and indirect imports). Common
// practice, no source.
func TestPackageLayout(t *testing.T) {
	deps := func(pkg string) []string {
		t.Helper()
		cmd := exec.Command("go", "list", "-deps", "-f", "{{.ImportPath}}", pkg)
		cmd.Dir = root
		out, err := cmd.Output()
		if err != nil {
			t.Skipf("go list %s: %v (no Go toolchain here?)", pkg, err)
		}
		return strings.Fields(string(out))
	}
	std := func(p string) bool {
		return !strings.Contains(strings.SplitN(p, "/", 2)[0], ".") && !strings.HasPrefix(p, "breathd")
	}
	rules := []struct {
		pkg    string
		forbid func(dep string) bool
		why    string
	}{
		{"./stream/lines", func(d string) bool { return !std(d) && d != "breathd/stream/lines" }, "the input contract uses the standard library only"},
		{"./mechanics", func(d string) bool {
			return strings.HasPrefix(d, "breathd/") && d != "breathd/mechanics"
		}, "the analysis imports nothing of breathd (not device, stream, cmd, nor the simulator that plays a patient)"},
		{"./alerts", func(d string) bool {
			return strings.HasPrefix(d, "breathd/") && d != "breathd/alerts" && d != "breathd/mechanics"
		}, "the rules know only the analysis"},
		{"./stream", func(d string) bool {
			return strings.HasPrefix(d, "breathd/stream/") && d != "breathd/stream/lines" || strings.HasPrefix(d, "breathd/cmd")
		}, "the device loop knows the decoder, not its sinks"},
		{"./stream/payload", func(d string) bool {
			return d == "breathd/stream/publish" || d == "breathd/stream/broker" || strings.HasPrefix(d, "breathd/cmd")
		}, "publish → payload, never back"},
		{"./stream/publish", func(d string) bool { return d == "breathd/stream/broker" || strings.HasPrefix(d, "breathd/cmd") },
			"the publisher is a client of any broker"},
	}
	for _, r := range rules {
		for _, d := range deps(r.pkg) {
			if r.forbid(d) {
				t.Errorf("%s imports %s: %s", r.pkg, d, r.why)
			}
		}
	}
}
