package config

import (
	"errors"
	"io/fs"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// TestErrorsKeepTheirChain: a missing file is fs.ErrNotExist, a bad value
// is a *FieldError at its key path whose message starts with file:line,
// and a scenario's bad setting is located the same way. Common practice,
// no source.
func TestErrorsKeepTheirChain(t *testing.T) {
	dir := t.TempDir()
	if _, err := Load(filepath.Join(dir, "absent.yaml")); !errors.Is(err, fs.ErrNotExist) {
		t.Errorf("missing config: %v", err)
	}
	if _, err := LoadScenario(filepath.Join(dir, "absent.yaml")); !errors.Is(err, fs.ErrNotExist) {
		t.Errorf("missing scenario: %v", err)
	}
	_, err := Parse("c.yaml", []byte("devices:\n  - id: a\n    stdin: true\n  - id: 'b/c'\n    stdin: true\n"))
	var fe *FieldError
	if !errors.As(err, &fe) || len(fe.Path) != 3 || fe.Path[1] != 1 || !strings.HasPrefix(err.Error(), "c.yaml:4: devices[1].id: device id") {
		t.Errorf("bad id: %v", err)
	}
	p := filepath.Join(dir, "s.yaml")
	os.WriteFile(p, []byte("settings:\n  mode: vc\n  r: 10\n  c: 50\n  peep: 5\n  rr: 15\n  vt: 400\n  ti: 1\n"+
		"timeline:\n  - at: 1m\n    set: {c: 0.5}\n"), 0o600)
	_, err = LoadScenario(p)
	if !errors.As(err, &fe) || !strings.HasPrefix(err.Error(), p+":10: timeline[0]: the settings from 1m0s: c: 0.5 out of range") {
		t.Errorf("bad timeline: %v", err)
	}
}

// TestPassword: from a file or the environment, never both.
func TestPassword(t *testing.T) {
	p := filepath.Join(t.TempDir(), "pw")
	os.WriteFile(p, []byte("s3cret\n"), 0o600)
	t.Setenv("BREATHD_TEST_PW", "env-secret")
	for _, c := range []struct {
		m    MQTT
		want string
		ok   bool
	}{
		{MQTT{PasswordFile: p}, "s3cret", true},
		{MQTT{PasswordEnv: "BREATHD_TEST_PW"}, "env-secret", true},
		{MQTT{PasswordFile: p, PasswordEnv: "BREATHD_TEST_PW"}, "", false},
		{MQTT{PasswordEnv: "BREATHD_TEST_UNSET_VARIABLE"}, "", false},
		{MQTT{}, "", true},
	} {
		got, err := c.m.Password()
		if got != c.want || (err == nil) != c.ok {
			t.Errorf("%+v: %q, %v", c.m, got, err)
		}
	}
	if _, err := (&MQTT{PasswordFile: p + ".absent"}).Password(); !errors.Is(err, fs.ErrNotExist) {
		t.Errorf("missing password file: %v", err)
	}
}
