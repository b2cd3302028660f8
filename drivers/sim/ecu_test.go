package sim

import (
	"bytes"
	"context"
	"math"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/drivers/can"
	"github.com/plenum-engine/plenum/drivers/obd"
)

func testECU(t *testing.T, cfg ECUConfig) *ECU {
	t.Helper()
	if cfg.Source == nil {
		cfg.Source = func() State { return State{} }
	}
	r, err := NewRig(context.Background(), RigConfig{ECU: cfg})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = r.Close() })
	return r.ECU
}

// TestEncodersRoundTrip encodes states across the drive cycle and decodes
// them with drivers/obd: every field comes back within half a count.
func TestEncodersRoundTrip(t *testing.T) {
	e := testECU(t, ECUConfig{DTCs: []obd.DTC{0x0171}})
	want := map[string]func(State) float64{
		"ecu_engine_speed":                 func(s State) float64 { return s.EngineSpeed },
		"ecu_manifold_pressure":            func(s State) float64 { return s.ManifoldPressure },
		"ecu_intake_air_temperature":       func(s State) float64 { return s.IntakeAirTemp },
		"ecu_throttle_position":            func(s State) float64 { return s.Throttle },
		"ecu_barometric_pressure":          func(s State) float64 { return s.BaroPressure },
		"ecu_commanded_lambda":             func(s State) float64 { return s.CommandedLambda },
		"ecu_o2_s1_lambda_v":               func(s State) float64 { return s.Lambda },
		"ecu_o2_s1_voltage":                func(s State) float64 { return lambdaVolts(s.Lambda) },
		"ecu_coolant_temperature":          func(s State) float64 { return s.CoolantTemp },
		"ecu_oil_temperature":              func(s State) float64 { return s.OilTemp },
		"ecu_ambient_air_temperature":      func(s State) float64 { return s.AmbientTemp },
		"ecu_mass_air_flow":                func(s State) float64 { return s.AirMassFlow * 1000 },
		"ecu_boost_pressure_a":             func(s State) float64 { return s.CompressorOut },
		"ecu_exhaust_gas_temperature_b1s1": func(s State) float64 { return s.ExhaustTemp },
		"ecu_engine_load":                  func(s State) float64 { return engineLoad(&s) },
		"ecu_vehicle_speed":                func(s State) float64 { return math.Round(vehicleSpeedKMH(&s)) / 3.6 },
		"ecu_timing_advance":               func(s State) float64 { return timingAdvance(&s) },
		"ecu_run_time":                     func(s State) float64 { return s.Elapsed.Seconds() },
		"ecu_dtc_count":                    func(State) float64 { return 1 },
		"ecu_mil_on":                       func(State) float64 { return 1 },
	}
	seen := map[string]bool{}
	eng := NewEngine(DefaultParams())
	for step := 0; step < 600; step++ {
		s := eng.Step(100 * time.Millisecond)
		for _, pid := range EncodablePIDs() {
			data := e.encode(nil, pid, &s)
			if n, _ := obd.PIDLength(pid); n != len(data) {
				t.Fatalf("PID 0x%02X: %d bytes, table says %d", uint8(pid), len(data), n)
			}
			err := obd.DecodePID(pid, data, func(_ obd.PID, ch obd.ChannelIndex, v float64) {
				c, _, _ := obd.StandardChannel(ch)
				f, ok := want[c.Name]
				if !ok {
					t.Fatalf("PID 0x%02X: unexpected channel %s", uint8(pid), c.Name)
				}
				seen[c.Name] = true
				// Half a count: the resolution is the channel's step, (Max−Min)/(counts−1).
				if w := f(s); math.Abs(v-w) > resolution(pid, c.Name)/2+1e-9 && w >= c.Min && w <= c.Max {
					t.Fatalf("t=%v PID 0x%02X %s: decoded %v, state %v", s.Elapsed, uint8(pid), c.Name, v, w)
				}
			})
			if err != nil {
				t.Fatal(err)
			}
		}
	}
	for name := range want {
		if !seen[name] {
			t.Errorf("channel %s never produced", name)
		}
	}
}

// resolution is the J1979 step of one channel (SAE J1979 / ISO 15031-5 scalings).
func resolution(pid obd.PID, name string) float64 {
	switch name {
	case "ecu_engine_speed":
		return 0.25
	case "ecu_manifold_pressure", "ecu_barometric_pressure":
		return 1000
	case "ecu_throttle_position", "ecu_engine_load":
		return 1.0 / 255
	case "ecu_commanded_lambda", "ecu_o2_s1_lambda_v":
		return 2.0 / 65536
	case "ecu_o2_s1_voltage":
		return 8.0 / 65536
	case "ecu_mass_air_flow":
		return 0.01
	case "ecu_boost_pressure_a":
		return 1000.0 / 32
	case "ecu_exhaust_gas_temperature_b1s1":
		return 0.1
	case "ecu_timing_advance":
		return 0.5
	case "ecu_vehicle_speed":
		return 1e-9 // compared after rounding to whole km/h
	}
	return 1 // °C, s, counts
}

// TestAnswer checks the request handling table directly.
func TestAnswer(t *testing.T) {
	st := State{EngineSpeed: 3000, ManifoldPressure: 150000, Throttle: 1, IntakeAirTemp: 30, Running: true}
	src := func() State { return st }
	full := testECU(t, ECUConfig{Source: src, DTCs: []obd.DTC{0x0171, 0xC158}})
	limited := testECU(t, ECUConfig{Source: src, PIDs: []obd.PID{0x0C, 0x0B}, SinglePID: true,
		NRCs: map[obd.PID]obd.NRC{0x0B: obd.NRCConditionsNotCorrect}})
	for _, c := range []struct {
		name       string
		e          *ECU
		functional bool
		req        []byte
		want       []byte
	}{
		{"rpm", full, false, []byte{0x01, 0x0C}, []byte{0x41, 0x0C, 0x2E, 0xE0}},
		{"multi", full, true, []byte{0x01, 0x0C, 0x0B, 0x11}, []byte{0x41, 0x0C, 0x2E, 0xE0, 0x0B, 150, 0x11, 255}},
		{"multi_skips_unsupported", full, true, []byte{0x01, 0x0C, 0x0A}, []byte{0x41, 0x0C, 0x2E, 0xE0}},
		{"unsupported_functional_silent", full, true, []byte{0x01, 0x0A}, nil},
		{"unsupported_physical_nrc31", full, false, []byte{0x01, 0x0A}, []byte{0x7F, 0x01, 0x31}},
		{"too_many_pids", full, false, []byte{0x01, 1, 2, 3, 4, 5, 6, 7}, []byte{0x7F, 0x01, 0x13}},
		{"bitmap00_limited", limited, true, []byte{0x01, 0x00}, []byte{0x41, 0x00, 0x00, 0x30, 0x00, 0x00}},
		{"bitmap20_limited_silent", limited, true, []byte{0x01, 0x20}, nil},
		{"bitmap20_limited_physical", limited, false, []byte{0x01, 0x20}, []byte{0x7F, 0x01, 0x31}},
		{"multi_rejected", limited, false, []byte{0x01, 0x0C, 0x0B}, []byte{0x7F, 0x01, 0x12}},
		{"multi_rejected_functional_silent", limited, true, []byte{0x01, 0x0C, 0x0B}, nil},
		{"injected_nrc", limited, false, []byte{0x01, 0x0B}, []byte{0x7F, 0x01, 0x22}},
		{"dtcs", full, false, []byte{0x03}, []byte{0x43, 2, 0x01, 0x71, 0xC1, 0x58}},
		{"vin", full, true, []byte{0x09, 0x02}, append([]byte{0x49, 0x02, 0x01}, DemoVIN...)},
		{"infotypes", full, false, []byte{0x09, 0x00}, []byte{0x49, 0x00, 0x40, 0, 0, 0}},
		{"service22_rejected", full, false, []byte{0x22, 0xF1, 0x90}, []byte{0x7F, 0x22, 0x11}},
		{"service04_silent_functional", full, true, []byte{0x04}, nil},
		{"empty_silent", full, false, []byte{}, nil},
	} {
		t.Run(c.name, func(t *testing.T) {
			w := &ecuWorker{}
			got, pend := c.e.answer(nil, w, request{functional: c.functional, payload: c.req})
			if !bytes.Equal(got, c.want) || pend {
				t.Errorf("answer to % X = % X (pending %v), want % X", c.req, got, pend, c.want)
			}
		})
	}
}

// TestFullBitmaps: the bitmaps of the default PID set chain correctly and
// describe exactly EncodablePIDs.
func TestFullBitmaps(t *testing.T) {
	e := testECU(t, ECUConfig{})
	var set obd.PIDSet
	for base := 0; ; base += 0x20 {
		got, _ := e.answer(nil, &ecuWorker{}, request{payload: []byte{0x01, byte(base)}})
		if len(got) != 6 || got[0] != 0x41 || got[1] != byte(base) {
			t.Fatalf("bitmap 0x%02X: % X", base, got)
		}
		next, err := set.AddBitmap(obd.PID(base), got[2:])
		if err != nil {
			t.Fatal(err)
		}
		if !next {
			break
		}
	}
	for p := 1; p < 256; p++ {
		if obd.IsBitmapPID(obd.PID(p)) {
			continue
		}
		if set.Has(obd.PID(p)) != encoding.encodable.Has(obd.PID(p)) {
			t.Errorf("PID 0x%02X: bitmap says %v", p, set.Has(obd.PID(p)))
		}
	}
}

func TestNewECURejects(t *testing.T) {
	b, _ := can.NewVirtualBus(can.VirtualConfig{})
	defer b.Close()
	src := func() State { return State{} }
	for name, cfg := range map[string]ECUConfig{
		"no source":   {},
		"bad vin":     {Source: src, VIN: "SHORT"},
		"unknown pid": {Source: src, PIDs: []obd.PID{0x0A}},
		"bitmap pid":  {Source: src, PIDs: []obd.PID{0x20}},
		"bad addr":    {Source: src, Addrs: []uint8{8}},
		"dup addr":    {Source: src, Addrs: []uint8{1, 1}},
		"tester addr": {Source: src, Format: obd.ID29, Addrs: []uint8{0xF1}},
		"negative p2": {Source: src, ResponseTime: -1},
		"bad format":  {Source: src, Format: 9},
	} {
		if _, err := NewECU(b.NewNode(), cfg); err == nil {
			t.Errorf("%s: accepted", name)
		}
	}
	if _, err := NewECU(nil, ECUConfig{Source: src}); err == nil {
		t.Error("nil bus accepted")
	}
}

func TestShared(t *testing.T) {
	s := NewShared(NewEngine(DefaultParams()))
	done := make(chan struct{})
	go func() {
		defer close(done)
		for i := 0; i < 100; i++ {
			_ = s.State()
		}
	}()
	var last State
	for i := 0; i < 100; i++ {
		last = s.Step(100 * time.Millisecond)
	}
	<-done
	if s.State().Elapsed != last.Elapsed || last.Elapsed != 10*time.Second {
		t.Errorf("state after 100 steps: %v / %v", s.State().Elapsed, last.Elapsed)
	}
}

// FuzzECUAnswer feeds arbitrary request payloads to the ECU's request
// handler: it must not panic, and every answer is a well-formed response
// (positive to the request's service, or 7F sid nrc to a physical request).
func FuzzECUAnswer(f *testing.F) {
	for _, s := range [][]byte{{0x01, 0x00}, {0x01, 0x0C, 0x0B, 0x11, 0x0F, 0x24, 0x0E}, {0x09, 0x02}, {0x03}, {0x01}, {0x22, 0xF1, 0x90}} {
		f.Add(s, false)
	}
	st := State{EngineSpeed: 2500, ManifoldPressure: 120000, Running: true}
	b, _ := can.NewVirtualBus(can.VirtualConfig{})
	defer b.Close()
	e, err := NewECU(b.NewNode(), ECUConfig{Source: func() State { return st }, PendingOnce: true, DTCs: []obd.DTC{0x0171}})
	if err != nil {
		f.Fatal(err)
	}
	defer e.Close()
	f.Fuzz(func(t *testing.T, req []byte, functional bool) {
		out, _ := e.answer(nil, &ecuWorker{pending: true}, request{functional: functional, payload: req})
		if len(out) == 0 {
			return
		}
		r, err := obd.ParseResponse(out)
		if err != nil {
			t.Fatalf("answer % X to % X: %v", out, req, err)
		}
		if r.Service != req[0] || (r.Negative && functional) {
			t.Fatalf("answer % X to % X (functional %v)", out, req, functional)
		}
		if !r.Negative && r.Service == 0x01 {
			if err := obd.WalkCurrentData(r.Data, func(obd.PID, []byte) {}); err != nil {
				t.Fatalf("answer % X to % X: %v", out, req, err)
			}
		}
	})
}
