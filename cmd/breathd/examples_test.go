package main

import (
	"fmt"
	"os"
	"os/exec"
	"strings"
	"syscall"
	"testing"
	"time"
)

// TestPythonSubscriberExample: configs/examples/breaths_to_pandas.py, run
// by Debian's python3 with pandas and paho-mqtt against a replay on the
// embedded broker, builds its DataFrame from the meta topic's dictionary
// with no numeric column left as objects. Skipped with a message when
// those are absent; required in CI (BREATHD_REQUIRE_PYTHON=1). The
// references are pandas and paho-mqtt themselves; common practice, no
// source.
func TestPythonSubscriberExample(t *testing.T) {
	t.Parallel() // processes of their own, on their own ports
	py := "/usr/bin/python3"
	if exec.Command(py, "-c", "import pandas, paho.mqtt.client").Run() != nil {
		if os.Getenv("BREATHD_REQUIRE_PYTHON") != "" {
			t.Fatal("python3-pandas and python3-paho-mqtt are required here (BREATHD_REQUIRE_PYTHON)")
		}
		t.Skip("python3 with pandas and paho-mqtt not installed (apt-get install python3-pandas python3-paho-mqtt)")
	}
	port := freePort(t)
	rep := breathd("replay", "--speed", "20", "--listen", fmt.Sprintf("127.0.0.1:%d", port), "testdata/demo.txt.gz")
	repOut := &syncBuffer{}
	rep.Stdout, rep.Stderr = repOut, repOut
	if err := rep.Start(); err != nil {
		t.Fatal(err)
	}
	defer func() { rep.Process.Signal(syscall.SIGTERM); rep.Wait() }()
	waitFor(t, "the embedded broker", 15*time.Second, func() bool { return strings.Contains(repOut.String(), "embedded MQTT broker started") })
	cmd := exec.Command(py, "configs/examples/breaths_to_pandas.py", "--port", fmt.Sprint(port), "--device", "demo", "--count", "15", "--timeout", "60")
	cmd.Dir = root
	out, err := cmd.CombinedOutput()
	if err != nil || !strings.Contains(string(out), "15 breaths of demo") || !strings.Contains(string(out), "0 numeric columns left as objects") ||
		!strings.Contains(string(out), "mL/cm[H2O]") {
		t.Fatalf("the example: %v\n%s", err, out)
	}
	t.Logf("%s", out)
}
