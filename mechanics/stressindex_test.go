package mechanics

import (
	"math"
	"math/rand/v2"
	"testing"
)

func near(got, want, tol float64) bool { return math.Abs(got-want) <= tol }

// TestStressIndexOfKnownCurves: on a constant-flow inflation whose pressure
// follows a·t^b + c the stress index returns b (Ranieri et al.,
// Anesthesiology 2000;93:1320 define it as that exponent).
func TestStressIndexOfKnownCurves(t *testing.T) {
	for _, want := range []float64{0.8, 1, 1.25} {
		s, _ := NewSegmenter(Config{}, 100)
		const n = 80
		for i := 0; i <= n; i++ {
			ti := float64(i) / 100
			s.t[i], s.flow[i] = ti, 40
			s.paw[i] = 15 + 12*math.Pow(ti, want)
		}
		got, r2, _ := s.stressIndex(1, n+1, 0)
		if !near(got, want, 0.002) || !near(r2, 1, 1e-9) {
			t.Errorf("stress index %.4f, want %.2f", got, want)
		}
	}
}

// TestMinimizeAgainstGrid: Brent's minimiser against a fine grid search
// on smooth functions with known minima (common practice, no source).
func TestMinimizeAgainstGrid(t *testing.T) {
	for _, m := range []float64{0.35, 0.9, 1.0, 1.27, 3.3, 4.9} {
		f := func(x float64) float64 { return math.Pow(x-m, 2) + 0.1*math.Pow(x-m, 4) }
		got, evals := minimize(f, 0.2, 5, 2e-3)
		if !near(got, m, 2e-3) || evals > 30 {
			t.Errorf("minimum %.4f: got %.4f in %d evaluations", m, got, evals)
		}
	}
}

// powerCurve is 48 points of 15 + 12·t^b over t in (0, 1] with noise σ 0.2
// cmH2O: the logarithms of t, the centred pressures and their sum of
// squares.
func powerCurve(rng *rand.Rand, b float64) (lt, py []float64, syy float64) {
	var my float64
	for k := 1; k <= 48; k++ {
		ti := float64(k) / 48
		lt = append(lt, math.Log(ti))
		p := 15 + 12*math.Pow(ti, b) + 0.2*rng.NormFloat64()
		py = append(py, p)
		my += p
	}
	for k := range py {
		py[k] -= my / 48
		syy += py[k] * py[k]
	}
	return lt, py, syy
}

// TestStressIndexNewtonAgainstBrent: the Newton steps from the previous
// breath's exponent reach the same minimum of the fit's residual as
// Brent's method over the whole range, on noisy curves a·t^b + c
// (σ 0.2 cmH2O; the minimum itself is Ranieri's definition, Anesthesiology
// 2000;93:1320; the agreement within Brent's tolerance, 0.002, is common
// practice, no source).
func TestStressIndexNewtonAgainstBrent(t *testing.T) {
	rng := rand.New(rand.NewPCG(3, 4))
	prev, fallbacks := math.NaN(), 0
	for i := range 500 {
		want := 0.6 + 0.9*rng.Float64()
		lt, py, syy := powerCurve(rng, want)
		f := siFit{lt: lt, xs: make([]float64, len(lt)), at: math.NaN(), lmax: -math.Log(1.0 / 48)}
		got, _, ok := f.newton(py, prev)
		ref := siBrent(lt, py, syy)
		if !ok {
			fallbacks++
			got = ref
		} else if !near(got, ref, 2e-3) {
			t.Fatalf("curve %d (b %.3f): Newton %.4f, Brent %.4f", i, want, got, ref)
		}
		prev = got
	}
	t.Logf("Brent's method needed for %d of 500 curves", fallbacks)
	if fallbacks > 25 {
		t.Errorf("Newton's method failed on %d of 500 curves", fallbacks)
	}
}

// TestStressIndexQualityFromNewton: the fit's R² and standard error from
// the moments Newton's last step leaves are those taken afresh from the
// points (the same sums; common practice, no source).
func TestStressIndexQualityFromNewton(t *testing.T) {
	rng := rand.New(rand.NewPCG(5, 6))
	for range 50 {
		lt, py, syy := powerCurve(rng, 0.7+0.7*rng.Float64())
		f := siFit{lt: lt, xs: make([]float64, len(lt)), at: math.NaN(), lmax: -math.Log(1.0 / 48)}
		if _, _, ok := f.newton(py, math.NaN()); !ok {
			continue
		}
		r2a, sea := siQuality(lt, f.xs, py, syy, &f.mom)
		r2b, seb := siQuality(lt, f.xs, py, syy, nil)
		if !near(r2a, r2b, 1e-9) || !near(sea, seb, 1e-9*seb) {
			t.Fatalf("from Newton R² %.12f se %.12f, afresh %.12f %.12f", r2a, sea, r2b, seb)
		}
	}
}
