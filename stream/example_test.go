package stream_test

import (
	"context"
	"fmt"
	"time"

	"breathd/device"
	"breathd/mechanics"
	"breathd/mechanics/lungsim"
	"breathd/stream"
)

// printer is a Sink that prints the first three breaths.
type printer struct{}

func (printer) Breath(dev string, b *mechanics.Breath, _ *mechanics.Window) {
	if b.Seq > 3 {
		return
	}
	fmt.Printf("%s breath %d: vti %.0f mL, pplat %.1f, peep %.1f, dp %.1f cmH2O, cstat %.1f mL/cmH2O, fit_r %.1f cmH2O·s/L, flags [%v]\n",
		dev, b.Seq, b.VTi, b.PPlat, b.PEEP, b.DP, b.Cstat, b.FitR, b.Flags)
}

// One minute of a passive single-compartment lung (C 50 mL/cmH2O,
// R 10 cmH2O·s/L) on volume control with a pause, through the device
// loop. The analytic solution of the equation of motion gives the numbers:
// dp = VT/C = 500/50 = 10 cmH2O and cstat = C (49.9: the volume is
// integrated from 100 Hz samples). The stream starts inside an inflation,
// so the first breath starts at 4 s, and the one that starts at 56 s has
// no next inflation to end it: 13 breaths.
func ExampleRun() {
	sc := lungsim.Scenario{Seed: 1, RateHz: 100, Duration: time.Minute,
		Settings: lungsim.Settings{Mode: lungsim.ModeVC, R: 10, C: 50, PEEP: 5, RR: 15, VT: 500, Ti: 1, Pause: 0.3}}
	sc.Defaults()
	src := device.NewSim(sc, device.SimFormat{Header: true}, 0, nil)
	st, err := stream.Run(context.Background(), src, stream.Config{Device: "bed1", Sink: printer{}})
	if err != nil {
		fmt.Println(err)
		return
	}
	fmt.Printf("%d samples, %d breaths, %d bad lines\n", st.Counts.Samples, st.Breaths, st.Counts.BadTotal())
	// Output:
	// bed1 breath 1: vti 500 mL, pplat 15.0, peep 5.0, dp 10.0 cmH2O, cstat 49.9 mL/cmH2O, fit_r 9.9 cmH2O·s/L, flags []
	// bed1 breath 2: vti 500 mL, pplat 15.0, peep 5.0, dp 10.0 cmH2O, cstat 49.9 mL/cmH2O, fit_r 9.9 cmH2O·s/L, flags []
	// bed1 breath 3: vti 500 mL, pplat 15.0, peep 5.0, dp 10.0 cmH2O, cstat 49.9 mL/cmH2O, fit_r 9.9 cmH2O·s/L, flags []
	// 6000 samples, 13 breaths, 0 bad lines
}
