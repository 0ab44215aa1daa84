package lines

import "bytes"

// fastLine decodes the next line in place when it is a plain data line:
// decimals of at most 15 digits without an exponent, separated by the
// delimiter, ended by LF or CRLF. It scans the line once, splitting and
// parsing together, and gives the values the general path gives: an
// integer mantissa below 10^15 and a power of ten up to 1e15 are exact in a
// float64, so one IEEE division rounds correctly, as in parseNumber's fast
// path. Anything else — a comment, a bad line, a number in another form, a
// line not yet complete in the buffer — returns ok false without consuming
// input, and the general path takes the line.
func (d *Decoder) fastLine(vals *[5]float64) bool {
	// Read more only when no complete line is waiting: on a live source
	// a read blocks, and a waiting line must not wait for the next one.
	if d.end-d.start < MaxLineBytes+2 && d.readErr == nil && bytes.IndexByte(d.buf[d.start:d.end], '\n') < 0 {
		d.fill()
	}
	b := d.buf[d.start:d.end]
	if len(b) > MaxLineBytes+2 {
		b = b[:MaxLineBytes+2]
	}
	p, n := 0, len(b)
	delim, kinds, ncols := d.delim, &d.kinds, d.ncols
	var out [5]float64
	for col := 0; col < ncols; col++ {
		if col > 0 {
			if p >= n {
				return false
			}
			if c := b[p]; delim == ' ' {
				if c != ' ' && c != '\t' {
					return false
				}
			} else if c != delim {
				return false
			} else {
				p++
			}
		}
		for p < n && (b[p] == ' ' || b[p] == '\t') {
			p++
		}
		k := kinds[col]
		if k == kindIgnore {
			for p < n && b[p] != delim && b[p] != '\n' && b[p] != '\r' && b[p] != ' ' && b[p] != '\t' {
				p++
			}
		} else {
			// the sign without a branch: flow's sign changes every breath,
			// and a mispredicted branch costs more than the arithmetic
			if p >= n {
				return false
			}
			c0 := b[p]
			neg := c0 == '-'
			p += b2i(neg || c0 == '+')
			var mant uint64
			nd, dot := 0, -1
			for p < n {
				c := b[p]
				if c-'0' <= 9 {
					mant = mant*10 + uint64(c-'0')
					nd++
				} else if c == '.' && dot < 0 {
					dot = nd
				} else {
					break
				}
				p++
			}
			if nd == 0 || nd > 15 || (p < n && (b[p] == 'e' || b[p] == 'E')) {
				return false
			}
			frac := 0
			if dot >= 0 {
				frac = nd - dot
			}
			v := float64(mant) / pow10[frac] * (1 - 2*float64(b2i(neg)))
			out[k] = v
		}
		if delim != ' ' {
			for p < n && (b[p] == ' ' || b[p] == '\t') {
				p++
			}
		}
	}
	for p < n && (b[p] == ' ' || b[p] == '\t') {
		p++
	}
	content := p // the line's length without CR
	if p < n && b[p] == '\r' {
		p++
	}
	if p >= n || b[p] != '\n' || content > MaxLineBytes {
		return false
	}
	d.start += p + 1
	*vals = out
	return true
}

// fill moves the unread bytes to the front of the buffer and reads once.
func (d *Decoder) fill() {
	if d.start > 0 {
		d.end = copy(d.buf, d.buf[d.start:d.end])
		d.start = 0
	}
	n, err := d.r.Read(d.buf[d.end:])
	d.end += n
	if err != nil {
		d.readErr = err
	}
}

// b2i is 1 for true; the compiler makes it a SETcc, not a branch.
func b2i(b bool) int {
	if b {
		return 1
	}
	return 0
}
