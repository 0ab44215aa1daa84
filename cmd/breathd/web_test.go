package main

import (
	"bytes"
	"context"
	"encoding/base64"
	"encoding/json"
	"fmt"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/chromedp/cdproto/network"
	"github.com/chromedp/cdproto/runtime"
	"github.com/chromedp/chromedp"
	mqtt "github.com/eclipse/paho.mqtt.golang"
)

// TestBedsidePage: the page in a real browser (Debian's chromium, driven
// by chromedp; skipped with a message when absent, required in CI by
// BREATHD_REQUIRE_CHROMIUM=1) with four simulated devices: it loads with no
// console error, shows every device, its strip moves, a breath's values
// are on it within 2 s of the breath's MQTT record, a rule a scenario
// raises appears, and acknowledging works for a user with the ack grant
// and is refused without it. Common practice, no source. With -update it
// writes testdata/web.png.
func TestBedsidePage(t *testing.T) {
	browser, err := exec.LookPath("chromium")
	if err != nil {
		if os.Getenv("BREATHD_REQUIRE_CHROMIUM") != "" {
			t.Fatal("chromium is required here (BREATHD_REQUIRE_CHROMIUM) and is not installed")
		}
		t.Skip("chromium not installed: the page is not tried in a browser (apt-get install chromium)")
	}
	dir := t.TempDir()
	pw := filepath.Join(dir, "users")
	os.WriteFile(pw, []byte("ack nurse:a-long-secret-1\nviewer:a-long-secret-2\n"), 0o600)
	httpAddr := fmt.Sprintf("127.0.0.1:%d", freePort(t))
	mqttAddr := fmt.Sprintf("127.0.0.1:%d", freePort(t))
	conf := filepath.Join(dir, "ward.yaml")
	os.WriteFile(conf, []byte(fmt.Sprintf(`http: {listen: %q, password_file: %q}
devices:
  - id: bed1
    simulate: {scenario: configs/scenarios/steady-vc.yaml, speed: 1}
  - id: bed2
    simulate: {scenario: configs/scenarios/stiffening-lung.yaml, speed: 1}
    patient: {sex: male, height_cm: 175}
  - id: bed3
    simulate: {scenario: configs/scenarios/bronchospasm.yaml, speed: 40}
    rules: [{id: peak_plateau_gap_high, latching: true}]
  - id: bed4
    simulate: {scenario: configs/scenarios/asynchrony.yaml, speed: 10}
`, httpAddr, pw)), 0o600)
	run := breathd("run", "--config", conf, "--listen", mqttAddr)
	out := &syncBuffer{}
	run.Stdout, run.Stderr = out, out
	if err := run.Start(); err != nil {
		t.Fatal(err)
	}
	defer func() { run.Process.Signal(syscall.SIGTERM); run.Wait() }()
	defer func() {
		if t.Failed() {
			t.Logf("breathd said:\n%s", tail([]byte(out.String())))
		}
	}()
	waitFor(t, "the HTTP listener", 15*time.Second, func() bool { return strings.Contains(out.String(), "HTTP listener started") })

	// bed1's breath records, as they arrive
	var mu sync.Mutex
	arrived := map[float64]time.Time{}
	sub := mqtt.NewClient(mqtt.NewClientOptions().AddBroker("tcp://" + mqttAddr).SetClientID("page-test"))
	if tok := sub.Connect(); !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		t.Fatal("mqtt", tok.Error())
	}
	defer sub.Disconnect(0)
	sub.Subscribe("breathd/bed1/breath", 0, func(_ mqtt.Client, m mqtt.Message) {
		var b struct{ Seq float64 }
		json.Unmarshal(m.Payload(), &b)
		mu.Lock()
		arrived[b.Seq] = time.Now()
		mu.Unlock()
	}).Wait()

	ctx, cancel := context.WithTimeout(context.Background(), 90*time.Second)
	defer cancel()
	actx, cancelA := chromedp.NewExecAllocator(ctx, append(chromedp.DefaultExecAllocatorOptions[:],
		chromedp.ExecPath(browser), chromedp.NoSandbox, chromedp.WindowSize(1280, 1500))...)
	defer cancelA()
	bctx, cancelB := chromedp.NewContext(actx)
	defer cancelB()
	var problems []string
	var pmu sync.Mutex
	chromedp.Listen(bctx, func(ev any) {
		pmu.Lock()
		defer pmu.Unlock()
		switch e := ev.(type) {
		case *runtime.EventExceptionThrown:
			problems = append(problems, "exception: "+e.ExceptionDetails.Text)
		case *runtime.EventConsoleAPICalled:
			if e.Type == runtime.ConsoleAPICalledTypeError || e.Type == runtime.ConsoleAPICalledTypeWarning {
				var args []string
				for _, a := range e.Args {
					args = append(args, string(a.Value)+a.Description)
				}
				problems = append(problems, "console "+string(e.Type)+": "+strings.Join(args, " "))
			}
		}
	})
	auth := func(user, pass string) string {
		return "Basic " + base64.StdEncoding.EncodeToString([]byte(user+":"+pass))
	}
	if _, err := chromedp.Call(bctx, network.Enable, network.EnableParams{}); err != nil {
		t.Fatal(err)
	}
	if _, err := chromedp.Call(bctx, network.SetExtraHTTPHeaders,
		network.SetExtraHTTPHeadersParams{Headers: network.Headers{"Authorization": auth("nurse", "a-long-secret-1")}}); err != nil {
		t.Fatal(err)
	}
	if err := chromedp.Do(bctx, chromedp.Navigate("http://"+httpAddr+"/")); err != nil {
		t.Fatal(err)
	}
	for _, dev := range []string{"bed1", "bed2", "bed3", "bed4"} {
		if err := chromedp.Do(bctx, chromedp.WaitVisible(chromedp.CSS(`section[data-device="`+dev+`"] .values div`))); err != nil {
			t.Fatalf("%s on the page: %v", dev, err)
		}
	}
	// the strip moves
	strip := chromedp.CSS(`section[data-device="bed1"] .strip`)
	a, _ := chromedp.Run(bctx, chromedp.Screenshot(strip))
	time.Sleep(1500 * time.Millisecond)
	b, _ := chromedp.Run(bctx, chromedp.Screenshot(strip))
	if len(a) == 0 || bytes.Equal(a, b) {
		t.Error("the strip did not move in 1.5 s")
	}
	// a breath's values within 2 s of its record: the first breath of bed1
	// whose MQTT record arrives from now on
	mu.Lock()
	next := float64(len(arrived)) + 1
	for k := range arrived {
		next = max(next, k+1)
	}
	mu.Unlock()
	waitFor(t, fmt.Sprintf("bed1's breath %v on MQTT", next), 20*time.Second, func() bool {
		mu.Lock()
		defer mu.Unlock()
		_, ok := arrived[next]
		return ok
	})
	for {
		seq, _ := chromedp.Run(bctx, chromedp.Evaluate[string](`document.querySelector('section[data-device="bed1"] .values').dataset.seq || "0"`))
		var shown float64
		fmt.Sscan(seq, &shown)
		mu.Lock()
		lag := time.Since(arrived[next])
		mu.Unlock()
		if shown >= next {
			t.Logf("breath %v on the page %v after its MQTT record", next, lag.Round(time.Millisecond))
			break
		}
		if lag > 2*time.Second {
			t.Fatalf("breath %v not on the page %v after its MQTT record (the page shows %v)", next, lag, shown)
		}
		time.Sleep(50 * time.Millisecond)
	}
	// the asynchrony index of bed4 (the simulator's mixed asynchrony
	// scenario), once its window holds 10 breaths
	waitFor(t, "bed4's asynchrony index on the page", 40*time.Second, func() bool {
		text, _ := chromedp.Run(bctx, chromedp.Text(chromedp.CSS(`section[data-device="bed4"] p.asynchrony`)))
		return strings.Contains(text, "Asynchrony index") && strings.Contains(text, "% over the last")
	})
	// the raised rule, and its acknowledgement
	rule := `section[data-device="bed3"] ul.active`
	waitFor(t, "bed3's raised rule on the page", 40*time.Second, func() bool {
		text, _ := chromedp.Run(bctx, chromedp.Text(chromedp.CSS(rule)))
		return strings.Contains(text, "peak_plateau_gap_high")
	})
	eventID, _ := chromedp.Run(bctx, chromedp.Evaluate[string](`devices.get("bed3").active.find(a => a.rule === "peak_plateau_gap_high").event_id`))
	req, _ := http.NewRequest("POST", "http://"+httpAddr+"/ack", strings.NewReader(`{"device":"bed3","id":"`+eventID+`"}`))
	req.Header.Set("Authorization", auth("viewer", "a-long-secret-2"))
	if resp, err := http.DefaultClient.Do(req); err != nil || resp.StatusCode != http.StatusForbidden {
		t.Errorf("a user without the ack grant: %v %v", resp.Status, err)
	}
	if err := chromedp.Do(bctx, chromedp.Click(chromedp.CSS(rule+" button"))); err != nil {
		t.Fatalf("the acknowledge button: %v", err)
	}
	waitFor(t, "the acknowledgement on the page", 10*time.Second, func() bool {
		text, _ := chromedp.Run(bctx, chromedp.Text(chromedp.CSS(rule)))
		return strings.Contains(text, "acknowledged")
	})
	if *update {
		chromedp.Run(bctx, chromedp.Evaluate[any](`window.scrollTo(0, 0)`))
		if png, err := chromedp.Run(bctx, chromedp.FullScreenshot(100)); err == nil { // 100: PNG
			os.WriteFile(filepath.Join(root, "testdata", "web.png"), png, 0o644)
		}
	}
	pmu.Lock()
	defer pmu.Unlock()
	if len(problems) > 0 {
		t.Errorf("the browser's console: %q", problems)
	}
}
