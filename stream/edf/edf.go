// Package edf writes and reads EDF+ files (European Data Format plus, the
// open format for biosignals that research archives and viewers read:
// Kemp et al., Electroencephalogr Clin Neurophysiol 1992;82:391 and Kemp &
// Olivan, Clin Neurophysiol 2003;114:1755). breathd writes continuous
// files ("EDF+C") of 1 s data records: its signals as 16-bit integers
// scaled from a physical range, and an "EDF Annotations" signal carrying
// timed notes (breath starts, rule transitions). No maintained Go library
// for the format was in reach; the reader here exists for the tests, and CI
// checks the files with an independent reader (python3-mne).
package edf

import (
	"bufio"
	"cmp"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"slices"
	"strconv"
	"strings"
	"time"
)

// Signal is one channel: its label, physical unit and the physical range
// that the 16-bit digital range −32768…32767 maps onto.
type Signal struct {
	Label, Unit, Prefilter string
	Min, Max               float64
}

// UnknownStart is the start a file states when the recording's wall-clock
// time is not known: the format needs a date, and this one cannot be taken
// for a real one.
var UnknownStart = time.Date(1985, 1, 1, 0, 0, 0, 0, time.UTC)

// Annotation is a note at an onset, s from the file's start.
type Annotation struct {
	Onset float64
	Text  string
}

const (
	digMin, digMax = -32768, 32767
	annLabel       = "EDF Annotations"
)

// Writer writes one EDF+ file. Samples come in order at a fixed rate;
// annotations are given up front (they are placed into the data record of
// their onset).
type Writer struct {
	f       *os.File
	w       *bufio.Writer
	sigs    []Signal
	rate    int // samples per signal per 1 s record
	ann     [][]Annotation
	pending []Annotation // Annotate's, written into the next records that have room
	annSize int          // bytes of the annotation signal per record
	cur     [][]int16
	n       int // samples in the current record
	records int
	start   time.Time
	hdr     []byte
}

// Create starts a file at path. start is the recording's wall-clock start
// (whole seconds are kept; the fraction becomes the first record's
// offset). anns are sorted by onset.
func Create(path string, start time.Time, patient, recording string, sigs []Signal, rate int, anns []Annotation) (*Writer, error) {
	return create(path, start, patient, recording, sigs, rate, anns, 64)
}

// CreateLive starts a file whose annotations come while it is written
// (Annotate): each data record holds up to annBytes of them, the rest go
// into the records after it. Its header says -1 data records until Close.
func CreateLive(path string, start time.Time, patient, recording string, sigs []Signal, rate, annBytes int) (*Writer, error) {
	return create(path, start, patient, recording, sigs, rate, nil, annBytes)
}

func create(path string, start time.Time, patient, recording string, sigs []Signal, rate int, anns []Annotation, annBytes int) (*Writer, error) {
	if rate <= 0 || rate > 10000 {
		return nil, fmt.Errorf("edf: a rate of %d samples per second", rate)
	}
	for _, s := range sigs {
		if !(s.Max > s.Min) {
			return nil, fmt.Errorf("edf: signal %s: physical range %g…%g", s.Label, s.Min, s.Max)
		}
	}
	f, err := os.OpenFile(path, os.O_RDWR|os.O_CREATE|os.O_TRUNC, 0o640) // like a raw recording: patient data
	if err != nil {
		return nil, err
	}
	wr := &Writer{f: f, w: bufio.NewWriterSize(f, 256<<10), sigs: sigs, rate: rate, start: start}
	slices.SortStableFunc(anns, func(a, b Annotation) int { return cmp.Compare(a.Onset, b.Onset) })
	// annotations by record, and the largest record's bytes
	for _, a := range anns {
		k := max(0, int(math.Floor(a.Onset)))
		for len(wr.ann) <= k {
			wr.ann = append(wr.ann, nil)
		}
		wr.ann[k] = append(wr.ann[k], a)
	}
	wr.annSize = annBytes
	for k, list := range wr.ann {
		wr.annSize = max(wr.annSize, len(recordTAL(k, list)))
	}
	wr.annSize = (wr.annSize + 1) &^ 1 // whole 16-bit samples
	wr.cur = make([][]int16, len(sigs))
	for i := range wr.cur {
		wr.cur[i] = make([]int16, rate)
	}
	wr.hdr = wr.header(patient, recording, -1)
	if _, err := wr.w.Write(wr.hdr); err != nil {
		f.Close()
		return nil, err
	}
	return wr, nil
}

// recordTAL is the annotation signal's bytes of record k: the time-keeping
// annotation (the record's onset) and the record's notes.
func recordTAL(k int, list []Annotation) []byte {
	b := []byte("+" + strconv.Itoa(k) + "\x14\x14\x00")
	for _, a := range list {
		b = appendTAL(b, a)
	}
	return b
}

// appendTAL appends one annotation as a time-stamped annotation list.
func appendTAL(b []byte, a Annotation) []byte {
	b = append(b, '+')
	b = strconv.AppendFloat(b, max(0, a.Onset), 'f', -1, 64)
	b = append(b, 0x14)
	b = append(b, strings.Map(func(r rune) rune {
		if r < 0x20 || r > 0x7e {
			return '_'
		}
		return r
	}, a.Text)...)
	return append(b, 0x14, 0)
}

// Annotate adds a note to be written into the next data record with room
// (its text cut to fit one record).
func (wr *Writer) Annotate(a Annotation) {
	if room := wr.annSize - 48; len(a.Text) > room {
		a.Text = a.Text[:max(0, room)]
	}
	wr.pending = append(wr.pending, a)
}

// Seconds is the time the samples written so far span, s.
func (wr *Writer) Seconds() float64 { return float64(wr.records) + float64(wr.n)/float64(wr.rate) }

func field(s string, n int) string {
	if len(s) > n {
		return s[:n]
	}
	return s + strings.Repeat(" ", n-len(s))
}

func num(v float64, n int) string {
	for prec := 6; prec >= 0; prec-- {
		s := strconv.FormatFloat(v, 'f', prec, 64)
		if strings.Contains(s, ".") {
			s = strings.TrimRight(strings.TrimRight(s, "0"), ".")
		}
		if len(s) <= n {
			return field(s, n)
		}
	}
	return field(strconv.FormatFloat(v, 'g', 3, 64), n)
}

var months = []string{"JAN", "FEB", "MAR", "APR", "MAY", "JUN", "JUL", "AUG", "SEP", "OCT", "NOV", "DEC"}

// header renders the fixed header and the signal headers.
func (wr *Writer) header(patient, recording string, records int) []byte {
	ns := len(wr.sigs) + 1
	st := wr.start.UTC()
	var b strings.Builder
	b.WriteString(field("0", 8))
	b.WriteString(field(patient, 80))
	b.WriteString(field(fmt.Sprintf("Startdate %02d-%s-%04d %s", st.Day(), months[st.Month()-1], st.Year(), recording), 80))
	b.WriteString(st.Format("02.01.06"))
	b.WriteString(st.Format("15.04.05"))
	b.WriteString(field(strconv.Itoa(256*(ns+1)), 8))
	b.WriteString(field("EDF+C", 44))
	b.WriteString(field(strconv.Itoa(records), 8))
	b.WriteString(field("1", 8))
	b.WriteString(field(strconv.Itoa(ns), 4))
	each := func(f func(i int) string) {
		for i := range ns {
			b.WriteString(f(i))
		}
	}
	sig := func(i int) (Signal, bool) {
		if i < len(wr.sigs) {
			return wr.sigs[i], true
		}
		return Signal{Label: annLabel, Min: -1, Max: 1}, false
	}
	each(func(i int) string { s, _ := sig(i); return field(s.Label, 16) })
	each(func(int) string { return field("", 80) })
	each(func(i int) string { s, _ := sig(i); return field(s.Unit, 8) })
	each(func(i int) string { s, _ := sig(i); return num(s.Min, 8) })
	each(func(i int) string { s, _ := sig(i); return num(s.Max, 8) })
	each(func(int) string { return field(strconv.Itoa(digMin), 8) })
	each(func(int) string { return field(strconv.Itoa(digMax), 8) })
	each(func(i int) string { s, _ := sig(i); return field(s.Prefilter, 80) })
	each(func(i int) string {
		if _, ok := sig(i); ok {
			return field(strconv.Itoa(wr.rate), 8)
		}
		return field(strconv.Itoa(wr.annSize/2), 8)
	})
	each(func(int) string { return field("", 32) })
	return []byte(b.String())
}

// Add appends one sample of every signal, in physical units; a value out
// of its range is clipped, NaN is written as 0.
func (wr *Writer) Add(values ...float64) error {
	for i, s := range wr.sigs {
		v := 0.0
		if i < len(values) && !math.IsNaN(values[i]) {
			v = values[i]
		}
		d := math.Round((v-s.Min)/(s.Max-s.Min)*(digMax-digMin) + digMin)
		wr.cur[i][wr.n] = int16(max(digMin, min(digMax, d)))
	}
	wr.n++
	if wr.n == wr.rate {
		return wr.flush()
	}
	return nil
}

func (wr *Writer) flush() error {
	var buf [2]byte
	for i := range wr.sigs {
		for _, d := range wr.cur[i][:wr.n] {
			buf[0], buf[1] = byte(uint16(d)), byte(uint16(d)>>8)
			wr.w.Write(buf[:])
		}
		for range wr.rate - wr.n { // a short last record is padded
			wr.w.Write([]byte{0, 0})
		}
	}
	var list []Annotation
	if wr.records < len(wr.ann) {
		list = wr.ann[wr.records]
	}
	tal := recordTAL(wr.records, list)
	for len(wr.pending) > 0 {
		next := appendTAL(nil, wr.pending[0])
		if len(tal)+len(next) > wr.annSize {
			break
		}
		tal = append(tal, next...)
		wr.pending = wr.pending[1:]
	}
	wr.w.Write(tal)
	_, err := wr.w.Write(make([]byte, wr.annSize-len(tal)))
	wr.records++
	wr.n = 0
	return err
}

// Close writes the last record (padded) and the number of records, and
// closes the file. Annotations past the last sample get records of their
// own.
func (wr *Writer) Close() error {
	if wr.n > 0 {
		wr.flush()
	}
	for wr.records < len(wr.ann) || len(wr.pending) > 0 {
		wr.flush()
	}
	err := wr.w.Flush()
	if err == nil {
		_, err = wr.f.WriteAt([]byte(field(strconv.Itoa(wr.records), 8)), 236)
	}
	return errors.Join(err, wr.f.Close())
}

// File is an EDF+ file as read back: its start, signals with their
// physical samples, and annotations (the time-keeping ones left out).
type File struct {
	Start       time.Time
	Records     int
	Signals     []Signal
	Rates       []int
	Samples     [][]float64
	Annotations []Annotation
}

// Read reads an EDF+ file written by Writer (or any EDF+ with 16-bit
// samples).
func Read(r io.Reader) (*File, error) {
	br := bufio.NewReader(r)
	fixed := make([]byte, 256)
	if _, err := io.ReadFull(br, fixed); err != nil {
		return nil, fmt.Errorf("edf: header: %w", err)
	}
	get := func(b []byte, off, n int) string { return strings.TrimSpace(string(b[off : off+n])) }
	start, err := time.Parse("02.01.06 15.04.05", get(fixed, 168, 8)+" "+get(fixed, 176, 8))
	if err != nil {
		return nil, fmt.Errorf("edf: start: %w", err)
	}
	f := &File{Start: start}
	f.Records, _ = strconv.Atoi(get(fixed, 236, 8))
	if f.Records < 0 {
		return nil, fmt.Errorf("edf: %d data records", f.Records)
	}
	ns, _ := strconv.Atoi(get(fixed, 252, 4))
	if ns <= 0 || ns > 512 {
		return nil, fmt.Errorf("edf: %d signals", ns)
	}
	sh := make([]byte, 256*ns)
	if _, err := io.ReadFull(br, sh); err != nil {
		return nil, fmt.Errorf("edf: signal headers: %w", err)
	}
	col := func(off, n, i int) string { return get(sh, off*ns+n*i, n) }
	type sigHdr struct {
		Signal
		dmin, dmax float64
		n          int
	}
	hs := make([]sigHdr, ns)
	for i := range ns {
		h := &hs[i]
		h.Label = col(0, 16, i)
		h.Unit = get(sh, 96*ns+8*i, 8)
		h.Min, _ = strconv.ParseFloat(get(sh, 104*ns+8*i, 8), 64)
		h.Max, _ = strconv.ParseFloat(get(sh, 112*ns+8*i, 8), 64)
		h.dmin, _ = strconv.ParseFloat(get(sh, 120*ns+8*i, 8), 64)
		h.dmax, _ = strconv.ParseFloat(get(sh, 128*ns+8*i, 8), 64)
		h.Prefilter = get(sh, 136*ns+80*i, 80)
		h.n, _ = strconv.Atoi(get(sh, 216*ns+8*i, 8))
		if h.n < 0 || h.n > 1<<20 {
			return nil, fmt.Errorf("edf: signal %d: %d samples per record", i, h.n)
		}
		if h.Label != annLabel {
			f.Signals = append(f.Signals, h.Signal)
			f.Rates = append(f.Rates, h.n)
		}
	}
	per := 0
	for _, h := range hs {
		per += h.n
	}
	if per == 0 && f.Records > 0 {
		return nil, errors.New("edf: data records of no samples")
	}
	f.Samples = make([][]float64, len(f.Signals))
	buf := make([]byte, 0, 1024)
	for range f.Records {
		k := 0
		for _, h := range hs {
			buf = slices.Grow(buf[:0], 2*h.n)[:2*h.n]
			if _, err := io.ReadFull(br, buf); err != nil {
				return nil, fmt.Errorf("edf: data record: %w", err)
			}
			if h.Label == annLabel {
				f.Annotations = append(f.Annotations, parseTAL(buf)...)
				continue
			}
			for j := range h.n {
				d := float64(int16(uint16(buf[2*j]) | uint16(buf[2*j+1])<<8))
				f.Samples[k] = append(f.Samples[k], h.Min+(d-h.dmin)/(h.dmax-h.dmin)*(h.Max-h.Min))
			}
			k++
		}
	}
	return f, nil
}

// parseTAL reads the notes of one record's annotation signal.
func parseTAL(b []byte) []Annotation {
	var out []Annotation
	for _, tal := range strings.Split(string(b), "\x00") {
		parts := strings.Split(tal, "\x14")
		if len(parts) < 2 {
			continue
		}
		onset, err := strconv.ParseFloat(strings.TrimPrefix(parts[0], "+"), 64)
		if err != nil {
			continue
		}
		for _, text := range parts[1:] {
			if text != "" {
				out = append(out, Annotation{Onset: onset, Text: text})
			}
		}
	}
	return out
}
