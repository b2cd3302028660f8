package main

import (
	"flag"
	"fmt"
	"image/color"
	"io"
	"math"
	"os"
	"path/filepath"
	"sort"
	"strings"

	"github.com/plenum-engine/plenum/pipeline"
	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgimg"
	"gonum.org/v1/plot/vg/vgsvg"
)

// series is one run's values of the channels a plot needs, aligned on the
// engine speed or on time.
type series struct {
	label string
	vals  map[string][][2]float64 // "t:<channel>" → (time, y) pairs
	// pulls holds, per engine-speed panel channel, one list of (rpm, y)
	// pairs per wide-open-throttle pull, so that two pulls of one run are
	// two lines rather than one zigzag between them.
	pulls map[string][][][2]float64
}

// runColours are the line colours of overlaid runs (our own choice).
var runColours = []color.RGBA{{0x1f, 0x4e, 0x79, 0xff}, {0xc0, 0x50, 0x1a, 0xff}, {0x2e, 0x7d, 0x32, 0xff}, {0x6a, 0x1b, 0x9a, 0xff}}

// cmdPlot draws corrected power and torque against engine speed, boost and
// lambda against engine speed, and any channels against time, for one run or
// several overlaid.
func cmdPlot(args []string, stdout io.Writer) error {
	fs := flag.NewFlagSet("plot", flag.ContinueOnError)
	in := fs.String("in", "", "comma-separated runs: run directories, ids under -dir, or line-protocol files")
	dir := fs.String("dir", "", "the recording directory that holds run ids")
	out := fs.String("out", "", "output file, .png or .svg")
	chans := fs.String("channels", "", "also plot these channels against time (comma-separated)")
	if err := fs.Parse(args); err != nil {
		return usageError{err.Error()}
	}
	if *in == "" || *out == "" {
		return usageError{"plot needs -in RUN[,RUN…] and -out FILE.png|FILE.svg"}
	}
	ext := strings.ToLower(filepath.Ext(*out))
	if ext != ".png" && ext != ".svg" {
		return usageError{"plot -out must end in .png or .svg"}
	}
	var extra []string
	if *chans != "" {
		extra = strings.Split(*chans, ",")
	}
	var runs []series
	for _, name := range strings.Split(*in, ",") {
		files, runDir, err := resolveRun(name, *dir)
		if err != nil {
			return err
		}
		samples, err := readAll(files)
		if err != nil {
			return err
		}
		label := filepath.Base(name)
		if runDir != "" {
			label = filepath.Base(runDir)
		}
		runs = append(runs, align(label, samples, extra))
	}
	panels := []struct {
		title, x, y string
		chs         []string
		scale       float64
		yunit       string
	}{
		{"Corrected power", "engine speed (rpm)", "power (kW)", []string{"corrected_power"}, 1e-3, "kW"},
		{"Torque", "engine speed (rpm)", "torque (N·m)", []string{"dyno_torque"}, 1, "N·m"},
		{"Boost", "engine speed (rpm)", "boost (kPa)", []string{"boost_pressure"}, 1e-3, "kPa"},
		{"Lambda", "engine speed (rpm)", "λ", []string{"lambda"}, 1, ""},
	}
	var plots []*plot.Plot
	for _, pn := range panels {
		p := plot.New()
		p.Title.Text = pn.title
		p.X.Label.Text = pn.x
		p.Y.Label.Text = pn.y
		p.Add(plotter.NewGrid())
		for i, r := range runs {
			ps := r.pulls[pn.chs[0]]
			for k, v := range ps {
				label := r.label
				if len(ps) > 1 {
					label = fmt.Sprintf("%s, pull %d", r.label, k+1)
				}
				if err := addLine(p, label, v, pn.scale, runColours[i%len(runColours)], pullDashes[k%len(pullDashes)]); err != nil {
					return err
				}
			}
		}
		p.Legend.Top, p.Legend.Left = true, true
		plots = append(plots, p)
	}
	for _, ch := range extra {
		p := plot.New()
		p.Title.Text = ch
		p.X.Label.Text = "time (s)"
		p.Y.Label.Text = ch + unitSuffix(ch)
		p.Add(plotter.NewGrid())
		for i, r := range runs {
			if err := addLine(p, r.label, r.vals["t:"+ch], 1, runColours[i%len(runColours)], nil); err != nil {
				return err
			}
		}
		p.Legend.Top, p.Legend.Left = true, true
		plots = append(plots, p)
	}
	rows := (len(plots) + 1) / 2
	w, h := 28*vg.Centimeter, vg.Length(rows)*9*vg.Centimeter
	var c vg.CanvasWriterTo
	if ext == ".svg" {
		c = newSVG(w, h)
	} else {
		c = vgimg.PngCanvas{Canvas: vgimg.New(w, h)}
	}
	dc := draw.New(c.(vg.CanvasSizer))
	tiles := draw.Tiles{Rows: rows, Cols: 2, PadX: vg.Centimeter, PadY: vg.Centimeter, PadTop: vg.Centimeter / 2, PadBottom: vg.Centimeter / 2, PadLeft: vg.Centimeter / 2, PadRight: vg.Centimeter / 2}
	grid := make([][]*plot.Plot, rows)
	for i := range grid {
		grid[i] = make([]*plot.Plot, 2)
	}
	for i, p := range plots {
		grid[i/2][i%2] = p
	}
	cs := plot.Align(grid, tiles, dc)
	for i := range grid {
		for j := range grid[i] {
			if grid[i][j] != nil {
				grid[i][j].Draw(cs[i][j])
			}
		}
	}
	if err := saveCanvas(c, *out); err != nil {
		return err
	}
	fmt.Fprintf(stdout, "wrote %s (%d runs, %d panels)\n", *out, len(runs), len(plots))
	return nil
}

// pullDashes tell the pulls of one run apart: solid, dashed, dotted, dash-dot.
var pullDashes = [][]vg.Length{nil, {vg.Points(6), vg.Points(3)}, {vg.Points(1.5), vg.Points(2)}, {vg.Points(6), vg.Points(2), vg.Points(1.5), vg.Points(2)}}

func addLine(p *plot.Plot, label string, xy [][2]float64, scale float64, col color.RGBA, dashes []vg.Length) error {
	if len(xy) == 0 {
		return nil
	}
	pts := make(plotter.XYs, 0, len(xy))
	for _, v := range xy {
		pts = append(pts, plotter.XY{X: v[0], Y: v[1] * scale})
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

// readAll reads every sample of a recording, derived ones included.
func readAll(files []string) (recording, error) { return readSamples(files, true) }

// align pairs each power, torque, boost and lambda sample with the latest
// engine speed, keeping only samples under load (throttle over 90 %) for the
// engine-speed panels, and keeps the extra channels against time.
func align(label string, rec recording, extra []string) series {
	in := rec.samples
	s := series{label: label, vals: map[string][][2]float64{}, pulls: map[string][][][2]float64{}}
	pull, open := -1, false // the current pull; whether the throttle is open
	want := map[string]bool{}
	for _, ch := range extra {
		want[ch] = true
	}
	rpm, thr := math.NaN(), math.NaN()
	var t0 float64
	for i, r := range in {
		ts := float64(r.ns) / 1e9
		if i == 0 {
			t0 = ts
		}
		name := rec.channel(r)
		switch name {
		case "engine_speed":
			rpm = r.value
		case "throttle_position":
			thr = r.value
			if w := thr > 0.9; w && !open {
				pull++
				open = true
			} else if !w {
				open = false
			}
		}
		if want[name] {
			s.vals["t:"+name] = append(s.vals["t:"+name], [2]float64{ts - t0, r.value})
		}
		switch name {
		case "corrected_power", "dyno_torque", "boost_pressure", "lambda":
			if !math.IsNaN(rpm) && (math.IsNaN(thr) || thr > 0.9) && r.quality.Usable() {
				k := max(pull, 0) // without a throttle channel: one pull
				for len(s.pulls[name]) <= k {
					s.pulls[name] = append(s.pulls[name], nil)
				}
				s.pulls[name][k] = append(s.pulls[name][k], [2]float64{rpm, r.value})
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

func newSVG(w, h vg.Length) vg.CanvasWriterTo { return vgsvg.New(w, h) }

func saveCanvas(c vg.CanvasWriterTo, path string) error {
	f, err := os.Create(path)
	if err != nil {
		return fmt.Errorf("plot: %w", err)
	}
	if _, err := c.WriteTo(f); err != nil {
		f.Close()
		return fmt.Errorf("plot: %w", err)
	}
	return f.Close()
}

// unitSuffix names a channel's canonical unit for an axis label.
func unitSuffix(ch string) string {
	if c, ok := pipeline.Standard(ch); ok && c.Unit != pipeline.None {
		return " (" + strings.ReplaceAll(string(c.Unit), "_", " ") + ")"
	}
	derived := map[string]string{"air_mass_flow": "grams per second", "boost_pressure": "pascals", "lambda": "ratio",
		"fuel_mass_flow": "grams per second", "corrected_power": "watts", "brake_power": "watts",
		"cooldown_idle_remaining": "seconds", "turbo_thermal_state": "ratio", "compressor_pressure_ratio": "ratio",
		"intercooler_effectiveness": "ratio", "compressor_efficiency": "ratio", "volumetric_efficiency": "ratio"}
	if u, ok := derived[ch]; ok {
		return " (" + u + ")"
	}
	return ""
}
