package broker

import (
	"errors"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/rs/zerolog"
)

// TestRefusesOpenNonLoopback: no open broker beyond loopback, and a taken
// port says which broker to use instead. Common practice, no source.
func TestRefusesOpenNonLoopback(t *testing.T) {
	for _, addr := range []string{"0.0.0.0:0", "[::]:0", ":0"} {
		_, err := Start(Config{Listen: addr}, zerolog.Nop())
		if err == nil || !strings.Contains(err.Error(), "refusing to start an open MQTT broker") {
			t.Errorf("%s: %v", addr, err)
		}
	}
	b, err := Start(Config{Listen: "127.0.0.1:0"}, zerolog.Nop())
	if err != nil {
		t.Fatal(err)
	}
	defer b.Close()
	_, err = Start(Config{Listen: b.Addr()}, zerolog.Nop())
	if !errors.Is(err, ErrPortBusy) || !strings.Contains(err.Error(), "use that one with --broker mqtt://"+b.Addr()) {
		t.Errorf("busy port: %v", err)
	}
	if _, err := Start(Config{Listen: "no-port"}, zerolog.Nop()); err == nil || !strings.Contains(err.Error(), "want host:port") {
		t.Errorf("bad address: %v", err)
	}
}

// TestPasswordFileErrors: every malformed password file is refused at
// start with its path and line; a missing one keeps fs.ErrNotExist.
func TestPasswordFileErrors(t *testing.T) {
	dir := t.TempDir()
	for name, c := range map[string]struct{ text, want string }{
		"empty password": {"# boards\nboard1:\n", "passwd:2: want user:password"},
		"no colon":       {"board1\n", "passwd:1: want user:password"},
		"no user":        {":secret\n", "passwd:1: want user:password"},
		"no users":       {"# nobody\n\n", "has no users"},
	} {
		path := filepath.Join(dir, "passwd")
		os.WriteFile(path, []byte(c.text), 0o600)
		_, err := Start(Config{Listen: "127.0.0.1:0", PasswordFile: path}, zerolog.Nop())
		if err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%s: %v", name, err)
		}
	}
	_, err := Start(Config{Listen: "127.0.0.1:0", PasswordFile: filepath.Join(dir, "absent")}, zerolog.Nop())
	if !errors.Is(err, os.ErrNotExist) {
		t.Errorf("missing file: %v", err)
	}
	users, err := readPasswordFile(writeFile(t, dir, "board1:correct-horse\n# c\n  board2:x:y  \n"))
	if err != nil || len(users) != 2 || string(users["board2"].Password) != "x:y" {
		t.Errorf("users %v, %v", users, err)
	}
}

func writeFile(t *testing.T, dir, text string) string {
	t.Helper()
	path := filepath.Join(dir, "ok")
	if err := os.WriteFile(path, []byte(text), 0o600); err != nil {
		t.Fatal(err)
	}
	return path
}

// TestClientAddress: a broker listening on every address is reached on
// loopback; an IPv6 address is written in brackets. RFC 3986 for the
// brackets.
func TestClientAddress(t *testing.T) {
	pw := writeFile(t, t.TempDir(), "board1:correct-horse\n")
	b, err := Start(Config{Listen: "0.0.0.0:0", PasswordFile: pw}, zerolog.Nop())
	if err != nil {
		t.Fatal(err)
	}
	defer b.Close()
	if !strings.HasPrefix(b.URL(), "mqtt://127.0.0.1:") {
		t.Errorf("wildcard listener: URL %s (listening on %s)", b.URL(), b.Addr())
	}
	b6, err := Start(Config{Listen: "[::1]:0"}, zerolog.Nop())
	if err != nil {
		t.Skipf("no IPv6 loopback: %v", err)
	}
	defer b6.Close()
	if !strings.HasPrefix(b6.URL(), "mqtt://[::1]:") {
		t.Errorf("IPv6 listener: URL %s", b6.URL())
	}
}
