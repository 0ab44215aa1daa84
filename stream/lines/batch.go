package lines

import (
	"bytes"
	"math"
)

var nan = math.NaN()

// DecodeBatch decodes up to len(dst) samples into dst and returns how many
// it decoded, and the error, if any, that the line after them gave: a bad
// line (*LineError), io.EOF, or a format or read error, as Decode gives
// them. It returns early, with the samples so far, rather than read while
// it has samples to give (a live source's read blocks), and before a
// comment line, so that a clock directive can only come before the first
// of the samples of one call: they share one wall-clock anchor.
func (d *Decoder) DecodeBatch(dst []Sample) (int, error) {
	n := 0
	for n < len(dst) {
		if n += d.decodeFast(dst[n:]); n == len(dst) {
			break
		}
		if n > 0 && !d.DataLineBuffered() {
			break
		}
		if err := d.Decode(&dst[n]); err != nil {
			return n, err
		}
		n++
	}
	return n, nil
}

// DataLineBuffered reports whether the next line is buffered whole and is
// neither blank nor a comment: Decode and DecodeBatch then take it without
// reading, and no directive can come before it. A caller that decodes
// ahead ends its batch when this is false, so that one Clock holds for all
// of a batch's samples.
func (d *Decoder) DataLineBuffered() bool {
	b := d.buf[d.start:d.end]
	i := bytes.IndexByte(b, '\n')
	if i < 0 {
		return false
	}
	b = trimSpace(b[:i])
	return len(b) > 0 && b[0] != '#'
}

// batchWindow is the part of the buffer one line of the batch path may
// use: the batch runs while a whole window is buffered, so that no line
// can be cut by the buffer's end. A line whose fields go past lineRoom is
// left to the general path. Offsets into the window are masked with
// windowMask, which changes none of them but lets the compiler see that
// they are in bounds.
const (
	batchWindow = 128
	windowMask  = batchWindow - 1
	lineRoom    = batchWindow - 32
)

// decodeFast decodes plain data lines from the buffer, without reading,
// until dst is full, fewer than batchWindow bytes are buffered, or a line
// needs the general path. It takes only streams whose columns are all
// used and not separated by blanks (Decoder.plain), and only lines of
// numbers fastLine takes, each followed at once by the delimiter (the
// last by LF or CRLF); any other line, and any sample that is out of
// range, not later than the last one, after a gap, or the first one, is
// left to the general path. It gives the values and counts the general
// path gives: FuzzDecode compares the two.
func (d *Decoder) decodeFast(dst []Sample) int {
	if !d.plain || d.discarding || d.noFast || !d.haveLast || d.wallPending {
		return 0
	}
	buf, start := d.buf[:d.end], d.start
	last := len(buf) - batchWindow // the last start of a line taken here
	lastT, index := d.lastT, d.index
	var out [8]float64 // every column is set on every line
	n := 0
	for ; n < len(dst) && start <= last; n++ {
		q := d.plainLine((*[batchWindow]byte)(buf[start:start+batchWindow]), &out)
		if q == 0 {
			break
		}
		// as finish and checkTime, leaving to them any line they would
		// count as bad or mark as after a gap
		s := &dst[n]
		s.Paw, s.Flow = out[kindPaw]*d.scale[kindPaw], out[kindFlow]*d.scale[kindFlow]
		if s.Paw < PawMin || s.Paw > PawMax || s.Flow < -FlowMax || s.Flow > FlowMax {
			break
		}
		s.Vol = nan
		if d.hasVol {
			if s.Vol = out[kindVol] * d.scale[kindVol]; s.Vol < -VolMax || s.Vol > VolMax {
				break
			}
		}
		if d.hasT {
			s.T = out[kindT] * d.scale[kindT]
		} else {
			s.T = float64(index) / d.rateHz
		}
		if s.T <= lastT || s.T-lastT > d.gapLimit {
			break
		}
		s.Gap = false
		lastT = s.T
		index++
		start += int(q)
	}
	d.start, d.lastT, d.index = start, lastT, index
	if n > 0 {
		d.counts.Lines += int64(n)
		d.counts.Samples += int64(n)
		d.counts.LastT = lastT
		d.backRun = 0
	}
	return n
}

// plainLine parses the plain data line that starts w into out, by
// colKind, and returns its length with its terminator, or 0 when the line
// is not one decodeFast takes. The digits are taken one by one: their
// branch is predicted well, as a stream's numbers keep their lengths from
// line to line. The settings are read from d where they are used rather
// than held, so that the loops keep their few values in registers.
func (d *Decoder) plainLine(w *[batchWindow]byte, out *[8]float64) uint {
	q := uint(0) // unsigned, so that q < lineRoom proves w[q] in bounds
	for col := 0; ; col++ {
		neg := uint64(b2i(w[q&windowMask] == '-'))
		q += uint(neg)
		from := q
		var mant uint64
		q, mant = digitRun(w, q, 0)
		nd, frac := q-from, uint(0)
		if w[q&windowMask] == '.' {
			q++
			from = q
			q, mant = digitRun(w, q, mant)
			frac = q - from
			nd += frac
		}
		if nd-1 >= 15 || q >= lineRoom {
			return 0 // no digit, more than 15, or too long a line
		}
		v := float64(int64(mant)) / pow10[frac&15]
		out[d.plainKinds[col&7]&7] = math.Float64frombits(math.Float64bits(v) | neg<<63)
		c := w[q&windowMask]
		q++
		if col == d.ncols-1 {
			if c == '\r' {
				c = w[q&windowMask]
				q++
			}
			if c != '\n' {
				return 0
			}
			return q
		}
		if c != d.delim {
			return 0
		}
	}
}

// digitRun appends the decimal digits from w[q] to mant and returns the
// offset of the first byte that is not a digit (at most lineRoom).
func digitRun(w *[batchWindow]byte, q uint, mant uint64) (uint, uint64) {
	for q < lineRoom {
		dig := uint64(w[q]) - '0'
		if dig > 9 {
			break
		}
		mant = mant*10 + dig
		q++
	}
	return q, mant
}
