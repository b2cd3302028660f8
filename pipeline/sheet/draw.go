package sheet

import (
	"fmt"
	"image/color"
	"io"
	"math"
	"os"
	"sort"
	"strings"

	gonum "gonum.org/v1/plot"
	"gonum.org/v1/plot/font"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/text"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgimg"
	"gonum.org/v1/plot/vg/vgsvg"

	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/display"
	"github.com/plenum-engine/plenum/pipeline/plot"
)

// Format is an image format, as pipeline/plot draws them.
type Format = plot.Format

// The formats Write draws in.
const (
	PNG = plot.PNG
	SVG = plot.SVG
)

// FormatOf returns the format a file name's extension asks for.
func FormatOf(path string) (Format, bool) { return plot.FormatOf(path) }

// PNGDPI is the PNG's resolution: an A4 landscape sheet 1600 pixels wide.
const PNGDPI = 137

// traceColours tell the traces (one per pull) apart; our own palette,
// chosen to stay distinct when printed.
var traceColours = []color.RGBA{
	{0x1b, 0x4f, 0x8a, 0xff}, {0xd0, 0x5a, 0x12, 0xff}, {0x2a, 0x8a, 0x3e, 0xff}, {0x9b, 0x2d, 0x8f, 0xff},
	{0xb8, 0x1e, 0x2c, 0xff}, {0x00, 0x8c, 0x95, 0xff}, {0x7a, 0x5c, 0x10, 0xff}, {0x55, 0x55, 0x55, 0xff},
}

// traceDashes are added once the colours run out.
var traceDashes = [][]vg.Length{nil, {vg.Points(6), vg.Points(3)}, {vg.Points(2), vg.Points(2)}}

func traceStyle(i int) (color.RGBA, []vg.Length) {
	return traceColours[i%len(traceColours)], traceDashes[(i/len(traceColours))%len(traceDashes)]
}

var (
	sans  = font.Font{Typeface: "Liberation", Variant: "Sans"}
	black = color.RGBA{0x20, 0x20, 0x20, 0xff}
)

func style(size vg.Length) text.Style {
	f := sans
	f.Size = size
	return text.Style{Color: black, Font: f, Handler: gonum.DefaultTextHandler, XAlign: draw.XLeft, YAlign: draw.YTop}
}

// StandardName is how the sheet names a correction standard.
func StandardName(s string) string {
	switch s {
	case "sae_j1349":
		return "SAE J1349"
	case "iso_1585":
		return "ISO 1585"
	case "din_70020":
		return "DIN 70020"
	case "":
		return "not recorded"
	}
	return s
}

// Save draws the sheet of runs into the file at path, PNG or SVG by its
// extension.
func Save(path string, cfg Config, runs []Run) error {
	f, ok := FormatOf(path)
	if !ok {
		return fmt.Errorf("sheet: %s: the name must end in .png or .svg", path)
	}
	out, err := os.Create(path)
	if err != nil {
		return fmt.Errorf("sheet: %w", err)
	}
	if err := Write(out, f, cfg, runs); err != nil {
		out.Close()
		return err
	}
	if err := out.Close(); err != nil {
		return fmt.Errorf("sheet: %w", err)
	}
	return nil
}

// Write draws the sheet of runs in format f to w: A4 landscape, taller by a
// row for every two time panels.
func Write(w io.Writer, f Format, cfg Config, runs []Run) error {
	timeRows := (len(cfg.Channels) + 1) / 2
	width := 297 * vg.Millimeter
	height := 210*vg.Millimeter + vg.Length(timeRows)*60*vg.Millimeter
	var c vg.CanvasWriterTo
	switch f {
	case SVG:
		c = vgsvg.New(width, height)
	case PNG:
		c = vgimg.PngCanvas{Canvas: vgimg.NewWith(vgimg.UseWH(width, height), vgimg.UseDPI(PNGDPI))}
	default:
		return fmt.Errorf("sheet: format %q: want png or svg", f)
	}
	dc := draw.New(c.(vg.CanvasSizer))
	dc.SetColor(color.White)
	dc.Fill(dc.Rectangle.Path())
	margin := 10 * vg.Millimeter
	page := draw.Crop(dc, margin, -margin, margin, -margin)
	headerH := drawHeader(page, cfg, runs)
	body := draw.Crop(page, 0, 0, 0, -headerH-4*vg.Millimeter)
	total := body.Max.Y - body.Min.Y
	// Rows: power and torque (the largest), boost and λ, then the time
	// panels, two a row.
	weights := []float64{1.35, 1}
	for range timeRows {
		weights = append(weights, 1)
	}
	var sum float64
	for _, v := range weights {
		sum += v
	}
	top := body.Max.Y
	rows := panels(cfg, runs)
	for i, wgt := range weights {
		h := vg.Length(wgt/sum) * total
		row := body
		row.Max.Y, row.Min.Y = top, top-h
		top -= h
		pair := [][]*gonum.Plot{{rows[2*i], nil}}
		if 2*i+1 < len(rows) {
			pair[0][1] = rows[2*i+1]
		}
		// Titles are drawn here, level across the row: gonum's own sit at
		// the top of each aligned canvas, which need not be level.
		titleSty := style(11)
		titleSty.XAlign = draw.XCenter
		titleH := titleSty.Height("Ag") + 2*vg.Millimeter
		tiles := draw.Tiles{Rows: 1, Cols: 2, PadX: 12 * vg.Millimeter, PadY: 0, PadTop: titleH + 2*vg.Millimeter, PadBottom: 2 * vg.Millimeter}
		cs := gonum.Align(pair, tiles, row)
		for j, p := range pair[0] {
			if p == nil {
				continue
			}
			title := p.Title.Text
			p.Title.Text = ""
			p.Draw(cs[0][j])
			dc := p.DataCanvas(cs[0][j])
			row.FillText(titleSty, vg.Point{X: (dc.Min.X + dc.Max.X) / 2, Y: row.Max.Y - vg.Millimeter}, title)
		}
	}
	if _, err := c.WriteTo(w); err != nil {
		return fmt.Errorf("sheet: %w", err)
	}
	return nil
}

// scaleOf is how the sheet shows a catalogued channel's values.
func (c Config) scaleOf(ch string) display.Scale {
	if cat, ok := pipeline.Catalogued(ch); ok {
		return c.Display.ScaleOf(cat)
	}
	return display.Scale{Factor: 1}
}

// axisLabel joins a quantity and a unit.
func axisLabel(quantity string, s display.Scale) string {
	switch u := s.Label(); {
	case u == "" || u == "λ":
		return quantity
	case u == "AFR":
		return "air-fuel ratio (AFR)"
	default:
		return quantity + " (" + u + ")"
	}
}

// newPanel makes an empty panel with the sheet's look.
func newPanel(title, x, y string) *gonum.Plot {
	p := gonum.New()
	p.Title.Text = title
	p.Title.TextStyle.Font = font.From(sans, 11)
	p.Title.Padding = 2 * vg.Millimeter
	for _, a := range []*gonum.Axis{&p.X, &p.Y} {
		a.Tick.Marker = ticks125{}
		a.Tick.Label.Font = font.From(sans, 8.5)
		a.Label.TextStyle.Font = font.From(sans, 9.5)
		a.Label.Padding = 2.5 * vg.Millimeter
		a.Padding = 0
	}
	p.X.Label.Text, p.Y.Label.Text = x, y
	g := plotter.NewGrid()
	g.Vertical.Color = color.Gray{0xdd}
	g.Horizontal.Color = color.Gray{0xdd}
	p.Add(g)
	return p
}

// panels builds the sheet's panels in reading order.
func panels(cfg Config, runs []Run) []*gonum.Plot {
	xs := cfg.scaleOf("engine_speed")
	xl := axisLabel("engine speed", xs)
	speed := []struct {
		title, quantity, ch string
		get                 func(Pull) []XY
		peak                bool
	}{
		{"Corrected power", "power", chPower, func(p Pull) []XY { return p.Power }, true},
		{"Corrected torque", "torque", chTorque, func(p Pull) []XY { return p.Torque }, true},
		{"Boost", "boost", chBoost, func(p Pull) []XY { return p.Boost }, false},
		{"Mixture", "λ", chLambda, func(p Pull) []XY { return p.Lambda }, false},
	}
	var out []*gonum.Plot
	for _, sp := range speed {
		ys := cfg.scaleOf(sp.ch)
		p := newPanel(sp.title, xl, axisLabel(sp.quantity, ys))
		i := 0
		for _, r := range runs {
			for _, pl := range r.Pulls {
				col, dash := traceStyle(i)
				i++
				raw := sp.get(pl)
				if cfg.Raw {
					addPoints(p, raw, xs, ys, col)
				}
				sm := Smoothed(raw, cfg.bin(), cfg.window())
				addLine(p, sm, xs, ys, col, dash)
				if pk := PeakOf(sm); sp.peak && pk.OK {
					addMarker(p, pk, xs, ys, col)
				}
			}
		}
		out = append(out, p)
	}
	for _, ch := range cfg.Channels {
		ys := cfg.scaleOf(ch)
		q := strings.ReplaceAll(ch, "_", " ")
		p := newPanel(q, "time since tip-in (s)", axisLabel(q, ys))
		i := 0
		for _, r := range runs {
			for _, pl := range r.Pulls {
				col, dash := traceStyle(i)
				i++
				addLine(p, pl.Time[ch], display.Scale{Factor: 1}, ys, col, dash)
			}
		}
		out = append(out, p)
	}
	return out
}

// scaled converts a trace for drawing.
func scaled(xy []XY, xs, ys display.Scale) plotter.XYs {
	pts := make(plotter.XYs, 0, len(xy))
	for _, v := range xy {
		pts = append(pts, plotter.XY{X: xs.Apply(v.X), Y: ys.Apply(v.Y)})
	}
	return pts
}

func addLine(p *gonum.Plot, xy []XY, xs, ys display.Scale, col color.RGBA, dash []vg.Length) {
	if len(xy) < 2 {
		return
	}
	l, err := plotter.NewLine(scaled(xy, xs, ys))
	if err != nil { // NaN or Inf: leave the trace out
		return
	}
	l.Color, l.Width, l.Dashes = col, vg.Points(1.4), dash
	p.Add(l)
}

func addPoints(p *gonum.Plot, xy []XY, xs, ys display.Scale, col color.RGBA) {
	if len(xy) == 0 {
		return
	}
	s, err := plotter.NewScatter(scaled(xy, xs, ys))
	if err != nil {
		return
	}
	faint := color.NRGBA{R: col.R, G: col.G, B: col.B, A: 0x60}
	s.GlyphStyle = draw.GlyphStyle{Color: faint, Radius: vg.Points(0.9), Shape: draw.CircleGlyph{}}
	p.Add(s)
}

func addMarker(p *gonum.Plot, pk Peak, xs, ys display.Scale, col color.RGBA) {
	s, err := plotter.NewScatter(plotter.XYs{{X: xs.Apply(pk.X), Y: ys.Apply(pk.Y)}})
	if err != nil {
		return
	}
	s.GlyphStyle = draw.GlyphStyle{Color: col, Radius: vg.Points(3.5), Shape: draw.RingGlyph{}}
	p.Add(s)
	s2, _ := plotter.NewScatter(plotter.XYs{{X: xs.Apply(pk.X), Y: ys.Apply(pk.Y)}})
	s2.GlyphStyle = draw.GlyphStyle{Color: col, Radius: vg.Points(1.5), Shape: draw.CircleGlyph{}}
	p.Add(s2)
}

// fit shortens s with an ellipsis until it is at most w wide in sty.
func fit(sty text.Style, s string, w vg.Length) string {
	if sty.Width(s) <= w {
		return s
	}
	r := []rune(s)
	for len(r) > 1 && sty.Width(string(r)+"…") > w {
		r = r[:len(r)-1]
	}
	return string(r) + "…"
}

// HeaderLines returns the header's lines of text for runs: vehicle and
// date, standard, conditions, smoothing.
func HeaderLines(cfg Config, runs []Run) []string {
	vehicles, dates, standards := set{}, set{}, set{}
	for _, r := range runs {
		if r.Vehicle != "" {
			vehicles.add(r.Vehicle)
		}
		if !r.Start.IsZero() {
			dates.add(r.Start.UTC().Format("2006-01-02"))
		}
		std := ""
		if r.Correction != nil {
			std = r.Correction.Standard
		}
		standards.add(StandardName(std))
	}
	v := "vehicle not recorded"
	if len(vehicles) > 0 {
		v = strings.Join(vehicles.sorted(), ", ")
	}
	lines := []string{
		"Vehicle " + v + "   ·   " + "date " + strings.Join(dates.sorted(), ", ") + " (UTC)",
		"Correction standard " + strings.Join(standards.sorted(), ", ") + "   ·   corrected torque = corrected power ÷ angular speed",
	}
	for _, r := range runs {
		lines = append(lines, r.Label+": "+conditionsText(cfg, r))
	}
	lines = append(lines, fmt.Sprintf("Curves: centred moving average over %d bins of %g rpm (NIST/SEMATECH e-Handbook §6.4.2); peaks read from the smoothed curve, raw peak beside", cfg.window(), cfg.bin()))
	return lines
}

// conditionsText describes a run's conditions and where they came from.
func conditionsText(cfg Config, r Run) string {
	c := r.Conditions
	var parts []string
	if c != nil {
		if c.PressurePa != nil {
			parts = append(parts, cfg.formatCh("baro_pressure", *c.PressurePa))
		}
		if c.TemperatureC != nil {
			parts = append(parts, cfg.formatCh("ambient_temp", *c.TemperatureC))
		}
		if c.RelativeHumidity != nil {
			parts = append(parts, fmt.Sprintf("%.0f %% RH", *c.RelativeHumidity*100))
		}
	}
	s := "conditions not recorded"
	if len(parts) > 0 {
		s = strings.Join(parts, ", ")
	}
	if c != nil && c.Source != "" {
		s += ", " + sourceText(c.Source)
	}
	if r.Correction != nil && r.Correction.Entered != nil && (c == nil || c.Source != "entered") {
		s += "; entered for the correction"
	}
	return s
}

// sourceText says where conditions came from, for a person.
func sourceText(src string) string {
	switch src {
	case "sensors":
		return "measured by the cell's sensors at the start"
	case "mean of sensors":
		return "measured by the cell's sensors (mean over the run)"
	case "entered":
		return "entered by the operator"
	case "sensors+entered":
		return "partly entered by the operator, the rest measured by the cell's sensors"
	}
	return src
}

// formatCh formats a canonical value of a catalogued channel for a person.
func (c Config) formatCh(ch string, v float64) string {
	cat, ok := pipeline.Catalogued(ch)
	if !ok {
		return fmt.Sprint(v)
	}
	return c.Display.Format(cat, v).String()
}

// Rows returns the peak table: a heading and one row per pull.
func Rows(cfg Config, runs []Run) [][]string {
	pw := cfg.scaleOf(chPower)
	tq := cfg.scaleOf(chTorque)
	rows := [][]string{{"", "peak power", "raw", "peak torque", "raw", "factor"}}
	for _, r := range runs {
		for _, p := range r.Pulls {
			pk := cfg.Peaks(p)
			cf := "—"
			if !math.IsNaN(r.Factor) {
				cf = fmt.Sprintf("%.3f", r.Factor)
			}
			rows = append(rows, []string{p.Label,
				peakText(cfg, chPower, pk.Power, pw), peakText(cfg, chPower, pk.RawPower, pw),
				peakText(cfg, chTorque, pk.Torque, tq), peakText(cfg, chTorque, pk.RawTorque, tq), cf})
		}
	}
	return rows
}

func peakText(cfg Config, ch string, pk Peak, _ display.Scale) string {
	if !pk.OK {
		return "—"
	}
	return cfg.formatCh(ch, pk.Y) + " @ " + fmt.Sprintf("%.0f rpm", pk.X)
}

// drawHeader draws the title, the header lines and the peak table (which
// is also the legend) at the top of c and returns the height used.
func drawHeader(c draw.Canvas, cfg Config, runs []Run) vg.Length {
	title := style(15)
	c.FillText(title, vg.Point{X: c.Min.X, Y: c.Max.Y}, "Dyno sheet")
	y0 := c.Max.Y - title.Height("Dyno sheet") - 2*vg.Millimeter

	rows := Rows(cfg, runs)
	gap := 4 * vg.Millimeter
	swatch := 8 * vg.Millimeter
	// The table takes at most 62 % of the width: its font shrinks to fit.
	var cell text.Style
	var widths []vg.Length
	var tableW vg.Length
	for size := vg.Length(8.5); ; size -= 0.5 {
		cell = style(size)
		widths = make([]vg.Length, len(rows[0]))
		for _, r := range rows {
			for j, s := range r {
				if j == 0 {
					s = fit(cell, s, 55*vg.Millimeter)
				}
				widths[j] = max(widths[j], cell.Width(s))
			}
		}
		tableW = swatch
		for _, w := range widths {
			tableW += w + gap
		}
		tableW -= gap
		if tableW <= (c.Max.X-c.Min.X)*0.62 || size <= 5 {
			break
		}
	}
	lineH := cell.Height("Ag") + 1.2*vg.Millimeter
	x0 := c.Max.X - tableW
	y := c.Max.Y
	for i, r := range rows {
		x := x0 + swatch
		if i > 0 {
			col, dash := traceStyle(i - 1)
			c.StrokeLine2(draw.LineStyle{Color: col, Width: vg.Points(2), Dashes: dash}, x0, y-lineH/2+0.6*vg.Millimeter, x0+swatch-2*vg.Millimeter, y-lineH/2+0.6*vg.Millimeter)
		}
		for j, s := range r {
			if j == 0 {
				s = fit(cell, s, 55*vg.Millimeter)
			}
			c.FillText(cell, vg.Point{X: x, Y: y}, s)
			x += widths[j] + gap
		}
		y -= lineH
	}
	tableBottom := y

	leftW := x0 - c.Min.X - 6*vg.Millimeter
	info := style(9)
	y = y0
	for _, l := range HeaderLines(cfg, runs) {
		for _, part := range wrap(info, l, leftW) {
			c.FillText(info, vg.Point{X: c.Min.X, Y: y}, fit(info, part, leftW))
			y -= info.Height("Ag") + 1.2*vg.Millimeter
		}
	}
	return c.Max.Y - min(y, tableBottom)
}

// wrap breaks s at spaces into lines at most w wide in sty (a word wider
// than w stays whole, for fit to shorten).
func wrap(sty text.Style, s string, w vg.Length) []string {
	var out []string
	line := ""
	for _, word := range strings.Fields(s) {
		next := word
		if line != "" {
			next = line + " " + word
		}
		if line != "" && sty.Width(next) > w {
			out = append(out, line)
			next = word
		}
		line = next
	}
	return append(out, line)
}

// set is a set of strings.
type set map[string]bool

func (s set) add(v string) { s[v] = true }

func (s set) sorted() []string {
	out := make([]string, 0, len(s))
	for v := range s {
		out = append(out, v)
	}
	sort.Strings(out)
	return out
}
