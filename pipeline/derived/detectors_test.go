package derived

import (
	"encoding/json"
	"errors"
	"math"
	"net/http/httptest"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/derive"
	"github.com/plenum-engine/plenum/derive/turbo"
	"github.com/plenum-engine/plenum/derive/warn"
	"github.com/plenum-engine/plenum/pipeline"
)

func at(s float64) time.Time { return t0.Add(time.Duration(s * float64(time.Second))) }

// guardInputs are the turbo guard's inputs: engine speed, boost, oil
// temperature, EGT, air mass flow.
func guardInputs(rpm, boost, oil, egt float64) []float64 {
	return []float64{rpm, boost, oil, egt, math.NaN()}
}

// driveHot runs the engine at 4000 rpm with a 900 °C EGT and warm oil from
// 0 to 60 s (four time constants of the demo's 15 s).
func driveHot(d pipeline.Derivation, out []float64) {
	for s := 0.0; s <= 60; s++ {
		d.Derive(at(s), guardInputs(4000, 20000, 90, 900), out)
	}
}

func TestTurboGuard(t *testing.T) {
	s, err := Build(demoConfig(), registry(t, "engine_speed"))
	if err != nil {
		t.Fatal(err)
	}
	d := find(t, s, "turbo_guard")
	out := make([]float64, len(d.Outputs()))
	// Cold and over the boost limit: the warm-up warning.
	if mask := d.Derive(at(0), guardInputs(3000, 80000, 20, math.NaN()), out); mask != 0b11111 || out[0] != 1 {
		t.Fatalf("cold boost: mask %b, warning %v", mask, out[0])
	}
	// Driven hot, then switched off: not safe, latched until it runs again.
	driveHot(d, out)
	if out[0] != 0 || out[1] < 850 || out[2] <= 0 || out[3] != 0 || out[4] != 0 {
		t.Fatalf("driven hot: %v", out)
	}
	d.Derive(at(61), guardInputs(0, 0, 90, math.NaN()), out)
	if out[4] != 1 {
		t.Errorf("switched off hot: turbo_shutdown_hot %v, want 1", out[4])
	}
	d.Derive(at(62), guardInputs(0, 0, 90, math.NaN()), out)
	if out[4] != 1 {
		t.Errorf("still off: turbo_shutdown_hot %v, want 1 (latched)", out[4])
	}
	d.Derive(at(63), guardInputs(900, 0, 90, math.NaN()), out)
	if out[4] != 0 {
		t.Errorf("running again: turbo_shutdown_hot %v, want 0", out[4])
	}
}

func TestTurboStateSavedAndRestored(t *testing.T) {
	path := filepath.Join(t.TempDir(), "state", "turbo-x.json") // the directory does not exist yet
	cfg := demoConfig()
	cfg.Turbo.StatePath = path
	s, err := Build(cfg, registry(t, "engine_speed"))
	if err != nil {
		t.Fatal(err)
	}
	if err := s.LoadTurboState(at(0)); err != nil {
		t.Fatalf("no state file yet: %v", err)
	}
	d := find(t, s, "turbo_guard")
	out := make([]float64, len(d.Outputs()))
	driveHot(d, out)
	hot := out[1]
	if err := s.SaveTurboState(); err != nil {
		t.Fatal(err)
	}
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	var st turbo.CoolDownState
	if err := json.Unmarshal(b, &st); err != nil {
		t.Fatal(err)
	}
	if st.Temp != hot || !st.Time.Equal(at(60)) {
		t.Errorf("saved %+v, want %v at %v", st, hot, at(60))
	}
	if _, err := os.Stat(path + ".tmp"); !os.IsNotExist(err) {
		t.Errorf("temporary file left behind: %v", err)
	}
	cases := []struct {
		name string
		off  time.Duration
		want float64
	}{
		{"restarted at once", 0, hot},
		// Off for one off-time constant (20 min by default): 1/e of the
		// excess over the 25 °C ambient remains.
		{"restarted after 20 min", 20 * time.Minute, 25 + (hot-25)*math.Exp(-1)},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			s2, err := Build(cfg, registry(t, "engine_speed"))
			if err != nil {
				t.Fatal(err)
			}
			now := at(60).Add(c.off)
			if err := s2.LoadTurboState(now); err != nil {
				t.Fatal(err)
			}
			d := find(t, s2, "turbo_guard")
			out := make([]float64, len(d.Outputs()))
			d.Derive(now, guardInputs(0, 0, 90, math.NaN()), out)
			if math.Abs(out[1]-c.want) > 1e-9 {
				t.Errorf("thermal state %v, want %v", out[1], c.want)
			}
		})
	}
}

func TestTurboStateErrors(t *testing.T) {
	dir := t.TempDir()
	file := filepath.Join(dir, "file")
	if err := os.WriteFile(file, []byte("x"), 0o644); err != nil {
		t.Fatal(err)
	}
	corrupt := filepath.Join(dir, "corrupt.json")
	if err := os.WriteFile(corrupt, []byte("{"), 0o644); err != nil {
		t.Fatal(err)
	}
	cases := []struct {
		name     string
		channels []string
		path     string
		stateDir bool // the error is ErrStateDir
		loadErr  bool
		saved    string // file the save writes, "" none
	}{
		{name: "no state path", channels: []string{"engine_speed"}},
		{name: "no turbo guard", path: filepath.Join(dir, "unused.json")},
		{name: "directory under a file", channels: []string{"engine_speed"}, path: filepath.Join(file, "turbo.json"), stateDir: true, loadErr: true},
		{name: "corrupt file", channels: []string{"engine_speed"}, path: corrupt, loadErr: true, saved: corrupt},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			cfg := demoConfig()
			cfg.Turbo.StatePath = c.path
			s, err := Build(cfg, registry(t, c.channels...))
			if err != nil {
				t.Fatal(err)
			}
			err = s.LoadTurboState(at(0))
			if (err != nil) != c.loadErr || errors.Is(err, ErrStateDir) != c.stateDir {
				t.Errorf("load: %v; want an error %v, ErrStateDir %v", err, c.loadErr, c.stateDir)
			}
			if err := s.SaveTurboState(); err != nil {
				t.Errorf("save: %v", err)
			}
			if c.saved != "" {
				b, err := os.ReadFile(c.saved)
				if err != nil || !json.Valid(b) {
					t.Errorf("saved %q, %v", b, err)
				}
			} else if c.path != "" {
				if _, err := os.Stat(c.path); err == nil {
					t.Errorf("%s written", c.path)
				}
			}
		})
	}
}

func TestVETableCSV(t *testing.T) {
	ecu := []string{"ecu_mass_air_flow", "manifold_pressure", "intake_air_temp", "engine_speed"}
	table := &derive.VETable{Speeds: []float64{2000, 4000}, Pressures: []float64{50000, 150000}, Values: [][]float64{{0.8, 0.85}, {0.9, 0.95}}}
	cases := []struct {
		name  string
		table *derive.VETable
		want  []string // lines
	}{
		{"configured cells", table, []string{`engine_speed_rpm\manifold_pressure_kpa,50,150`, "2000,,", "4000,,0.9000", ""}},
		{"default cells", nil, []string{`engine_speed_rpm\manifold_pressure_kpa,20,40,60,80,100,120,140,160,180,200,220,240`,
			"1000,,,,,,,,,,,,", "1500,,,,,,,,,,,,", "2000,,,,,,,,,,,,", "2500,,,,,,,,,,,,", "3000,,,,,,,,,,,,", "3500,,,,,,,,,,,,",
			"4000,,,,,,,0.9000,,,,,", "4500,,,,,,,,,,,,", "5000,,,,,,,,,,,,", "5500,,,,,,,,,,,,", "6000,,,,,,,,,,,,", "6500,,,,,,,,,,,,", "7000,,,,,,,,,,,,", ""}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			cfg := demoConfig()
			cfg.VETable = c.table
			s, err := Build(cfg, registry(t, ecu...))
			if err != nil {
				t.Fatal(err)
			}
			d := find(t, s, "ve_estimate")
			maf := derive.SpeedDensity(150000, 30, 4000, cfg.Displacement, 0.9) * 1000 // g/s for a VE of 0.9
			out := make([]float64, 1)
			for i := 0; i < 3; i++ {
				d.Derive(at(float64(i)), []float64{maf, 150000, 30, 4000}, out)
			}
			d.Derive(at(4), []float64{maf / 2, 150000, 30, 400}, out) // below 500 rpm: not counted
			rec := httptest.NewRecorder()
			s.VETableHandler().ServeHTTP(rec, httptest.NewRequest("GET", "/ve-table.csv", nil))
			if ct := rec.Header().Get("Content-Type"); ct != "text/csv" {
				t.Errorf("content type %q", ct)
			}
			if got := strings.Split(rec.Body.String(), "\n"); strings.Join(got, "|") != strings.Join(c.want, "|") {
				t.Errorf("CSV:\n%s\nwant:\n%s", strings.Join(got, "\n"), strings.Join(c.want, "\n"))
			}
		})
	}
	// The accumulator's axes are the Set's own: changing the configured table
	// afterwards changes nothing.
	cfg := demoConfig()
	cfg.VETable = &derive.VETable{Speeds: []float64{2000, 4000}, Pressures: []float64{50000, 150000}, Values: table.Values}
	s, err := Build(cfg, registry(t, ecu...))
	if err != nil {
		t.Fatal(err)
	}
	cfg.VETable.Speeds[0], cfg.VETable.Pressures[0] = 1, 1
	rec := httptest.NewRecorder()
	s.VETableHandler().ServeHTTP(rec, httptest.NewRequest("GET", "/ve-table.csv", nil))
	if !strings.HasPrefix(rec.Body.String(), "engine_speed_rpm\\manifold_pressure_kpa,50,150\n2000,") {
		t.Errorf("CSV follows the caller's table: %q", rec.Body.String())
	}
}

// tipIn drives the lag detector with a tip-in at 1 s (throttle 0.1 → 1 over
// 100 ms) and boost a first-order response (τ 0.5 s, 0.3 s dead time) from 0
// to 100 kPa; lift, if positive, closes the throttle then. It returns the
// events emitted.
func tipIn(t *testing.T, gear, lift float64) []pipeline.Event {
	t.Helper()
	s, err := Build(demoConfig(), registry(t, demoChannels...))
	if err != nil {
		t.Fatal(err)
	}
	d := find(t, s, "turbo_lag")
	var evs []pipeline.Event
	d.(pipeline.EventSink).SetEmitter(func(e pipeline.Event) { evs = append(evs, e) })
	for i := 0; i <= 800; i++ {
		tt := float64(i) / 100
		thr := 0.1
		if tt > 1 {
			thr = math.Min(1, 0.1+9*(tt-1))
		}
		if lift > 0 && tt >= lift {
			thr = 0.2
		}
		boost := 0.0
		if tt > 1.3 {
			boost = 100000 * (1 - math.Exp(-(tt-1.3)/0.5))
		}
		if mask := d.Derive(at(tt), []float64{thr, boost, 4000, gear}, nil); mask != 0 {
			t.Fatalf("turbo lag wrote outputs: %b", mask)
		}
	}
	return evs
}

func TestLagEvents(t *testing.T) {
	cases := []struct {
		name     string
		gear     float64
		lift     float64
		kind     string
		tags     map[string]string
		measured bool
	}{
		{"in third", 3, 0, "turbo_lag", map[string]string{"gear": "3"}, true},
		// No gear channel: the gear is unknown, so the tag is absent, never
		// a made-up "0".
		{"gear unknown", math.NaN(), 0, "turbo_lag", map[string]string{}, true},
		{"in neutral", 0, 0, "turbo_lag", map[string]string{"gear": "0"}, true},
		{"lifted off", 2, 1.5, "turbo_lag_discarded", map[string]string{"gear": "2", "reason": "throttle lift-off"}, false},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			evs := tipIn(t, c.gear, c.lift)
			if len(evs) != 1 {
				t.Fatalf("%d events: %+v", len(evs), evs)
			}
			e := evs[0]
			gear, hasGear := e.Tags["gear"]
			wantGear, wantHas := c.tags["gear"]
			if e.Kind != c.kind || e.Name != "boost_response" || gear != wantGear || hasGear != wantHas || !e.Start.Equal(at(1)) {
				t.Errorf("event %s %s tags %v start %v", e.Kind, e.Name, e.Tags, e.Start)
			}
			if !c.measured {
				if e.Tags["reason"] != c.tags["reason"] || !e.End.Equal(at(1.5)) {
					t.Errorf("discarded: tags %v, end %v", e.Tags, e.End)
				}
				return
			}
			f := e.Fields
			if f["engine_speed_rpm"] != 4000 || !(f["t10_seconds"] < f["t50_seconds"] && f["t50_seconds"] < f["t90_seconds"]) {
				t.Errorf("fields %v", f)
			}
			// A first-order lag after a dead time: T50 = dead + τ·ln 2.
			if want := 0.3 + 0.5*math.Ln2; math.Abs(f["t50_seconds"]-want) > 0.03 {
				t.Errorf("T50 %.3f s, want %.3f", f["t50_seconds"], want)
			}
		})
	}
}

// TestWarningsThroughPipeline runs the lean-under-boost rule through a real
// pipeline: the raise after 300 ms, the warning channel, the clear, and the
// events' tags and fields.
func TestWarningsThroughPipeline(t *testing.T) {
	reg := registry(t, "manifold_pressure", "baro_pressure", "wideband_voltage", "engine_speed")
	cfg := demoConfig()
	// Without oil temperature the engine counts as cold for 5 min: the
	// warm-up rule would fire too.
	cfg.Warnings = []warn.Text{{Name: "cold_engine_high_load", Rule: warn.Off}}
	s, err := Build(cfg, reg)
	if err != nil {
		t.Fatal(err)
	}
	g, err := pipeline.BuildGraph(reg, s.Derivations)
	if err != nil {
		t.Fatal(err)
	}
	p := pipeline.New(reg, g, pipeline.Options{})
	p.BindEmitters()
	sub := p.SubscribeEvents("test")
	warnID, ok := reg.Lookup("warning_lean_under_boost")
	if !ok {
		t.Fatal("no warning_lean_under_boost channel")
	}
	put := func(sec float64, name string, v float64) {
		id, _ := reg.Lookup(name)
		p.Process(pipeline.Sample{Channel: id, Value: v, Time: at(sec)})
	}
	type step struct {
		sec    float64
		name   string
		v      float64
		events []string // kind of each event the step emits
		active float64  // the warning channel afterwards
	}
	steps := []step{
		{0, "baro_pressure", 100000, nil, 0},
		{0, "engine_speed", 5000, nil, 0},
		{0, "wideband_voltage", 0.9, nil, 0}, // λ 0.80: rich
		{0, "manifold_pressure", 210000, nil, 0},
		{1, "wideband_voltage", 2.3, nil, 0},       // λ 0.99: lean under boost from here
		{1.2, "manifold_pressure", 210001, nil, 0}, // 200 ms: not yet
		{1.3, "manifold_pressure", 210002, []string{"warning_raised"}, 1},
		{1.4, "manifold_pressure", 210003, nil, 1},
		{2, "wideband_voltage", 0.9, []string{"warning_cleared"}, 0},
	}
	var evs []pipeline.Event
	for _, st := range steps {
		put(st.sec, st.name, st.v)
		_, evs = sub.Drain(nil, evs[:0])
		var kinds []string
		for _, e := range evs {
			if e.Name != "lean_under_boost" {
				t.Errorf("at %v s: event %s %s", st.sec, e.Kind, e.Name)
				continue
			}
			kinds = append(kinds, e.Kind)
			if e.Tags["severity"] != "critical" || e.Fields["active"] != st.active {
				t.Errorf("at %v s: %s tags %v fields %v", st.sec, e.Kind, e.Tags, e.Fields)
			}
			if e.Kind == "warning_raised" && (!e.Start.Equal(at(1)) || !e.End.Equal(at(1.3))) {
				t.Errorf("raised %v–%v, want 1 s–1.3 s", e.Start.Sub(t0), e.End.Sub(t0))
			}
		}
		if strings.Join(kinds, ",") != strings.Join(st.events, ",") {
			t.Errorf("at %v s (%s): events %v, want %v", st.sec, st.name, kinds, st.events)
		}
		if v := p.Store().Get(warnID); v.Set && v.Value != st.active {
			t.Errorf("at %v s: warning channel %v, want %v", st.sec, v.Value, st.active)
		} else if !v.Set && st.active != 0 {
			t.Errorf("at %v s: warning channel unset, want %v", st.sec, st.active)
		}
	}
}

// TestWarningsRefreshOncePerSecond checks that the rules' states are
// written at least once a second without transitions, and not more often.
func TestWarningsRefreshOncePerSecond(t *testing.T) {
	s, err := Build(demoConfig(), registry(t, demoChannels...))
	if err != nil {
		t.Fatal(err)
	}
	d := find(t, s, "warnings")
	in := make([]float64, len(d.Inputs()))
	for i := range in {
		in[i] = math.NaN()
	}
	out := make([]float64, len(d.Outputs()))
	all := uint64(1)<<len(out) - 1
	cases := []struct {
		sec  float64
		mask uint64
	}{{0, all}, {0.5, 0}, {0.999, 0}, {1, all}, {1.5, 0}, {2.2, all}}
	for _, c := range cases {
		if mask := d.Derive(at(c.sec), in, out); mask != c.mask {
			t.Errorf("at %v s: mask %b, want %b", c.sec, mask, c.mask)
		}
	}
}

// TestDeriveNoAllocs checks that no adapter allocates on a frame that
// raises no event.
func TestDeriveNoAllocs(t *testing.T) {
	s, err := Build(demoConfig(), registry(t, append(demoChannels, "compressor_inlet_pressure", "ecu_mass_air_flow", "ecu_commanded_lambda")...))
	if err != nil {
		t.Fatal(err)
	}
	for _, d := range s.Derivations {
		t.Run(d.Name(), func(t *testing.T) {
			in := plausible(d)
			out := make([]float64, len(d.Outputs()))
			sec := 0.0
			if n := testing.AllocsPerRun(200, func() {
				sec += 0.01
				d.Derive(at(sec), in, out)
			}); n != 0 {
				t.Errorf("%v allocations per Derive", n)
			}
		})
	}
}

// plausible returns mid-range inputs for d: every derivation computes, and
// no warning or lag event is raised.
func plausible(d pipeline.Derivation) []float64 {
	vals := map[string]float64{
		"manifold_pressure": 150000, "intake_air_temp": 35, "engine_speed": 4000, "baro_pressure": 100000,
		"wideband_voltage": 1.9, "air_mass_flow": 120, "lambda": 0.85, "compressor_outlet_pressure": 160000,
		"compressor_inlet_pressure": 97000, "ecu_mass_air_flow": 120, "ecu_commanded_lambda": 0.85, "dyno_torque": 300,
		"ambient_temp": 20, "ambient_humidity": 0.5, "fuel_mass_flow": 9, "charge_temp_pre_cooler": 110,
		"throttle_position": 0.5, "boost_pressure": 50000, "oil_temp": 90, "exhaust_temp": 700, "coolant_temp": 90,
		"oil_pressure": 400000, "turbo_warmup_warning": 0, "turbo_shutdown_hot": 0,
	}
	in := make([]float64, len(d.Inputs()))
	for i, x := range d.Inputs() {
		v, ok := vals[x.Name]
		if !ok {
			v = math.NaN()
		}
		in[i] = v
	}
	return in
}

// BenchmarkDerivations measures one Derive call of each adapter of the
// demo's set (and the ECU's), with plausible inputs.
func BenchmarkDerivations(b *testing.B) {
	s, err := Build(demoConfig(), registry(b, append(demoChannels, "compressor_inlet_pressure", "ecu_mass_air_flow", "ecu_commanded_lambda")...))
	if err != nil {
		b.Fatal(err)
	}
	for _, d := range s.Derivations {
		b.Run(d.Name(), func(b *testing.B) {
			in := plausible(d)
			out := make([]float64, len(d.Outputs()))
			b.ReportAllocs()
			for i := 0; b.Loop(); i++ {
				d.Derive(t0.Add(time.Duration(i)*time.Millisecond), in, out)
			}
		})
	}
}

// TestVETableServedWhileDeriving reads the CSV from another goroutine while
// the estimate accumulates (run with -race), and checks the last read sees
// every sample's cell.
func TestVETableServedWhileDeriving(t *testing.T) {
	s, err := Build(demoConfig(), registry(t, "ecu_mass_air_flow", "manifold_pressure", "intake_air_temp", "engine_speed"))
	if err != nil {
		t.Fatal(err)
	}
	d := find(t, s, "ve_estimate")
	h := s.VETableHandler()
	done := make(chan struct{})
	go func() {
		defer close(done)
		out := make([]float64, 1)
		for i := 0; i < 1000; i++ {
			rpm := 1000 + float64(i%13)*500
			d.Derive(at(float64(i)/100), []float64{derive.SpeedDensity(100000, 30, rpm, 1.998e-3, 0.9) * 1000, 100000, 30, rpm}, out)
		}
	}()
	for reading := true; reading; {
		select {
		case <-done:
			reading = false
		default:
		}
		rec := httptest.NewRecorder()
		h.ServeHTTP(rec, httptest.NewRequest("GET", "/ve-table.csv", nil))
		if !reading && strings.Count(rec.Body.String(), "0.9000") != 13 {
			t.Errorf("after every engine speed: %q", rec.Body.String())
		}
	}
}

// TestAcknowledgeLatchedWarning: switched_off_hot stays raised after its
// condition has gone until someone acknowledges it; the acknowledgement is
// an event saying by what path and by whom, and the warning then clears.
// Acknowledging an unknown rule or one that is not raised is refused.
func TestAcknowledgeLatchedWarning(t *testing.T) {
	s, err := Build(demoConfig(), registry(t, demoChannels...))
	if err != nil {
		t.Fatal(err)
	}
	d := find(t, s, "warnings")
	var evs []pipeline.Event
	d.(pipeline.EventSink).SetEmitter(func(e pipeline.Event) { evs = append(evs, e) })
	hot := -1
	for i, in := range d.Inputs() {
		if in.Name == "turbo_shutdown_hot" {
			hot = i
		}
	}
	rule := -1
	for i, c := range d.Outputs() {
		if c.Name == "warning_switched_off_hot" {
			rule = i
		}
	}
	if hot < 0 || rule < 0 {
		t.Fatalf("no turbo_shutdown_hot input (%d) or switched_off_hot output (%d)", hot, rule)
	}
	in := make([]float64, len(d.Inputs()))
	for i := range in {
		in[i] = math.NaN()
	}
	out := make([]float64, len(d.Outputs()))
	feed := func(sec, v float64) {
		in[hot] = v
		d.Derive(at(sec), in, out)
	}
	if err := s.Acknowledge(Ack{Rule: "switched_off_hot", Via: "http"}); !errors.Is(err, ErrNotRaised) {
		t.Errorf("acknowledging before it is raised: %v, want ErrNotRaised", err)
	}
	if err := s.Acknowledge(Ack{Rule: "switched_off_warm", Via: "http"}); !errors.Is(err, ErrNoWarning) {
		t.Errorf("acknowledging an unknown rule: %v, want ErrNoWarning", err)
	}
	feed(0, 1)
	feed(0.2, 1)
	feed(1, 0)
	feed(10, 0.1)
	if out[rule] != 1 {
		t.Fatalf("switched_off_hot %v after its condition went, want 1 (latched)", out[rule])
	}
	if err := s.Acknowledge(Ack{Rule: "switched_off_hot", Via: "mqtt", By: "pit crew"}); err != nil {
		t.Fatalf("acknowledge: %v", err)
	}
	evs = evs[:0]
	feed(11, 0.1)
	if out[rule] != 0 {
		t.Errorf("switched_off_hot %v after the acknowledgement, want 0", out[rule])
	}
	if len(evs) != 2 || evs[0].Kind != "warning_acknowledged" || evs[0].Name != "switched_off_hot" ||
		evs[0].Tags["via"] != "mqtt" || evs[0].Tags["by"] != "pit crew" || !evs[0].End.Equal(at(11)) ||
		evs[1].Kind != "warning_cleared" {
		t.Errorf("events %+v", evs)
	}
	if err := s.Acknowledge(Ack{Rule: "switched_off_hot", Via: "cli"}); !errors.Is(err, ErrNotRaised) {
		t.Errorf("acknowledging a cleared warning: %v, want ErrNotRaised", err)
	}
}
