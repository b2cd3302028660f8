// Package plot draws recorded runs: corrected power, torque, boost and
// lambda against engine speed (one line per wide-open-throttle pull), and
// any channels against time, for one run or several overlaid, as PNG or SVG.
package plot

import (
	"fmt"
	"image/color"
	"io"
	"math"
	"os"
	"path/filepath"
	"sort"
	"strings"

	gonum "gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgimg"
	"gonum.org/v1/plot/vg/vgsvg"

	"github.com/plenum-engine/plenum/pipeline/record"
)

// Config configures a plot.
type Config struct {
	// Channels are drawn against time, one panel each, after the
	// engine-speed panels.
	Channels []string
	// Unit names a channel's canonical unit for an axis label ("watts",
	// "grams per second"), or "" when the channel has none or is unknown.
	// Every unit label of the plot comes from it; the engine-speed panels
	// show watts as kW and pascals as kPa. Nil: no unit is known.
	Unit func(channel string) string
	// Display, when set, says how a person reads a channel: the unit's
	// label and the conversion from the canonical unit. It takes
	// precedence over Unit and over the engine-speed panels' own kW and
	// kPa, on every panel; for a channel it does not know (ok false), Unit
	// is asked.
	Display func(channel string) (s Scale, ok bool)
}

// Scale is how a channel is shown on an axis: shown = canonical × Factor +
// Offset, in the unit labelled Unit ("" for a plain number).
type Scale struct {
	Unit           string
	Factor, Offset float64
}

// apply converts one canonical value.
func (s Scale) apply(v float64) float64 { return v*s.Factor + s.Offset }

// identity shows canonical values as they are.
var identity = Scale{Factor: 1}

// Format is an image format.
type Format string

// The formats Write draws in.
const (
	PNG Format = "png"
	SVG Format = "svg"
)

// FormatOf returns the format a file name's extension asks for (.png or
// .svg, in any case).
func FormatOf(path string) (Format, bool) {
	switch strings.ToLower(filepath.Ext(path)) {
	case ".png":
		return PNG, true
	case ".svg":
		return SVG, true
	}
	return "", false
}

// unit returns the canonical unit label of a channel, "" if unknown.
func (c Config) unit(channel string) string {
	if c.Unit == nil {
		return ""
	}
	return c.Unit(channel)
}

// Series is one run's values of the channels a plot needs, aligned on the
// engine speed or on time. Make one with Config.Align.
type Series struct {
	label string
	vals  map[string][][2]float64 // "t:<channel>" → (time, y) pairs
	// pulls holds, per engine-speed panel channel, one list of (rpm, y)
	// pairs per wide-open-throttle pull, so that two pulls of one run are
	// two lines rather than one zigzag between them.
	pulls map[string][][][2]float64
}

// runColours are the line colours of overlaid runs (our own choice).
var runColours = []color.RGBA{{0x1f, 0x4e, 0x79, 0xff}, {0xc0, 0x50, 0x1a, 0xff}, {0x2e, 0x7d, 0x32, 0xff}, {0x6a, 0x1b, 0x9a, 0xff}}

// pullDashes tell the pulls of one run apart: solid, dashed, dotted, dash-dot.
var pullDashes = [][]vg.Length{nil, {vg.Points(6), vg.Points(3)}, {vg.Points(1.5), vg.Points(2)}, {vg.Points(6), vg.Points(2), vg.Points(1.5), vg.Points(2)}}

// speedPanels are the panels against engine speed: a title, the quantity
// that names the y axis, and the channel drawn.
var speedPanels = []struct{ title, quantity, channel string }{
	{"Corrected power", "power", "corrected_power"},
	{"Torque", "torque", "dyno_torque"},
	{"Boost", "boost", "boost_pressure"},
	{"Lambda", "λ", "lambda"},
}

// shown is how the engine-speed panels show a canonical unit: its axis
// label and the factor from the canonical unit. A ratio needs no label.
func shown(unit string) (label string, scale float64) {
	switch unit {
	case "watts":
		return "kW", 1e-3
	case "pascals":
		return "kPa", 1e-3
	case "newton meters":
		return "N·m", 1
	case "ratio":
		return "", 1
	}
	return unit, 1
}

// speedScale is how an engine-speed panel shows a channel: by Display,
// else the canonical unit as shown scales it.
func (c Config) speedScale(channel string) Scale {
	if c.Display != nil {
		if s, ok := c.Display(channel); ok {
			return s
		}
	}
	label, f := shown(c.unit(channel))
	return Scale{Unit: label, Factor: f}
}

// timeScale is how a panel against time shows a channel: by Display, else
// in the canonical unit.
func (c Config) timeScale(channel string) Scale {
	if c.Display != nil {
		if s, ok := c.Display(channel); ok {
			return s
		}
	}
	return Scale{Unit: c.unit(channel), Factor: 1}
}

// axis joins a quantity and a unit label into an axis label.
func axis(quantity, unit string) string {
	if unit == "" || unit == quantity { // "λ (λ)" says λ twice
		return quantity
	}
	if quantity == "λ" && unit == "AFR" { // λ shown as an air-fuel ratio
		return "air-fuel ratio (AFR)"
	}
	return quantity + " (" + unit + ")"
}

// Write draws the panels of runs in format f to w and returns how many
// panels it drew.
func Write(w io.Writer, f Format, cfg Config, runs []Series) (panels int, err error) {
	plots, err := build(cfg, runs)
	if err != nil {
		return 0, err
	}
	rows := (len(plots) + 1) / 2
	width, height := 28*vg.Centimeter, vg.Length(rows)*9*vg.Centimeter
	var c vg.CanvasWriterTo
	switch f {
	case SVG:
		c = vgsvg.New(width, height)
	case PNG:
		c = vgimg.PngCanvas{Canvas: vgimg.New(width, height)}
	default:
		return 0, fmt.Errorf("plot: format %q: want png or svg", f)
	}
	dc := draw.New(c.(vg.CanvasSizer))
	tiles := draw.Tiles{Rows: rows, Cols: 2, PadX: vg.Centimeter, PadY: vg.Centimeter, PadTop: vg.Centimeter / 2, PadBottom: vg.Centimeter / 2, PadLeft: vg.Centimeter / 2, PadRight: vg.Centimeter / 2}
	grid := make([][]*gonum.Plot, rows)
	for i := range grid {
		grid[i] = make([]*gonum.Plot, 2)
	}
	for i, p := range plots {
		grid[i/2][i%2] = p
	}
	cs := gonum.Align(grid, tiles, dc)
	for i := range grid {
		for j := range grid[i] {
			if grid[i][j] != nil {
				grid[i][j].Draw(cs[i][j])
			}
		}
	}
	if _, err := c.WriteTo(w); err != nil {
		return 0, fmt.Errorf("plot: %w", err)
	}
	return len(plots), nil
}

// build makes the panels of runs: the engine-speed panels, then one per
// channel against time.
func build(cfg Config, runs []Series) ([]*gonum.Plot, error) {
	var plots []*gonum.Plot
	xScale := cfg.speedScale("engine_speed")
	for _, pn := range speedPanels {
		yScale := cfg.speedScale(pn.channel)
		p := gonum.New()
		p.Title.Text = pn.title
		p.X.Label.Text = axis("engine speed", xScale.Unit)
		p.Y.Label.Text = axis(pn.quantity, yScale.Unit)
		p.Add(plotter.NewGrid())
		for i, r := range runs {
			ps := r.pulls[pn.channel]
			for k, v := range ps {
				label := r.label
				if len(ps) > 1 {
					label = fmt.Sprintf("%s, pull %d", r.label, k+1)
				}
				if err := addLine(p, label, v, xScale, yScale, runColours[i%len(runColours)], pullDashes[k%len(pullDashes)]); err != nil {
					return nil, err
				}
			}
		}
		p.Legend.Top, p.Legend.Left = true, true
		plots = append(plots, p)
	}
	for _, ch := range cfg.Channels {
		p := gonum.New()
		p.Title.Text = ch
		p.X.Label.Text = "time (s)"
		yScale := cfg.timeScale(ch)
		p.Y.Label.Text = axis(ch, yScale.Unit)
		p.Add(plotter.NewGrid())
		for i, r := range runs {
			if err := addLine(p, r.label, r.vals["t:"+ch], identity, yScale, runColours[i%len(runColours)], nil); err != nil {
				return nil, err
			}
		}
		p.Legend.Top, p.Legend.Left = true, true
		plots = append(plots, p)
	}
	return plots, nil
}

// Save draws the panels of runs into the file at path, as PNG or SVG by
// its extension, and returns how many panels it drew.
func Save(path string, cfg Config, runs []Series) (panels int, err error) {
	f, ok := FormatOf(path)
	if !ok {
		return 0, fmt.Errorf("plot: %s: the name must end in .png or .svg", path)
	}
	out, err := os.Create(path)
	if err != nil {
		return 0, fmt.Errorf("plot: %w", err)
	}
	n, err := Write(out, f, cfg, runs)
	if err != nil {
		out.Close()
		return 0, err
	}
	if err := out.Close(); err != nil {
		return 0, fmt.Errorf("plot: %w", err)
	}
	return n, nil
}

// addLine adds one labelled line of (x, y) points, each converted by its
// scale, to p; no points, no line.
func addLine(p *gonum.Plot, label string, xy [][2]float64, xs, ys Scale, col color.RGBA, dashes []vg.Length) error {
	if len(xy) == 0 {
		return nil
	}
	pts := make(plotter.XYs, 0, len(xy))
	for _, v := range xy {
		pts = append(pts, plotter.XY{X: xs.apply(v[0]), Y: ys.apply(v[1])})
	}
	l, err := plotter.NewLine(pts)
	if err != nil {
		return fmt.Errorf("plot: %w", err)
	}
	l.Color = col
	l.Width = vg.Points(1.2)
	l.Dashes = dashes
	p.Add(l)
	p.Legend.Add(label, l)
	return nil
}

// Align pairs each power, torque, boost and lambda sample of rec (read with
// record.ReadAll: these are derived channels) with the latest engine speed,
// keeping only samples under load (throttle over 90 %) for the
// engine-speed panels, and keeps c.Channels against time. label names the
// run in the legends.
func (c Config) Align(label string, rec record.Recording) Series {
	in := rec.Points
	s := Series{label: label, vals: map[string][][2]float64{}, pulls: map[string][][][2]float64{}}
	pull, open := -1, false // the current pull; whether the throttle is open
	want := map[string]bool{}
	for _, ch := range c.Channels {
		want[ch] = true
	}
	rpm, thr := math.NaN(), math.NaN()
	var t0 float64
	for i, r := range in {
		ts := float64(r.NS) / 1e9
		if i == 0 {
			t0 = ts
		}
		name := rec.Channel(r)
		switch name {
		case "engine_speed":
			rpm = r.Value
		case "throttle_position":
			thr = r.Value
			if w := thr > 0.9; w && !open {
				pull++
				open = true
			} else if !w {
				open = false
			}
		}
		if want[name] {
			s.vals["t:"+name] = append(s.vals["t:"+name], [2]float64{ts - t0, r.Value})
		}
		switch name {
		case "corrected_power", "dyno_torque", "boost_pressure", "lambda":
			if !math.IsNaN(rpm) && (math.IsNaN(thr) || thr > 0.9) && r.Quality.Usable() {
				k := max(pull, 0) // without a throttle channel: one pull
				for len(s.pulls[name]) <= k {
					s.pulls[name] = append(s.pulls[name], nil)
				}
				s.pulls[name][k] = append(s.pulls[name][k], [2]float64{rpm, r.Value})
			}
		}
	}
	// Against engine speed, a pull reads best sorted by speed; pulls too
	// short to show a curve (under 20 points) are left out.
	for name, ps := range s.pulls {
		kept := ps[:0]
		for _, v := range ps {
			if len(v) >= 20 {
				sort.SliceStable(v, func(i, j int) bool { return v[i][0] < v[j][0] })
				kept = append(kept, v)
			}
		}
		s.pulls[name] = kept
	}
	return s
}
