package lines_test

import (
	"errors"
	"fmt"
	"io"
	"strings"

	"breathd/stream/lines"
)

// A stream with a header in mbar and L/s, a comment, and one bad line:
// the decoder converts to cmH2O and L/min, counts the bad line by its
// cause and goes on. (1 mbar = 100 Pa and 1 cmH2O = 98.0665 Pa, the
// conventional definition: 5.0 mbar is 5.10 cmH2O.)
func ExampleDecoder() {
	in := "t;paw;flow\n" +
		"# breathd clock 2026-12-01T08:00:00Z\n" +
		"0.00;5.0;0.00\n" +
		"0.01;6.0;0.75\n" +
		"0.02;x;0.80\n" +
		"0.03;7.5;0.80\n"
	d, err := lines.NewDecoder(strings.NewReader(in), lines.Format{Units: map[string]string{"paw": "mbar", "flow": "L/s"}})
	if err != nil {
		fmt.Println(err)
		return
	}
	var s lines.Sample
	for {
		err := d.Decode(&s)
		var le *lines.LineError
		switch {
		case errors.As(err, &le):
			fmt.Printf("line %d skipped: %s\n", le.Line, le.Cause)
			continue
		case err == io.EOF:
			c := d.Counts()
			wall, _ := d.Wall(0.03)
			fmt.Printf("%d samples, %d bad, last at %s\n", c.Samples, c.BadTotal(), wall.Format("15:04:05.000"))
			return
		case err != nil:
			fmt.Println(err)
			return
		}
		fmt.Printf("t=%.2f s  paw=%.2f cmH2O  flow=%.1f L/min\n", s.T, s.Paw, s.Flow)
	}
	// Output:
	// t=0.00 s  paw=5.10 cmH2O  flow=0.0 L/min
	// t=0.01 s  paw=6.12 cmH2O  flow=45.0 L/min
	// line 5 skipped: not_number
	// t=0.03 s  paw=7.65 cmH2O  flow=48.0 L/min
	// 3 samples, 1 bad, last at 08:00:00.030
}
