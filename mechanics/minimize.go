package mechanics

import "math"

// minimize finds a minimum of f on [a, b] to within about tol by Brent's
// method (Brent, Algorithms for Minimization without Derivatives, 1973,
// ch. 5): parabolic steps where they behave, golden-section steps where
// they do not. It returns the point and the number of evaluations.
func minimize(f func(float64) float64, a, b, tol float64) (float64, int) {
	const c = 0.3819660112501051 // (3 − √5)/2
	x := a + c*(b-a)
	w, v := x, x
	fx := f(x)
	fw, fv := fx, fx
	evals := 1
	var d, e float64
	for evals < 100 {
		m := (a + b) / 2
		tol1 := 1e-10*math.Abs(x) + tol/3
		tol2 := 2 * tol1
		if math.Abs(x-m) <= tol2-(b-a)/2 {
			break
		}
		parabolic := false
		if math.Abs(e) > tol1 {
			r := (x - w) * (fx - fv)
			q := (x - v) * (fx - fw)
			p := (x-v)*q - (x-w)*r
			q = 2 * (q - r)
			if q > 0 {
				p = -p
			} else {
				q = -q
			}
			if math.Abs(p) < math.Abs(q*e/2) && p > q*(a-x) && p < q*(b-x) {
				e, d = d, p/q
				parabolic = true
				if u := x + d; u-a < tol2 || b-u < tol2 {
					d = math.Copysign(tol1, m-x)
				}
			}
		}
		if !parabolic {
			if x < m {
				e = b - x
			} else {
				e = a - x
			}
			d = c * e
		}
		u := x + d
		if math.Abs(d) < tol1 {
			u = x + math.Copysign(tol1, d)
		}
		fu := f(u)
		evals++
		if fu <= fx {
			if u < x {
				b = x
			} else {
				a = x
			}
			v, fv, w, fw, x, fx = w, fw, x, fx, u, fu
			continue
		}
		if u < x {
			a = u
		} else {
			b = u
		}
		if fu <= fw || w == x {
			v, fv, w, fw = w, fw, u, fu
		} else if fu <= fv || v == x || v == w {
			v, fv = u, fu
		}
	}
	return x, evals
}
