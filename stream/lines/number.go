package lines

import (
	"errors"
	"math"
	"strconv"
	"unsafe"
)

// exact powers of ten representable in a float64.
var pow10 = [...]float64{1e0, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10,
	1e11, 1e12, 1e13, 1e14, 1e15, 1e16, 1e17, 1e18, 1e19, 1e20, 1e21, 1e22}

// numKind says what parseNumber found.
type numKind uint8

const (
	numOK        numKind = iota
	numSyntax            // not a number
	numNotFinite         // NaN, ±Inf, or out of float64 range
)

// parseNumber parses a decimal number the way strconv.ParseFloat(s, 64) does
// and returns bit-identical results. Plain decimals with at most 15
// significant digits and a small exponent — every number a ventilator
// prints — take a fast exact path: an integer mantissa below 2^53 and a
// power of ten up to 1e22 are both exact in a float64, so one IEEE multiply
// or divide rounds correctly (Clinger's fast path). Everything else goes to
// strconv.ParseFloat. It does not allocate.
func parseNumber(b []byte) (float64, numKind) {
	if v, ok := fastNumber(b); ok {
		return v, numOK
	}
	return slowNumber(b)
}

func fastNumber(b []byte) (float64, bool) {
	i, n := 0, len(b)
	if n == 0 {
		return 0, false
	}
	neg := false
	if b[0] == '-' || b[0] == '+' {
		neg = b[0] == '-'
		i++
	}
	var mant uint64
	digits, frac := 0, 0 // significant digits taken; digits after the point
	sawDigit := false
	for ; i < n && b[i] >= '0' && b[i] <= '9'; i++ {
		sawDigit = true
		if mant == 0 && b[i] == '0' {
			continue
		}
		mant = mant*10 + uint64(b[i]-'0')
		digits++
	}
	if i < n && b[i] == '.' {
		i++
		for ; i < n && b[i] >= '0' && b[i] <= '9'; i++ {
			sawDigit = true
			frac++
			if mant == 0 && b[i] == '0' {
				continue
			}
			mant = mant*10 + uint64(b[i]-'0')
			digits++
		}
	}
	if !sawDigit || digits > 15 {
		return 0, false
	}
	exp := -frac
	if i < n && (b[i] == 'e' || b[i] == 'E') {
		i++
		eneg := false
		if i < n && (b[i] == '-' || b[i] == '+') {
			eneg = b[i] == '-'
			i++
		}
		e, ed := 0, 0
		for ; i < n && b[i] >= '0' && b[i] <= '9'; i++ {
			if e < 1000 {
				e = e*10 + int(b[i]-'0')
			}
			ed++
		}
		if ed == 0 {
			return 0, false
		}
		if eneg {
			e = -e
		}
		exp += e
	}
	if i != n || exp < -22 || exp > 22 {
		return 0, false
	}
	v := float64(mant)
	if exp < 0 {
		v /= pow10[-exp]
	} else {
		v *= pow10[exp]
	}
	if neg {
		v = -v
	}
	return v, true
}

func slowNumber(b []byte) (float64, numKind) {
	if len(b) == 0 {
		return 0, numSyntax
	}
	// ParseFloat does not keep its argument (an error holds a copy), so
	// viewing the bytes as a string without copying is safe.
	v, err := strconv.ParseFloat(unsafe.String(&b[0], len(b)), 64)
	if err != nil {
		if errors.Is(err, strconv.ErrRange) {
			return v, numNotFinite
		}
		return 0, numSyntax
	}
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return v, numNotFinite
	}
	return v, numOK
}
