// Package plot draws a recording for analyze --plot: a strip of pressure,
// flow and volume with each breath's marks, and the trends of compliance,
// resistance, driving pressure and mechanical power with the rules
// raised, as PNG or SVG (gonum/plot).
package plot

import (
	"errors"
	"fmt"
	"image/color"
	"io"
	"math"
	"os"
	"path/filepath"
	"strings"

	"breathd/alerts"
	"breathd/device"
	"breathd/mechanics"
	"breathd/stream/lines"

	gonum "gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgimg"
	"gonum.org/v1/plot/vg/vgsvg"
)

// Our colours: muted, told apart by lightness as well as hue.
var (
	colPressure = color.RGBA{R: 0x1f, G: 0x4e, B: 0x79, A: 0xff} // deep blue
	colFlow     = color.RGBA{R: 0x2e, G: 0x7d, B: 0x32, A: 0xff} // green
	colVolume   = color.RGBA{R: 0x6a, G: 0x4c, B: 0x93, A: 0xff} // violet
	colMark     = color.RGBA{R: 0xc0, G: 0x6c, B: 0x00, A: 0xff} // amber
	colGrid     = color.RGBA{R: 0xdd, G: 0xdd, B: 0xdd, A: 0xff}
	colLevel    = map[alerts.Level]color.Color{
		alerts.LevelNotice:  color.RGBA{R: 0x88, G: 0x88, B: 0x88, A: 0xff},
		alerts.LevelWarning: color.RGBA{R: 0xd0, G: 0x8c, B: 0x00, A: 0xff},
		alerts.LevelUrgent:  color.RGBA{R: 0xb0, G: 0x1e, B: 0x1e, A: 0xff},
	}
)

// Data collects what the picture needs while the recording is analysed:
// it is a sink of the device loop.
type Data struct {
	breaths []mechanics.Breath
	events  []alerts.Event
}

// Breath keeps a copy of the breath.
func (p *Data) Breath(_ string, b *mechanics.Breath, _ *mechanics.Window) {
	p.breaths = append(p.breaths, *b)
}

// Event keeps a copy of the event.
func (p *Data) Event(ev *alerts.Event, _ []alerts.Active) { p.events = append(p.events, *ev) }

// ErrKind is returned for a picture that is not .png or .svg.
var ErrKind = errors.New("the picture is .png or .svg")

// MaxSpan is the longest strip, s.
const MaxSpan = 3600

// Check validates the picture's name and the strip's length before any
// work is done.
func Check(out string, span float64) error {
	if ext := strings.ToLower(filepath.Ext(out)); ext != ".png" && ext != ".svg" {
		return fmt.Errorf("%s: %w", out, ErrKind)
	}
	if span <= 0 || span > MaxSpan {
		return fmt.Errorf("strip of %g s: want 0 < span ≤ %d s", span, MaxSpan)
	}
	return nil
}

// strip holds the samples of the chosen time range.
type strip struct {
	t, paw, flow, vol []float64
}

// readStrip decodes the samples in [from, from+span) of the recording
// again, integrating volume from each detected breath start.
func readStrip(path string, f lines.Format, from, span float64, breaths []mechanics.Breath) (*strip, error) {
	src, err := device.OpenFile(path, 0)
	if err != nil {
		return nil, err
	}
	defer src.Close()
	dec, err := lines.NewDecoder(src, f)
	if err != nil {
		return nil, err
	}
	st := &strip{}
	var s lines.Sample
	v, prevT, prevF := 0.0, math.NaN(), 0.0
	bi := 0
	for {
		err := dec.Decode(&s)
		if errors.Is(err, io.EOF) || (err == nil && s.T >= from+span) {
			break
		}
		var le *lines.LineError
		if errors.As(err, &le) {
			continue
		}
		if err != nil {
			return nil, err
		}
		for bi < len(breaths) && breaths[bi].TStart <= s.T {
			if math.Abs(breaths[bi].TStart-s.T) < 1e-9 {
				v = 0
			}
			bi++
		}
		if !math.IsNaN(prevT) {
			v += (prevF + s.Flow) / 2 / 60 * (s.T - prevT) * 1000
		}
		prevT, prevF = s.T, s.Flow
		if s.T < from {
			continue
		}
		st.t, st.paw, st.flow, st.vol = append(st.t, s.T), append(st.paw, s.Paw), append(st.flow, s.Flow), append(st.vol, v)
	}
	return st, nil
}

// peakTime is the time of the highest pressure sample in [a, b].
func (st *strip) peakTime(a, b float64) float64 {
	best, at := math.Inf(-1), a
	for i, t := range st.t {
		if t >= a && t <= b && st.paw[i] > best {
			best, at = st.paw[i], t
		}
	}
	return at
}

func xys(x, y []float64) plotter.XYs {
	pts := make(plotter.XYs, 0, len(x))
	for i := range x {
		if !math.IsNaN(y[i]) {
			pts = append(pts, plotter.XY{X: x[i], Y: y[i]})
		}
	}
	return pts
}

func newPanel(title, ylabel string) *gonum.Plot {
	p := gonum.New()
	p.Title.Text = title
	p.Title.TextStyle.Font.Size = vg.Points(10)
	p.Title.Padding = vg.Points(2)
	p.Y.Label.Text = ylabel
	p.X.Tick.Label.Font.Size = vg.Points(7)
	p.Y.Tick.Label.Font.Size = vg.Points(7)
	p.Y.Label.TextStyle.Font.Size = vg.Points(8)
	p.X.Label.TextStyle.Font.Size = vg.Points(8)
	g := plotter.NewGrid()
	g.Horizontal.Color, g.Vertical.Color = colGrid, colGrid
	p.Add(g)
	return p
}

func addLine(p *gonum.Plot, pts plotter.XYs, c color.Color, width vg.Length) {
	if len(pts) == 0 {
		return
	}
	l, _ := plotter.NewLine(pts)
	l.Color, l.Width = c, width
	p.Add(l)
}

func addMarks(p *gonum.Plot, pts plotter.XYs, c color.Color, shape draw.GlyphDrawer, label string) {
	if len(pts) == 0 {
		return
	}
	s, _ := plotter.NewScatter(pts)
	s.GlyphStyle.Color, s.GlyphStyle.Shape, s.GlyphStyle.Radius = c, shape, vg.Points(2.2)
	p.Add(s)
	p.Legend.Add(label, s)
}

// Write draws the strip [from, from+span) of the recording at path
// (decoded with f) above the trend panels, and writes out, a PNG or SVG by
// its extension.
func Write(out, path string, f lines.Format, from, span float64, d *Data) error {
	if err := Check(out, span); err != nil {
		return err
	}
	st, err := readStrip(path, f, from, span, d.breaths)
	if err != nil {
		return err
	}
	rows := append(stripPanels(st, from, span, d.breaths), trendPanels(d)...)
	return render(out, rows)
}

// stripPanels are pressure (with each breath's start, peak, plateau and
// PEEP marked), flow and volume over the strip.
func stripPanels(st *strip, from, span float64, breaths []mechanics.Breath) []*gonum.Plot {
	pres := newPanel(fmt.Sprintf("Airway pressure, %.0f–%.0f s", from, from+span), "cmH2O")
	flow := newPanel("Flow (into the patient > 0)", "L/min")
	vol := newPanel("Volume since the breath's start", "mL")
	addLine(pres, xys(st.t, st.paw), colPressure, vg.Points(1))
	addLine(flow, xys(st.t, st.flow), colFlow, vg.Points(1))
	addLine(vol, xys(st.t, st.vol), colVolume, vg.Points(1))
	var starts, peaks, plats, peeps plotter.XYs
	for _, b := range breaths {
		if b.TStart < from || b.TStart >= from+span {
			continue
		}
		starts = append(starts, plotter.XY{X: b.TStart, Y: b.PEEP})
		peaks = append(peaks, plotter.XY{X: st.peakTime(b.TStart, b.TStart+b.Ti), Y: b.PPeak})
		if !math.IsNaN(b.PPlat) {
			plats = append(plats, plotter.XY{X: b.TStart + b.Ti - 0.05, Y: b.PPlat})
		}
		if b.TEnd < from+span {
			peeps = append(peeps, plotter.XY{X: b.TEnd - 0.1, Y: b.PEEP})
		}
	}
	for _, p := range []*gonum.Plot{pres, flow, vol} {
		p.X.Min, p.X.Max = from, from+span
	}
	addMarks(pres, starts, colMark, draw.TriangleGlyph{}, "start")
	addMarks(pres, peaks, colLevel[alerts.LevelUrgent], draw.CircleGlyph{}, "peak")
	addMarks(pres, plats, colFlow, draw.BoxGlyph{}, "plateau")
	addMarks(pres, peeps, colVolume, draw.CrossGlyph{}, "PEEP")
	pres.Legend.Top, pres.Legend.TextStyle.Font.Size = true, vg.Points(7)
	vol.X.Label.Text = "s"
	return []*gonum.Plot{pres, flow, vol}
}

// trendPanels are compliance (static, and fitted where reliable),
// resistance, driving pressure and mechanical power over the whole
// recording, with each raised rule marked.
func trendPanels(d *Data) []*gonum.Plot {
	trend := func(title, unit string, get func(b *mechanics.Breath) float64) *gonum.Plot {
		p := newPanel(title, unit)
		x := make([]float64, len(d.breaths))
		y := make([]float64, len(d.breaths))
		for i := range d.breaths {
			x[i], y[i] = d.breaths[i].TStart/60, get(&d.breaths[i])
		}
		addLine(p, xys(x, y), colPressure, vg.Points(0.8))
		return p
	}
	comp := trend("Compliance: static (line) and fitted (dots)", "mL/cmH2O", func(b *mechanics.Breath) float64 { return b.Cstat })
	fitC := make(plotter.XYs, 0)
	for _, b := range d.breaths {
		if !math.IsNaN(b.FitC) && b.Reliable() {
			fitC = append(fitC, plotter.XY{X: b.TStart / 60, Y: b.FitC})
		}
	}
	if len(fitC) > 0 {
		s, _ := plotter.NewScatter(fitC)
		s.GlyphStyle.Color, s.GlyphStyle.Shape, s.GlyphStyle.Radius = colFlow, draw.CircleGlyph{}, vg.Points(0.9)
		comp.Add(s)
	}
	res := trend("Resistance: fitted", "cmH2O·s/L", func(b *mechanics.Breath) float64 {
		if b.Reliable() {
			return b.FitR
		}
		return math.NaN()
	})
	dp := trend("Driving pressure", "cmH2O", func(b *mechanics.Breath) float64 { return b.DP })
	mp := trend("Mechanical power", "J/min", func(b *mechanics.Breath) float64 { return b.MP })
	mp.X.Label.Text = "minutes of recording; vertical marks: rule raised (colour by level)"
	rows := []*gonum.Plot{comp, res, dp, mp}
	for _, p := range rows {
		markEvents(p, d.events)
	}
	return rows
}

// render lays the panels out in one column and writes the picture.
func render(out string, rows []*gonum.Plot) error {
	const width, height = 7.5 * vg.Inch, 12 * vg.Inch
	var canvas vg.CanvasWriterTo
	if strings.ToLower(filepath.Ext(out)) == ".svg" {
		canvas = vgsvg.New(width, height)
	} else {
		canvas = vgimg.PngCanvas{Canvas: vgimg.NewWith(vgimg.UseWH(width, height), vgimg.UseDPI(90))}
	}
	dc := draw.New(canvas)
	grid := make([][]*gonum.Plot, len(rows))
	for i, p := range rows {
		grid[i] = []*gonum.Plot{p}
	}
	tiles := draw.Tiles{Rows: len(rows), Cols: 1, PadX: vg.Millimeter, PadY: 3 * vg.Millimeter,
		PadTop: 4 * vg.Millimeter, PadBottom: 2 * vg.Millimeter, PadLeft: 2 * vg.Millimeter, PadRight: 4 * vg.Millimeter}
	for i, c := range gonum.Align(grid, tiles, dc) {
		rows[i].Draw(c[0])
	}
	file, err := os.Create(out)
	if err != nil {
		return err
	}
	if _, err := canvas.WriteTo(file); err != nil {
		file.Close()
		return err
	}
	return file.Close()
}

// markEvents draws a vertical mark at each raised event, coloured by its
// level, across the panel's data range.
func markEvents(p *gonum.Plot, events []alerts.Event) {
	lo, hi := p.Y.Min, p.Y.Max
	if lo >= hi {
		return
	}
	for _, ev := range events {
		if ev.Transition != alerts.Raised {
			continue
		}
		x := ev.T / 60
		l, _ := plotter.NewLine(plotter.XYs{{X: x, Y: lo}, {X: x, Y: hi}})
		l.Color, l.Width, l.Dashes = colLevel[ev.Level], vg.Points(0.8), []vg.Length{vg.Points(2), vg.Points(2)}
		p.Add(l)
	}
}
