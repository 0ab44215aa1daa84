// Package lines decodes the sample lines a ventilator prints (the input
// contract): one device's bytes become timed samples, bad lines are counted
// by cause and skipped, and the directives a breathd recording carries are
// applied. It uses the standard library only.
//
// # Sample lines
//
// A stream is a sequence of lines of ASCII text, each ended by LF or CRLF.
// Every line is one of:
//
//   - a comment: its first non-blank byte is '#'. Comments are skipped, except
//     the two directives a breathd recording writes (see below);
//   - a header: the first non-comment line whose fields are not all numbers
//     and name at least one known column. It names the columns. A line
//     before it that names none (noise on a port that was opened mid-stream)
//     is a bad line;
//   - a data line: one sample, one field per column.
//
// Fields are separated by ',' ';' a tab, or runs of spaces. With the default
// delimiter "auto" the first non-comment line that has more than one field
// decides, preferring ';' then ',' then tab then spaces (a lone number, as
// a port opened mid-line delivers, is a bad line); when five lines in a
// row then have the wrong number of fields, the next line decides again.
// Blank space around a field is ignored. When the delimiter is not a
// comma, a decimal comma is read as a decimal point ("5,25"). A UTF-8
// byte-order mark is skipped; UTF-16 text, images, PDF and ZIP files are
// refused with a word saying what they are.
//
// Column names (case does not matter):
//
//	t     time since an arbitrary origin      s (default) | ms
//	paw   airway pressure                     cmH2O (default) | mbar | hPa | kPa
//	flow  flow, positive into the patient     L/min (default) | L/s | mL/s
//	vol   volume, optional cross-check        mL (default) | L
//
// A header may also name them as devices and spreadsheets do — time,
// pressure, airway pressure, volume — and give a unit in brackets or as a
// suffix: "Time [s]", "Paw (mbar)", "Flow [L/s]", "time_ms",
// "pressure_cmH2O", "flow_lpm". Such a unit is used unless one was given
// (--unit, a format directive). Other column names are ignored, whatever
// their number. Without a header the configured column
// order is used; the default is t,paw,flow. Without a t column the rate
// (Format.RateHz) is required and the time of a data line is its index over
// the rate (bad data lines keep their slot in time).
//
// Examples, all decoding to the same two samples:
//
//	t,paw,flow
//	0.00,5.1,0.0
//	0.01,5.9,42.5
//
//	# no header: default column order
//	0.00;5.1;0.0
//	0.01;5.9;42.5
//
//	Time [s];Paw [mbar];Flow [L/s]     (units from the header; decimal commas
//	0,00;5,0;0,00                       beside a semicolon)
//	0,01;5,8;0,71
//
// # Bad lines and gaps
//
// A data line is bad, counted by its Cause and skipped, when it is longer than
// MaxLineBytes, has the wrong number of fields, has a field that is not a
// number, has a NaN or infinite value, has a value outside the plausible range
// (paw −30…150 cmH2O, flow ±600 L/min, vol ±10 000 mL), or has a time that is
// not later than the previous good sample's. A bad line never ends the stream.
// A time step larger than Format.GapLimit (default 0.5 s) is a gap: the
// sample after it is marked Gap so that a breath in progress is dropped.
//
// # Recording directives
//
// A recording made by breathd carries two kinds of comment line of its own:
//
//	# breathd format columns=t,paw,flow delimiter=comma unit.paw=cmH2O flow_sign=1
//	# breathd clock 2026-12-01T08:00:00.000Z
//
// A format directive fills every setting the caller left unset, so that a
// recording replays with no flags. A clock directive gives the wall-clock
// time at which the next data line was received.
package lines
