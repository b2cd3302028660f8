package obdcan_test

import (
	"context"
	"math"
	"sync"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/drivers/can"
	"github.com/plenum-engine/plenum/drivers/obd"
	"github.com/plenum-engine/plenum/drivers/obdcan"
	"github.com/plenum-engine/plenum/drivers/sim"
)

// pullState is the engine 20 s into the drive cycle: on the first pull, under boost.
func pullState(t *testing.T) sim.State {
	t.Helper()
	e := sim.NewEngine(sim.DefaultParams())
	var s sim.State
	for i := 0; i < 2000; i++ {
		s = e.Step(10 * time.Millisecond)
	}
	if !s.Running || s.EngineSpeed < 2000 {
		t.Fatalf("unexpected engine state %+v", s)
	}
	return s
}

type rig struct {
	*sim.Rig
	ecu *sim.ECU
	tr  *obdcan.Transport
}

// newRig is a 500 kbit/s sim.Rig with a Transport on its own node.
func newRig(t testing.TB, cfg sim.ECUConfig) *rig {
	t.Helper()
	r, err := sim.NewRig(context.Background(), sim.RigConfig{Bus: can.VirtualConfig{BitRate: 500_000}, ECU: cfg})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = r.Close() })
	tr, err := obdcan.New(r.Node(), cfg.Format)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = tr.Close() })
	return &rig{Rig: r, ecu: r.ECU, tr: tr}
}

// readings collects the Poller's values by ECU and channel.
type readings struct {
	mu sync.Mutex
	v  map[obd.Addr]map[obd.ChannelIndex]float64
	n  map[obd.Addr]map[obd.ChannelIndex]int
}

func (r *readings) emit(a obd.Addr, _ time.Time, rs []obd.Reading) {
	r.mu.Lock()
	defer r.mu.Unlock()
	if r.v == nil {
		r.v, r.n = map[obd.Addr]map[obd.ChannelIndex]float64{}, map[obd.Addr]map[obd.ChannelIndex]int{}
	}
	if r.v[a] == nil {
		r.v[a], r.n[a] = map[obd.ChannelIndex]float64{}, map[obd.ChannelIndex]int{}
	}
	for _, x := range rs {
		r.v[a][x.Channel] = x.Value
		r.n[a][x.Channel]++
	}
}

func (r *readings) get(a obd.Addr, ch obd.ChannelIndex) (float64, int) {
	r.mu.Lock()
	defer r.mu.Unlock()
	return r.v[a][ch], r.n[a][ch]
}

// expect is one channel, its value from the engine state and the J1979 resolution.
type expect struct {
	name string
	want func(sim.State) float64
	res  float64
}

var expects = []expect{
	{"ecu_engine_speed", func(s sim.State) float64 { return s.EngineSpeed }, 0.25},
	{"ecu_manifold_pressure", func(s sim.State) float64 { return s.ManifoldPressure }, 1000},
	{"ecu_intake_air_temperature", func(s sim.State) float64 { return s.IntakeAirTemp }, 1},
	{"ecu_throttle_position", func(s sim.State) float64 { return s.Throttle }, 1.0 / 255},
	{"ecu_barometric_pressure", func(s sim.State) float64 { return s.BaroPressure }, 1000},
	{"ecu_commanded_lambda", func(s sim.State) float64 { return s.CommandedLambda }, 2.0 / 65536},
	{"ecu_o2_s1_lambda_v", func(s sim.State) float64 { return s.Lambda }, 2.0 / 65536},
	{"ecu_coolant_temperature", func(s sim.State) float64 { return s.CoolantTemp }, 1},
	{"ecu_oil_temperature", func(s sim.State) float64 { return s.OilTemp }, 1},
	{"ecu_mass_air_flow", func(s sim.State) float64 { return s.AirMassFlow * 1000 }, 0.01},
	{"ecu_boost_pressure_a", func(s sim.State) float64 { return s.CompressorOut }, 1000.0 / 32},
}

func channels(interval time.Duration) []obd.PollChannel {
	var cs []obd.PollChannel
	for _, e := range expects {
		cs = append(cs, obd.PollChannel{Name: e.name, Interval: interval})
	}
	return cs
}

// waitAll runs until every expected channel was read at least min times from each ECU.
func waitAll(t *testing.T, r *readings, ecus []obd.Addr, min int) {
	t.Helper()
	deadline := time.Now().Add(5 * time.Second)
	for time.Now().Before(deadline) {
		done := true
		for _, a := range ecus {
			for _, e := range expects {
				ch, _, _ := obd.LookupChannel(e.name)
				if _, n := r.get(a, ch); n < min {
					done = false
				}
			}
		}
		if done {
			return
		}
		time.Sleep(10 * time.Millisecond)
	}
	t.Fatalf("not every channel read %d times from %v within 5 s", min, ecus)
}

func checkValues(t *testing.T, r *readings, ecus []obd.Addr, s sim.State) {
	t.Helper()
	for _, a := range ecus {
		for _, e := range expects {
			ch, _, _ := obd.LookupChannel(e.name)
			got, _ := r.get(a, ch)
			want := e.want(s)
			if math.Abs(got-want) > e.res/2+1e-9 {
				t.Errorf("%v %s = %v, engine %v (resolution %v)", a, e.name, got, want, e.res)
			}
		}
	}
}

func runPoller(t *testing.T, cfg obd.Config) (*obd.Poller, func()) {
	t.Helper()
	p, err := obd.NewPoller(cfg)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- p.Run(ctx) }()
	return p, func() {
		cancel()
		if err := <-done; err != context.Canceled {
			t.Errorf("Run returned %v", err)
		}
	}
}

// TestPollerReadsSimECU is the end-to-end path: obd.Poller → obdcan →
// isotp → virtual CAN at 500 kbit/s → sim ECU, with discovery, multi-PID
// requests and multi-frame answers; the values agree with the engine state
// within half a J1979 count.
func TestPollerReadsSimECU(t *testing.T) {
	st := pullState(t)
	for _, c := range []struct {
		name  string
		f     obd.Format
		addrs []uint8
	}{
		{"11bit_one_ecu", obd.ID11, nil},
		{"11bit_two_ecus", obd.ID11, []uint8{0, 2}},
		{"29bit", obd.ID29, []uint8{0x10, 0x18}},
	} {
		t.Run(c.name, func(t *testing.T) {
			rg := newRig(t, sim.ECUConfig{Format: c.f, Addrs: c.addrs, Source: func() sim.State { return st }, ResponseTime: 2 * time.Millisecond})
			var r readings
			p, stop := runPoller(t, obd.Config{Transport: rg.tr, Format: c.f, Channels: channels(20 * time.Millisecond), Emit: r.emit})
			waitAll(t, &r, rg.ecu.Addrs(), 3)
			stop()
			checkValues(t, &r, rg.ecu.Addrs(), st)
			s := p.Stats()
			if len(s.ECUs) != len(rg.ecu.Addrs()) {
				t.Fatalf("poller found %d ECUs, sim has %v", len(s.ECUs), rg.ecu.Addrs())
			}
			for _, e := range s.ECUs {
				if e.MultiPID != obd.MultiYes || e.Timeouts != 0 || e.Malformed != 0 {
					t.Errorf("ECU %v: %+v", e.Addr, e)
				}
			}
		})
	}
}

// TestPollerSinglePIDECU: an ECU rejecting multi-PID requests with NRC 0x12
// makes the Poller fall back to one PID per request, and the values still agree.
func TestPollerSinglePIDECU(t *testing.T) {
	st := pullState(t)
	rg := newRig(t, sim.ECUConfig{Source: func() sim.State { return st }, SinglePID: true, ResponseTime: time.Millisecond})
	var r readings
	p, stop := runPoller(t, obd.Config{Transport: rg.tr, Channels: channels(10 * time.Millisecond), Emit: r.emit})
	waitAll(t, &r, rg.ecu.Addrs(), 2)
	stop()
	checkValues(t, &r, rg.ecu.Addrs(), st)
	s := p.Stats()
	if e := s.ECUs[0]; e.MultiPID != obd.MultiNo || e.NRCs == 0 {
		t.Errorf("ECU stats %+v: want multi-PID learned as no after an NRC", e)
	}
	if rg.ecu.Stats().Negatives == 0 {
		t.Error("sim sent no negative response")
	}
}

// TestPollerPendingAndUnsupported: NRC 0x78 once, then data; a PID the ECU
// does not support is never emitted, and one rejected with 0x31 is retired.
func TestPollerPendingAndUnsupported(t *testing.T) {
	st := pullState(t)
	pids := []obd.PID{0x0B, 0x0C, 0x0F, 0x11, 0x33}
	rg := newRig(t, sim.ECUConfig{Source: func() sim.State { return st }, PIDs: pids, PendingOnce: true,
		NRCs: map[obd.PID]obd.NRC{0x33: obd.NRCRequestOutOfRange}, ResponseTime: time.Millisecond})
	var r readings
	cs := []obd.PollChannel{
		{Name: "ecu_engine_speed", Interval: 10 * time.Millisecond},
		{Name: "ecu_manifold_pressure", Interval: 10 * time.Millisecond},
		{Name: "ecu_barometric_pressure", Interval: 10 * time.Millisecond},
		{Name: "ecu_oil_temperature", Interval: 10 * time.Millisecond}, // not supported by this ECU
	}
	p, stop := runPoller(t, obd.Config{Transport: rg.tr, Channels: cs, Emit: r.emit})
	a := rg.ecu.Addrs()[0]
	rpm, _, _ := obd.LookupChannel("ecu_engine_speed")
	deadline := time.Now().Add(5 * time.Second)
	for {
		if _, n := r.get(a, rpm); n >= 20 {
			break
		}
		if time.Now().After(deadline) {
			t.Fatal("no rpm readings")
		}
		time.Sleep(5 * time.Millisecond)
	}
	stop()
	if v, _ := r.get(a, rpm); math.Abs(v-st.EngineSpeed) > 0.125 {
		t.Errorf("rpm %v, engine %v", v, st.EngineSpeed)
	}
	for _, name := range []string{"ecu_barometric_pressure", "ecu_oil_temperature"} {
		ch, _, _ := obd.LookupChannel(name)
		if _, n := r.get(a, ch); n != 0 {
			t.Errorf("%s emitted %d times from an ECU that does not give it", name, n)
		}
	}
	if e := p.Stats().ECUs[0]; e.PendingNRCs != 1 {
		t.Errorf("pending NRCs seen %d, want 1 (%+v)", e.PendingNRCs, e)
	}
}

// TestVINAndDTCs reads service 09 (multi-frame VIN) and 03 through the Transport.
func TestVINAndDTCs(t *testing.T) {
	st := pullState(t)
	dtcs := []obd.DTC{0x0171, 0x0300, 0xC158}
	rg := newRig(t, sim.ECUConfig{Format: obd.ID29, Source: func() sim.State { return st }, DTCs: dtcs})
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Second)
	defer cancel()
	ask := func(to obd.Addr, req obd.Request) obd.Response {
		t.Helper()
		if err := rg.tr.Send(ctx, to, req); err != nil {
			t.Fatal(err)
		}
		m, err := rg.tr.Receive(ctx)
		if err != nil {
			t.Fatal(err)
		}
		if m.From != rg.ecu.Addrs()[0] {
			t.Fatalf("answer from %v", m.From)
		}
		r, err := obd.ParseResponse(m.Payload)
		if err != nil {
			t.Fatal(err)
		}
		return r
	}
	r := ask(obd.FunctionalAddr(obd.ID29), obd.VehicleInfo(0x02))
	if vin, err := obd.DecodeVIN(r.Data); err != nil || vin != sim.DemoVIN {
		t.Errorf("VIN %q %v", vin, err)
	}
	r = ask(rg.ecu.Addrs()[0], obd.StoredDTCs())
	var got []obd.DTC
	if err := obd.DecodeDTCs(r.Data, func(d obd.DTC) { got = append(got, d) }); err != nil || len(got) != 3 || got[0].String() != "P0171" || got[2].String() != "U0158" {
		t.Errorf("DTCs %v %v", got, err)
	}
	r = ask(rg.ecu.Addrs()[0], obd.ReadDID(0xF190)) // service 22 is not simulated
	if !r.Negative || r.NRC != obd.NRCServiceNotSupported {
		t.Errorf("service 22: %+v", r)
	}
}
