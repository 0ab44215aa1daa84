package stream

import (
	"bytes"
	"context"
	"io"
	"strings"
	"testing"

	"github.com/rs/zerolog"
)

// TestRepeatedWarningsThrottled: a thousand unusable header lines give one
// warning line, not a thousand; the count is kept. (Issue 16, item 2.)
func TestRepeatedWarningsThrottled(t *testing.T) {
	var log bytes.Buffer
	in := strings.Repeat("t,pressure,volume\n", 1000) + "0.00,5.0,0.0\n0.01,5.1,1.0\n"
	st, err := Run(context.Background(), io.NopCloser(strings.NewReader(in)), Config{Device: "hdr", Log: zerolog.New(&log)})
	if err != nil {
		t.Fatal(err)
	}
	warns := strings.Count(log.String(), `"level":"warn"`)
	if warns > 2 || warns == 0 {
		t.Errorf("%d warning lines for 1000 bad headers", warns)
	}
	if st.Counts.BadTotal() != 1000 || st.Counts.Samples != 2 {
		t.Errorf("bad %v, samples %d", st.Counts.Bad, st.Counts.Samples)
	}
}
