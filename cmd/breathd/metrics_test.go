package main

import (
	"bufio"
	"compress/gzip"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	dto "github.com/prometheus/client_model/go"
	"github.com/prometheus/common/expfmt"
	"github.com/prometheus/common/model"
)

// TestMetricsAndHealth: /metrics, scraped while a device idles after part
// of the demo and parsed with the Prometheus client's own text parser
// (github.com/prometheus/common/expfmt), carries the same counters as the
// status topic; /healthz goes 200 → 503 when the broker stops and back to
// 200 when it returns.
func TestMetricsAndHealth(t *testing.T) {
	t.Parallel() // a process of its own, on its own ports and files
	m := startMosquitto(t, "", nil)
	c := collect(t, m.url("mqtt"), "metrics-collector", nil, "", "")
	dir := t.TempDir()
	conf := filepath.Join(dir, "bed.yaml")
	os.WriteFile(conf, []byte(fmt.Sprintf("mqtt: {broker: %q, status_every: 1s}\ndevices:\n  - id: bed6\n    stdin: true\n", m.url("mqtt"))), 0o600)
	httpAddr := fmt.Sprintf("127.0.0.1:%d", freePort(t))
	cmd := breathd("run", "--config", conf, "--http", httpAddr)
	stdin, _ := cmd.StdinPipe()
	// held open to the end: the device then idles instead of ending (and
	// the pipe is not closed by its finalizer when the collector runs)
	defer stdin.Close()
	out := &syncBuffer{}
	cmd.Stdout, cmd.Stderr = out, out
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	defer func() {
		if t.Failed() {
			t.Logf("breathd said:\n%s", tail([]byte(out.String())))
		}
	}()
	defer func() { cmd.Process.Signal(syscall.SIGTERM); cmd.Wait() }()

	// the first 3000 lines of the demo (a header and 60 s), then nothing
	f, err := os.Open(filepath.Join(root, "testdata/demo.txt.gz"))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	zr, _ := gzip.NewReader(f)
	sc := bufio.NewScanner(zr)
	samples := 0
	for sc.Scan() && samples < 3000 {
		line := sc.Text()
		if line != "" && line[0] >= '0' && line[0] <= '9' || line != "" && line[0] == '-' {
			samples++
		}
		io.WriteString(stdin, line+"\n")
	}
	counters := func() map[string]any {
		_, _, st := c.snapshot()
		if len(st) == 0 {
			return nil
		}
		cs, _ := st[len(st)-1]["counters"].(map[string]any)
		return cs
	}
	waitFor(t, "the status to count every sample", 20*time.Second, func() bool {
		cs := counters()
		return cs != nil && cs["samples"] == float64(samples)
	})
	status := counters()

	resp, err := http.Get("http://" + httpAddr + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	parser := expfmt.NewTextParser(model.UTF8Validation)
	fams, err := parser.TextToMetricFamilies(resp.Body)
	resp.Body.Close()
	if err != nil {
		t.Fatalf("the Prometheus text parser: %v", err)
	}
	value := func(name string, labels ...string) float64 {
		fam, ok := fams[name]
		if !ok {
			t.Errorf("no %s", name)
			return -1
		}
	next:
		for _, mt := range fam.Metric {
			for i := 0; i < len(labels); i += 2 {
				if labelValue(mt, labels[i]) != labels[i+1] {
					continue next
				}
			}
			if mt.Counter != nil {
				return mt.Counter.GetValue()
			}
			return mt.Gauge.GetValue()
		}
		t.Errorf("no %s%v", name, labels)
		return -1
	}
	bad := status["bad_lines"].(map[string]any)
	for _, c := range []struct {
		metric string
		labels []string
		want   any
	}{
		{"breathd_samples_total", []string{"device", "bed6"}, status["samples"]},
		{"breathd_breaths_total", []string{"device", "bed6"}, status["breaths"]},
		{"breathd_gaps_total", []string{"device", "bed6"}, status["gaps"]},
		{"breathd_records_dropped_total", []string{"device", "bed6"}, status["records_dropped"]},
		{"breathd_publish_queue_depth", []string{"device", "bed6"}, status["queue_depth"]},
		{"breathd_bad_lines_total", []string{"device", "bed6", "cause", "not_number"}, bad["not_number"]},
		{"breathd_bad_lines_total", []string{"device", "bed6", "cause", "field_count"}, bad["field_count"]},
		{"breathd_source_up", []string{"device", "bed6"}, 1.0},
		{"breathd_publisher_connected", []string{"device", "bed6"}, 1.0},
	} {
		if got := value(c.metric, c.labels...); got != c.want {
			t.Errorf("%s%v = %v, the status says %v", c.metric, c.labels, got, c.want)
		}
	}
	t.Logf("status and /metrics agree: samples %v, breaths %v, bad lines %v, gaps %v", status["samples"], status["breaths"], bad, status["gaps"])
	if status["breaths"].(float64) < 10 {
		t.Errorf("only %v breaths in 60 s of the demo", status["breaths"])
	}
	for _, name := range []string{"go_goroutines", "process_resident_memory_bytes"} {
		if _, ok := fams[name]; !ok {
			t.Errorf("no %s: the runtime and process collectors", name)
		}
	}

	health := func() (int, map[string]any) {
		resp, err := http.Get("http://" + httpAddr + "/healthz")
		if err != nil {
			return 0, nil
		}
		defer resp.Body.Close()
		var body map[string]any
		json.NewDecoder(resp.Body).Decode(&body)
		return resp.StatusCode, body
	}
	if code, body := health(); code != 200 || body["status"] != "ok" {
		t.Fatalf("/healthz %d %v", code, body)
	}
	m.stop()
	waitFor(t, "/healthz 503 with the broker stopped", 15*time.Second, func() bool {
		code, body := health()
		return code == 503 && strings.Contains(fmt.Sprint(body["reasons"]), "bed6: not connected to the MQTT broker")
	})
	m.start()
	waitFor(t, "/healthz 200 with the broker back", 30*time.Second, func() bool {
		code, _ := health()
		return code == 200
	})
}

func labelValue(m *dto.Metric, name string) string {
	for _, l := range m.Label {
		if l.GetName() == name {
			return l.GetValue()
		}
	}
	return ""
}
