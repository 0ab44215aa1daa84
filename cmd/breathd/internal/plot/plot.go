// Package plot draws a recording for analyze --plot: a strip of pressure,
// flow and volume with each breath's marks, and the trends of compliance,
// resistance, driving pressure and mechanical power with the rules
// raised, as PNG or SVG (gonum/plot).
package plot

import (
	"errors"
	"fmt"
	"image/color"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"time"

	"breathd/alerts"
	"breathd/mechanics"
	"breathd/stream"
	"breathd/stream/lines"

	gonum "gonum.org/v1/plot"
	"gonum.org/v1/plot/font"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgimg"
	"gonum.org/v1/plot/vg/vgsvg"
)

// Our colours: muted, told apart by lightness as well as hue. Rule marks
// are one neutral grey whatever their level (the level is in words): a
// colour per level would read as an alarm system's priorities.
var (
	colPressure = color.RGBA{R: 0x1f, G: 0x4e, B: 0x79, A: 0xff} // deep blue
	colFlow     = color.RGBA{R: 0x2e, G: 0x7d, B: 0x32, A: 0xff} // green
	colVolume   = color.RGBA{R: 0x6a, G: 0x4c, B: 0x93, A: 0xff} // violet
	colMark     = color.RGBA{R: 0xc0, G: 0x6c, B: 0x00, A: 0xff} // amber
	colPeak     = color.RGBA{R: 0x9c, G: 0x27, B: 0x27, A: 0xff} // brick
	colGrid     = color.RGBA{R: 0xdd, G: 0xdd, B: 0xdd, A: 0xff}
	colRule     = color.RGBA{R: 0x55, G: 0x55, B: 0x55, A: 0xff}
)

// Data collects what the picture needs while the recording is analysed:
// it is a sink of the device loop. Device and File name the recording in
// the picture's title.
type Data struct {
	Device, File string
	breaths      []mechanics.Breath
	events       []alerts.Event
}

// Breath keeps a copy of the breath.
func (p *Data) Breath(_ string, b *mechanics.Breath, _ *mechanics.Window) {
	p.breaths = append(p.breaths, *b)
}

// Event keeps a copy of the event.
func (p *Data) Event(ev *alerts.Event, _ []alerts.Active) { p.events = append(p.events, *ev) }

// Breaths are the breaths collected, in order.
func (p *Data) Breaths() []mechanics.Breath { return p.breaths }

// Events are the events collected, in order.
func (p *Data) Events() []alerts.Event { return p.events }

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
// again, with the volume since each detected breath's start.
func readStrip(path string, f lines.Format, from, span float64, breaths []mechanics.Breath) (*strip, error) {
	st := &strip{}
	err := stream.Reread(path, f, breaths, func(s *lines.Sample, v float64) bool {
		if s.T >= from+span {
			return false
		}
		if s.T >= from {
			st.t, st.paw, st.flow, st.vol = append(st.t, s.T), append(st.paw, s.Paw), append(st.flow, s.Flow), append(st.vol, v)
		}
		return true
	})
	return st, err
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
	p.X.Tick.Marker, p.Y.Tick.Marker = roundTicks{}, roundTicks{}
	g := plotter.NewGrid()
	g.Horizontal.Color, g.Vertical.Color = colGrid, colGrid
	p.Add(g)
	return p
}

// roundTicks marks round values (1, 2 or 5 times a power of ten) and
// writes them with no more decimals than the step needs: 2.5, not 2.50.
type roundTicks struct{}

func (roundTicks) Ticks(lo, hi float64) []gonum.Tick {
	if !(hi > lo) || math.IsInf(hi-lo, 0) {
		return nil
	}
	raw := (hi - lo) / 6
	mag := math.Pow(10, math.Floor(math.Log10(raw)))
	step := mag
	for _, m := range []float64{2, 5, 10} {
		if raw > step {
			step = m * mag
		}
	}
	dec := max(0, -int(math.Floor(math.Log10(step)+1e-9)))
	var ticks []gonum.Tick
	for v := math.Ceil(lo/step) * step; v <= hi+step*1e-9; v += step {
		x := math.Round(v/step) * step
		if x == 0 {
			x = 0 // not -0
		}
		ticks = append(ticks, gonum.Tick{Value: x, Label: strconv.FormatFloat(x, 'f', dec, 64)})
		if m := x + step/2; m < hi {
			ticks = append(ticks, gonum.Tick{Value: m})
		}
	}
	return ticks
}

// minSpan widens the panel's y-range to at least span around its data, so
// that noise on a steady value looks like noise, not like a swing.
func minSpan(p *gonum.Plot, span float64) {
	if p.Y.Min > p.Y.Max || p.Y.Max-p.Y.Min >= span {
		return
	}
	mid := (p.Y.Min + p.Y.Max) / 2
	p.Y.Min, p.Y.Max = mid-span/2, mid+span/2
}

func addLine(p *gonum.Plot, pts plotter.XYs, c color.Color, width vg.Length) {
	if len(pts) == 0 {
		return
	}
	l, _ := plotter.NewLine(pts)
	l.Color, l.Width = c, width
	p.Add(l)
}

func addMarks(p *gonum.Plot, pts plotter.XYs, c color.Color, shape draw.GlyphDrawer, radius vg.Length, label string) {
	s, _ := plotter.NewScatter(append(plotter.XYs{}, pts...))
	s.GlyphStyle.Color, s.GlyphStyle.Shape, s.GlyphStyle.Radius = c, shape, radius
	if len(pts) > 0 {
		p.Add(s)
	}
	p.Legend.Add(label, s)
}

// ErrEmptyRange is returned when the strip's range holds no sample.
var ErrEmptyRange = errors.New("no samples in the strip's range")

// Write draws the strip [from, from+span) of the recording at path
// (decoded with f) above the trend panels, under a title naming the
// device, the file, its wall-clock start and the advisory notice, and
// writes out, a PNG or SVG by its extension.
func Write(out, path string, f lines.Format, from, span float64, d *Data) error {
	if err := Check(out, span); err != nil {
		return err
	}
	st, err := readStrip(path, f, from, span, d.breaths)
	if err != nil {
		return err
	}
	if len(st.t) == 0 {
		if n := len(d.breaths); n > 0 {
			return fmt.Errorf("%w %.0f–%.0f s: the breaths run from %.0f to %.0f s (--plot-from)", ErrEmptyRange, from, from+span, d.breaths[0].TStart, d.breaths[n-1].TEnd)
		}
		return fmt.Errorf("%w %.0f–%.0f s (--plot-from)", ErrEmptyRange, from, from+span)
	}
	rows := append(stripPanels(st, from, span, d.breaths), trendPanels(d)...)
	return render(out, d.title(), rows)
}

// title is the picture's heading: what, from where, when, and the notice.
func (d *Data) title() [2]string {
	what := "breathd analyze"
	if d.Device != "" {
		what += " · device " + d.Device
	}
	if d.File != "" {
		what += " · " + filepath.Base(d.File)
	}
	for _, b := range d.breaths {
		if !b.At.IsZero() {
			start := b.At.Add(-time.Duration(b.TStart * float64(time.Second))).UTC()
			return [2]string{what + " · started " + start.Format("2006-01-02 15:04:05") + " UTC", advisory}
		}
	}
	return [2]string{what + " · no wall-clock time in the recording", advisory}
}

const advisory = "Advisory research output, not a medical device and not for clinical decisions; local regulations and licensed clinicians decide its use."

// stripPanels are pressure (with each breath's peak, plateau and PEEP
// marked), flow (with each breath's start) and volume over the strip.
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
		starts = append(starts, plotter.XY{X: b.TStart, Y: 0})
		peaks = append(peaks, plotter.XY{X: st.peakTime(b.TStart, b.TStart+b.Ti), Y: b.PPeak})
		if !math.IsNaN(b.PPlat) {
			plats = append(plats, plotter.XY{X: b.TStart + b.Ti - 0.05, Y: b.PPlat})
		}
		if b.TEnd < from+span && !math.IsNaN(b.PEEP) { // PEEP: the last 0.2 s of expiration
			peeps = append(peeps, plotter.XY{X: b.TEnd - 0.1, Y: b.PEEP})
		}
	}
	for _, p := range []*gonum.Plot{pres, flow, vol} {
		p.X.Min, p.X.Max = from, from+span
	}
	addMarks(pres, peaks, colPeak, draw.CircleGlyph{}, vg.Points(2.2), "peak")
	addMarks(pres, plats, colFlow, draw.BoxGlyph{}, vg.Points(2.2), "plateau")
	addMarks(pres, peeps, colVolume, draw.PlusGlyph{}, vg.Points(3.5), "PEEP")
	addMarks(flow, starts, colMark, draw.TriangleGlyph{}, vg.Points(2.6), "breath start")
	markAsynchrony(pres, st, from, span, breaths)
	minSpan(pres, 10)
	minSpan(flow, 20)
	minSpan(vol, 100)
	// the keys sit to the right of the panel, outside the data: headroom
	// above the highest value holds them
	for p, room := range map[*gonum.Plot]float64{pres: 0.6, flow: 0.3} {
		p.Legend.Top, p.Legend.TextStyle.Font.Size = true, vg.Points(7)
		p.Y.Max += (p.Y.Max - p.Y.Min) * room
	}
	vol.X.Label.Text = "s of recording"
	return []*gonum.Plot{pres, flow, vol}
}

// asyNames are the asynchronies' names on the strip, by bit.
var asyNames = [mechanics.NumAsynchronies]string{"ineffective effort", "double trigger", "auto-trigger",
	"short cycle", "long cycle", "reverse trigger"}

// markAsynchrony marks the asynchronies on the pressure panel, each
// named: an ineffective effort at its deepest pressure, the others at
// their breath's start, at the pressure there.
func markAsynchrony(p *gonum.Plot, st *strip, from, span float64, breaths []mechanics.Breath) {
	var pts plotter.XYs
	var names []string
	at := func(t float64, name string) {
		if t >= from && t < from+span {
			pts = append(pts, plotter.XY{X: t, Y: st.pawAt(t)})
			names = append(names, name)
		}
	}
	for _, b := range breaths {
		if b.TEnd < from || b.TStart >= from+span || b.Asynchrony == 0 {
			continue
		}
		for k := 0; k < min(int(b.IneffectiveEfforts), len(b.EffortAt)); k++ {
			at(b.EffortAt[k], asyNames[0])
		}
		var words []string
		for i := 1; i < mechanics.NumAsynchronies; i++ {
			if b.Asynchrony&(1<<i) != 0 {
				words = append(words, asyNames[i])
			}
		}
		if len(words) > 0 {
			at(b.TStart, strings.Join(words, ", "))
		}
	}
	addMarks(p, pts, colPeak, draw.CrossGlyph{}, vg.Points(3.5), "asynchrony")
	if len(pts) == 0 {
		return
	}
	labels, _ := plotter.NewLabels(plotter.XYLabels{XYs: pts, Labels: names})
	for i := range labels.TextStyle {
		labels.TextStyle[i].Font.Size = vg.Points(6.5)
		labels.TextStyle[i].Color = colPeak
		labels.TextStyle[i].Rotation = math.Pi / 2
	}
	labels.Offset = vg.Point{X: vg.Points(3), Y: vg.Points(6)}
	p.Add(labels)
}

// pawAt is the pressure at the sample nearest t.
func (st *strip) pawAt(t float64) float64 {
	i, _ := slices.BinarySearch(st.t, t)
	i = min(i, len(st.t)-1)
	if i > 0 && t-st.t[i-1] < st.t[i]-t {
		i--
	}
	return st.paw[i]
}

// trend is one trend panel: its field, and the rule fields drawn on it.
type trendPanel struct {
	title, unit string
	span        float64 // the least y-range shown
	get         func(b *mechanics.Breath) float64
	rules       []string // event fields marked on this panel
}

var trendPanelsDrawn = []trendPanel{
	{"Compliance: static (line) and fitted (dots)", "mL/cmH2O", 10, func(b *mechanics.Breath) float64 { return b.Cstat },
		[]string{"cstat", "fit_c", "cdyn", "median.cstat", "median.fit_c", "slope.compliance", "compliance_change"}},
	{"Resistance: fitted", "cmH2O·s/L", 5, func(b *mechanics.Breath) float64 {
		if b.Reliable() {
			return b.FitR
		}
		return math.NaN()
	}, []string{"fit_r", "rinsp", "median.fit_r", "peak_plateau_gap", "rise.resistive"}},
	{"Driving pressure", "cmH2O", 5, func(b *mechanics.Breath) float64 { return b.DP },
		[]string{"dp", "median.dp", "slope.dp", "rise.elastic", "pplat", "median.pplat"}},
	{"Mechanical power", "J/min", 5, func(b *mechanics.Breath) float64 { return b.MP }, []string{"mp", "median.mp"}},
}

// trendPanels are compliance (static, and fitted where reliable),
// resistance, driving pressure and mechanical power over the whole
// recording, each with the rules on its field marked and named, and a lane
// for the rules on other fields. Past two hours the axis is in hours.
func trendPanels(d *Data) []*gonum.Plot {
	scale, unit := 60.0, "minutes"
	if n := len(d.breaths); n > 0 && d.breaths[n-1].TEnd > 2*3600 {
		scale, unit = 3600, "hours"
	}
	var rows []*gonum.Plot
	onPanel := map[string]bool{}
	for k, tp := range trendPanelsDrawn {
		p := newPanel(tp.title, tp.unit)
		x := make([]float64, len(d.breaths))
		y := make([]float64, len(d.breaths))
		for i := range d.breaths {
			x[i], y[i] = d.breaths[i].TStart/scale, tp.get(&d.breaths[i])
		}
		addLine(p, xys(x, y), colPressure, vg.Points(0.8))
		if k == 0 {
			fitC := make(plotter.XYs, 0)
			for _, b := range d.breaths {
				if !math.IsNaN(b.FitC) && b.Reliable() {
					fitC = append(fitC, plotter.XY{X: b.TStart / scale, Y: b.FitC})
				}
			}
			if len(fitC) > 0 {
				s, _ := plotter.NewScatter(fitC)
				s.GlyphStyle.Color, s.GlyphStyle.Shape, s.GlyphStyle.Radius = colFlow, draw.CircleGlyph{}, vg.Points(0.9)
				p.Add(s)
			}
		}
		minSpan(p, tp.span)
		for _, f := range tp.rules {
			onPanel[f] = true
		}
		markEvents(p, d.events, scale, func(field string) bool { return slices.Contains(tp.rules, field) })
		rows = append(rows, p)
	}
	end := 0.0 // the recording's last breath's end: a rule still raised lasts until then
	if n := len(d.breaths); n > 0 {
		end = d.breaths[n-1].TEnd
	}
	if lane := ruleLane(d.events, end, scale, func(field string) bool { return !onPanel[field] }); lane != nil {
		lane.X.Min, lane.X.Max = rows[0].X.Min, rows[0].X.Max
		rows = append(rows, lane)
	}
	last := rows[len(rows)-1]
	last.X.Label.Text = unit + " of recording; dashed: a rule raised, with its name and level"
	if len(rows) == len(trendPanelsDrawn) {
		last.X.Label.Text = unit + " of recording; dashed: a rule raised, with its name and level; no rule on other fields was raised"
	}
	return rows
}

// render lays out the title and the panels in one column and writes the
// picture.
func render(out string, title [2]string, rows []*gonum.Plot) error {
	const width = 7.5 * vg.Inch
	height := vg.Length(1.05+1.55*float64(len(rows))) * vg.Inch
	var canvas vg.CanvasWriterTo
	if strings.ToLower(filepath.Ext(out)) == ".svg" {
		canvas = vgsvg.New(width, height)
	} else {
		canvas = vgimg.PngCanvas{Canvas: vgimg.NewWith(vgimg.UseWH(width, height), vgimg.UseDPI(90))}
	}
	dc := draw.New(canvas)
	head := func(size vg.Length, y vg.Length, txt string) {
		sty := draw.TextStyle{Color: color.Black, Font: font.From(gonum.DefaultFont, size), Handler: gonum.DefaultTextHandler, XAlign: draw.XCenter, YAlign: draw.YTop}
		dc.FillText(sty, vg.Point{X: width / 2, Y: y}, txt)
	}
	head(vg.Points(11), height-3*vg.Millimeter, title[0])
	head(vg.Points(8), height-9*vg.Millimeter, title[1])
	grid := make([][]*gonum.Plot, len(rows))
	for i, p := range rows {
		grid[i] = []*gonum.Plot{p}
	}
	tiles := draw.Tiles{Rows: len(rows), Cols: 1, PadX: vg.Millimeter, PadY: 3 * vg.Millimeter,
		PadTop: 15 * vg.Millimeter, PadBottom: 2 * vg.Millimeter, PadLeft: 2 * vg.Millimeter, PadRight: 4 * vg.Millimeter}
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

// markEvents draws a dashed vertical mark at each raised event whose field
// the panel shows, named with its rule and level at the top of the panel.
func markEvents(p *gonum.Plot, events []alerts.Event, scale float64, shows func(field string) bool) {
	lo, hi := p.Y.Min, p.Y.Max
	if lo >= hi {
		return
	}
	var at plotter.XYs
	var names []string
	for _, ev := range events {
		if ev.Transition != alerts.Raised || !shows(ev.Field) {
			continue
		}
		x := ev.T / scale
		l, _ := plotter.NewLine(plotter.XYs{{X: x, Y: lo}, {X: x, Y: hi + (hi-lo)*0.45}})
		l.Color, l.Width, l.Dashes = colRule, vg.Points(0.8), []vg.Length{vg.Points(2), vg.Points(2)}
		p.Add(l)
		at = append(at, plotter.XY{X: x})
		names = append(names, fmt.Sprintf("%s (%s)", ev.Rule, ev.Level))
	}
	if len(at) == 0 {
		return
	}
	// room above the data for the names
	p.Y.Max = hi + (hi-lo)*0.45
	for i := range at {
		at[i].Y = p.Y.Max - (p.Y.Max-lo)*(0.02+0.1*float64(i%3))
	}
	labels, _ := plotter.NewLabels(plotter.XYLabels{XYs: at, Labels: names})
	labels.Offset = vg.Point{X: vg.Points(2)}
	for i := range labels.TextStyle {
		labels.TextStyle[i].Font.Size = vg.Points(6.5)
		labels.TextStyle[i].Color = colRule
		labels.TextStyle[i].YAlign = draw.YTop
	}
	p.Add(labels)
}

// ruleLane is a panel of the rules whose fields no trend panel shows: one
// row per rule, a bar from each raising to its clearing (or the end).
func ruleLane(events []alerts.Event, end, scale float64, shows func(field string) bool) *gonum.Plot {
	var order []string
	row := map[string]int{}
	for _, ev := range events {
		if shows(ev.Field) {
			if _, ok := row[ev.Rule]; !ok {
				row[ev.Rule] = len(order)
				order = append(order, ev.Rule)
			}
		}
	}
	if len(order) == 0 {
		return nil
	}
	p := newPanel("Rules on other fields: raised (bar) until cleared", "")
	p.Y.Min, p.Y.Max = -0.8, float64(len(order))-0.2
	p.Y.Tick.Marker = gonum.TickerFunc(func(lo, hi float64) []gonum.Tick {
		ticks := make([]gonum.Tick, len(order))
		for i, r := range order {
			ticks[i] = gonum.Tick{Value: float64(i), Label: r}
		}
		return ticks
	})
	for _, ev := range events {
		end = max(end, ev.T)
	}
	open := map[string]float64{}
	bar := func(rule string, a, b float64) {
		y := float64(row[rule])
		l, _ := plotter.NewLine(plotter.XYs{{X: a / scale, Y: y}, {X: b / scale, Y: y}})
		l.Color, l.Width = colRule, vg.Points(4)
		p.Add(l)
	}
	for _, ev := range events {
		if !shows(ev.Field) {
			continue
		}
		switch ev.Transition {
		case alerts.Raised:
			open[ev.Rule] = ev.T
		case alerts.Cleared:
			if a, ok := open[ev.Rule]; ok {
				bar(ev.Rule, a, max(ev.T, a+scale/60))
				delete(open, ev.Rule)
			}
		}
	}
	for r, a := range open {
		bar(r, a, max(end, a+scale/60))
	}
	return p
}
