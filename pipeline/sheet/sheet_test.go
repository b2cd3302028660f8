package sheet

import (
	"bytes"
	"image/png"
	"math"
	"regexp"
	"strings"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/record"
)

// parabola samples y = c − a(x − v)² every step rpm from lo to hi, several
// samples a bin so that binning averages them.
func parabola(a, c, v, lo, hi, step float64) []XY {
	var out []XY
	for x := lo; x <= hi+1e-9; x += step {
		out = append(out, XY{x, c - a*(x-v)*(x-v)})
	}
	return out
}

// A centred moving average of a parabola sampled at equal steps is the
// same parabola lowered by a·h²·(N²−1)/12 (the variance of the window's
// offsets), so its peak stays at the vertex.
func TestSmoothedPeakOfParabola(t *testing.T) {
	cases := []struct {
		name        string
		vertex      float64
		bin         float64
		window      int
		wantX       float64
		tolX        float64
		wantLowered bool
	}{
		{"vertex on a bin centre, window 5", 5300, 50, 5, 5300, 0, true},
		{"vertex on a bin centre, window 9", 4800, 100, 9, 4800, 0, true},
		{"no smoothing", 6000, 50, 1, 6000, 0, true},
		{"vertex between bins", 5321, 50, 5, 5321, 25, false},
	}
	const a, c = 2e-5, 200000.0
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			// One sample on each bin centre: the bin means are the curve.
			raw := parabola(a, c, tc.vertex, 2000, 7000, tc.bin)
			pk := PeakOf(Smoothed(raw, tc.bin, tc.window))
			if !pk.OK || math.Abs(pk.X-tc.wantX) > tc.tolX {
				t.Fatalf("peak at %v rpm, want %v ± %v", pk.X, tc.wantX, tc.tolX)
			}
			if tc.wantLowered {
				n := float64(tc.window)
				want := c - a*tc.bin*tc.bin*(n*n-1)/12
				if math.Abs(pk.Y-want) > 1e-6 {
					t.Errorf("smoothed peak %.9f, want %.9f", pk.Y, want)
				}
			}
			if rp := PeakOf(raw); math.Abs(rp.X-tc.vertex) > tc.bin/2 || rp.Y > c {
				t.Errorf("raw peak %+v, want near %v and at most %v", rp, tc.vertex, c)
			}
		})
	}
}

// Several samples a bin are averaged into it; the bins sit on multiples of
// the width.
func TestBin(t *testing.T) {
	got := Bin([]XY{{1990, 1}, {2010, 3}, {2030, 10}, {2100, 5}, {2160, 7}}, 50)
	want := []XY{{2000, 2}, {2050, 10}, {2100, 5}, {2150, 7}}
	if len(got) != len(want) {
		t.Fatalf("Bin = %v, want %v", got, want)
	}
	for i := range want {
		if got[i] != want[i] {
			t.Errorf("bin %d = %v, want %v", i, got[i], want[i])
		}
	}
}

// The window shrinks symmetrically at the ends; a straight line is kept.
func TestSmoothEnds(t *testing.T) {
	got := Smooth([]float64{0, 1, 2, 3, 4, 5, 6}, 5)
	for i, v := range got {
		if math.Abs(v-float64(i)) > 1e-12 {
			t.Errorf("Smooth(line)[%d] = %v, want %d", i, v, i)
		}
	}
	got = Smooth([]float64{0, 0, 10, 0, 0}, 3)
	want := []float64{0, 10.0 / 3, 10.0 / 3, 10.0 / 3, 0}
	for i := range want {
		if math.Abs(got[i]-want[i]) > 1e-12 {
			t.Errorf("Smooth(spike)[%d] = %v, want %v", i, got[i], want[i])
		}
	}
}

// Ticks step by 1, 2 or 5 × 10ⁿ.
func TestTicks125(t *testing.T) {
	cases := []struct {
		lo, hi float64
		want   []string
	}{
		{2000, 6600, []string{"2000", "3000", "4000", "5000", "6000"}},
		{0.78, 0.99, []string{"0.80", "0.85", "0.90", "0.95"}},
		{-70, 110, []string{"-50", "0", "50", "100"}},
		{0, 10.4, []string{"0", "2", "4", "6", "8", "10"}},
		{105, 245, []string{"120", "140", "160", "180", "200", "220", "240"}},
	}
	for _, c := range cases {
		var got []string
		for _, tk := range (ticks125{}).Ticks(c.lo, c.hi) {
			if tk.Label != "" {
				got = append(got, tk.Label)
			}
		}
		if strings.Join(got, " ") != strings.Join(c.want, " ") {
			t.Errorf("Ticks(%v, %v) = %v, want %v", c.lo, c.hi, got, c.want)
		}
	}
}

// synthetic builds a recording of one run with two pulls: throttle opens,
// engine speed sweeps 2000→6000 rpm, corrected power is a parabola in
// engine speed with its vertex at peakRPM.
func synthetic(t *testing.T, peakRPM float64) record.Recording {
	t.Helper()
	keys := []record.SeriesKey{{Channel: "throttle_position"}, {Channel: "engine_speed"}, {Channel: "corrected_power", Source: "derived"},
		{Channel: "correction_factor", Source: "derived"}, {Channel: "boost_pressure", Source: "derived"}, {Channel: "lambda", Source: "derived"}}
	rec := record.Recording{Keys: keys}
	ns := time.Date(2026, 12, 2, 5, 0, 0, 0, time.UTC).UnixNano()
	add := func(k int, v float64) {
		rec.Points = append(rec.Points, record.Point{Key: uint32(k), Quality: pipeline.OK, Value: v, NS: ns})
	}
	for range 2 {
		for i := 0; i < 100; i++ { // idle, throttle closed, 10 s
			add(0, 0.05)
			add(1, 900)
			ns += int64(100 * time.Millisecond)
		}
		for i := 0; i <= 400; i++ { // wide open, 2000 → 6000 rpm in 20 s
			rpm := 2000 + float64(i)*10
			add(0, 1)
			add(1, rpm)
			add(2, 200000-0.02*(rpm-peakRPM)*(rpm-peakRPM))
			add(3, 1.02)
			add(4, 100000)
			add(5, 0.82)
			ns += int64(50 * time.Millisecond)
		}
	}
	for i := 0; i < 50; i++ {
		add(0, 0.05)
		add(1, 900)
		ns += int64(100 * time.Millisecond)
	}
	return rec
}

// Pulls are found by the daemon's trigger, each with its traces; the peak
// sits at the vertex of the synthetic power curve.
func TestBuildFindsPulls(t *testing.T) {
	var cfg Config
	r := cfg.Build(record.Meta{ID: "20261202T050000.000Z", Label: "baseline"}, synthetic(t, 5000))
	if len(r.Pulls) != 2 {
		t.Fatalf("%d pulls, want 2", len(r.Pulls))
	}
	if r.Pulls[0].Label != "baseline · pull 1" || r.Pulls[1].Label != "baseline · pull 2" {
		t.Errorf("labels %q, %q", r.Pulls[0].Label, r.Pulls[1].Label)
	}
	if math.Abs(r.Factor-1.02) > 1e-9 {
		t.Errorf("factor %v, want 1.02", r.Factor)
	}
	for _, p := range r.Pulls {
		pk := cfg.Peaks(p)
		if pk.Power.X != 5000 || pk.RawPower.X != 5000 || pk.RawPower.Y != 200000 {
			t.Errorf("%s: peaks %+v, want power at 5000 rpm, raw 200 kW", p.Label, pk)
		}
		// Torque = P/ω: its peak is below the power peak's speed.
		if !pk.Torque.OK || pk.Torque.X >= 5000 {
			t.Errorf("%s: torque peak %+v", p.Label, pk.Torque)
		}
		if len(p.Boost) == 0 || len(p.Lambda) == 0 {
			t.Errorf("%s: no boost or lambda trace", p.Label)
		}
	}
}

// svgText returns the text elements of an SVG, unescaped.
func svgText(svg string) string {
	var b strings.Builder
	for _, m := range regexp.MustCompile(`<text[^>]*>([^<]*)</text>`).FindAllStringSubmatch(svg, -1) {
		s := strings.NewReplacer("&amp;", "&", "&lt;", "<", "&gt;", ">", "&#39;", "'", "&quot;", `"`).Replace(m[1])
		b.WriteString(s + "\n")
	}
	return b.String()
}

// The SVG carries the labels, the standard, the factor and the peaks as
// text.
func TestSheetSVGText(t *testing.T) {
	var cfg Config
	one := cfg.Build(record.Meta{ID: "20261202T050000.000Z", Label: "baseline", Vehicle: "test-car",
		Correction: &record.Correction{Standard: "sae_j1349"}}, synthetic(t, 5000))
	two := cfg.Build(record.Meta{ID: "20261202T060000.000Z", Vehicle: "test-car",
		Correction: &record.Correction{Standard: "sae_j1349"}}, synthetic(t, 5500))
	var buf bytes.Buffer
	if err := Write(&buf, SVG, cfg, []Run{one, two}); err != nil {
		t.Fatal(err)
	}
	txt := svgText(buf.String())
	for _, want := range []string{
		"baseline · pull 1", "baseline · pull 2", "20261202T060000.000Z · pull 2", // label, else id
		"SAE J1349", "1.020", "test-car", "2026-12-02",
		"200 kW @ 5000 rpm", "200 kW @ 5500 rpm", // smoothed and raw peaks
		"moving average over 5 bins of 50 rpm", "§6.4.2",
		"power (kW)", "torque (N·m)", "engine speed (rpm)",
	} {
		if !strings.Contains(txt, want) {
			t.Errorf("the SVG's text lacks %q", want)
		}
	}
	if strings.Contains(txt, "20261202T050000.000Z") {
		t.Error("a labelled run is named by its id")
	}
}

// An unknown channel is refused with its name.
func TestCheckChannels(t *testing.T) {
	if err := CheckChannels([]string{"engine_speed", "boost_pressure"}); err != nil {
		t.Errorf("known channels refused: %v", err)
	}
	err := CheckChannels([]string{"engine_speed", "warp_drive"})
	if err == nil || !strings.Contains(err.Error(), `"warp_drive"`) {
		t.Errorf("CheckChannels(warp_drive) = %v", err)
	}
	cfg := Config{Channels: []string{"oil_temp"}}
	r := cfg.Build(record.Meta{ID: "x"}, synthetic(t, 5000))
	if err := cfg.CheckRecorded([]Run{r}); err == nil || !strings.Contains(err.Error(), `"oil_temp"`) {
		t.Errorf("CheckRecorded(oil_temp) = %v", err)
	}
}

// The PNG is an A4 landscape page about 1600 pixels wide.
func TestSheetPNGSize(t *testing.T) {
	var cfg Config
	r := cfg.Build(record.Meta{ID: "x", Label: "one"}, synthetic(t, 5000))
	var buf bytes.Buffer
	if err := Write(&buf, PNG, cfg, []Run{r}); err != nil {
		t.Fatal(err)
	}
	im, err := png.DecodeConfig(&buf)
	if err != nil {
		t.Fatal(err)
	}
	if im.Width < 1580 || im.Width > 1620 || math.Abs(float64(im.Height)/float64(im.Width)-210.0/297) > 0.01 {
		t.Errorf("PNG %d×%d, want about 1600 wide at A4 landscape proportions", im.Width, im.Height)
	}
}
