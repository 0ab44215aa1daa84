package web

import (
	"errors"
	"net/http"
	"os"
	"path/filepath"
	"testing"

	"breathd/stream"

	"github.com/rs/zerolog"
)

// TestListenerAccess: beyond loopback the listener needs a password file
// and TLS; with a password file every request needs basic authentication
// (RFC 7617). Common practice, no source.
func TestListenerAccess(t *testing.T) {
	for _, addr := range []string{"0.0.0.0:0", "[::]:0"} {
		if _, err := Start(Config{Listen: addr}, zerolog.Nop()); !errors.Is(err, ErrOpen) {
			t.Errorf("%s: %v, want ErrOpen", addr, err)
		}
	}
	pw := filepath.Join(t.TempDir(), "users")
	os.WriteFile(pw, []byte("monitor:s3cret-enough\n"), 0o600)
	s, err := Start(Config{Listen: "127.0.0.1:0", PasswordFile: pw}, zerolog.Nop())
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	s.Add(&Device{ID: "bed1", Status: func() stream.Status { return stream.Status{} }})
	for _, c := range []struct {
		user, pass string
		want       int
	}{{"", "", 401}, {"monitor", "wrong", 401}, {"monitor", "s3cret-enough", 200}} {
		req, _ := http.NewRequest("GET", "http://"+s.Addr()+"/metrics", nil)
		if c.user != "" {
			req.SetBasicAuth(c.user, c.pass)
		}
		resp, err := http.DefaultClient.Do(req)
		if err != nil {
			t.Fatal(err)
		}
		resp.Body.Close()
		if resp.StatusCode != c.want {
			t.Errorf("%q/%q: %d, want %d", c.user, c.pass, resp.StatusCode, c.want)
		}
	}
}
