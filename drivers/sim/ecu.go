package sim

import (
	"context"
	"errors"
	"fmt"
	"sync"
	"sync/atomic"
	"time"

	"github.com/plenum-engine/plenum/drivers/can"
	"github.com/plenum-engine/plenum/drivers/clock"
	"github.com/plenum-engine/plenum/drivers/isotp"
	"github.com/plenum-engine/plenum/drivers/obd"
)

// ECUConfig configures a simulated ECU. Only Source is required.
type ECUConfig struct {
	// Format is the identifier format of the bus (default obd.ID11).
	Format obd.Format
	// Addrs are the ECUs simulated on this node: indexes 0–7 for obd.ID11
	// (answering on 0x7E8+n), address bytes for obd.ID29 (0x18DAF1xx).
	// Default: ECU #1 (0) for ID11, 0x10 for ID29. Every address answers
	// alike from the same Source.
	Addrs []uint8
	// Source returns the engine state each response is encoded from. It is
	// called from the ECU's goroutines and must be safe for concurrent use
	// (Shared.State is).
	Source func() State
	// ResponseTime is the delay between receiving a request and starting the
	// response (the ECU's P2 time). Zero answers at once.
	ResponseTime time.Duration
	// PIDs are the service 01 PIDs supported (default EncodablePIDs()).
	// Supported-PID bitmaps (0x00, 0x20, …) are derived from them; PIDs the
	// simulator cannot encode are rejected by NewECU.
	PIDs []obd.PID
	// SinglePID makes the ECU reject service 01 requests carrying more than
	// one PID with MultiPIDNRC (default 0x12 subFunctionNotSupported).
	SinglePID   bool
	MultiPIDNRC obd.NRC
	// NRCs answers physical service 01 requests for these PIDs with the given
	// negative response code instead of data (functional requests get silence).
	NRCs map[obd.PID]obd.NRC
	// PendingOnce answers the first service 01 data request (not a bitmap)
	// of each ECU with NRC 0x78 (response pending) first, then the data
	// after a further ResponseTime.
	PendingOnce bool
	// VIN is returned by service 09 InfoType 02 (default DemoVIN). It must be
	// 17 characters.
	VIN string
	// DTCs are the confirmed DTCs returned by service 03 (default none); PID
	// 0x01 reports their count and the MIL.
	DTCs []obd.DTC
	// Clock times ResponseTime (default the wall clock).
	Clock clock.Clock
	// NBs and NCr are the ISO-TP timeouts (default isotp.OBDNBs, OBDNCr).
	NBs, NCr time.Duration
}

// DemoVIN is the VIN of the fictional demo car. It is invented.
const DemoVIN = "PLNBRKF20RS000001"

// ECUStats counts what a simulated ECU did.
type ECUStats struct {
	Requests  uint64 // request messages received (a functional request counts once)
	Responses uint64 // positive responses sent (one per answering ECU)
	Negatives uint64 // negative responses sent, 0x78 included
	Silent    uint64 // requests deliberately left unanswered
	Errors    uint64 // send or receive failures
}

// ECU is a simulated OBD-II ECU (or several, sharing one CAN node) answering
// SAE J1979 services 01, 03 and 09 over ISO-TP. It is read-only, like the
// vehicles Plenum talks to: every other service is rejected with NRC 0x11.
type ECU struct {
	cfg       ECUConfig
	conn      *isotp.Conn
	supported obd.PIDSet
	workers   map[uint32]*ecuWorker // by physical request ID
	cancel    context.CancelFunc
	wg        sync.WaitGroup
	stats     struct{ requests, responses, negatives, silent, errors atomic.Uint64 }
}

type ecuWorker struct {
	addr    obd.Addr
	respID  uint32
	in      chan request
	pending bool // PendingOnce still to do
}

type request struct {
	functional bool
	payload    []byte
	at         time.Time
}

// EncodablePIDs returns the service 01 PIDs the simulator can encode from a
// State, in ascending order.
func EncodablePIDs() []obd.PID {
	var out []obd.PID
	for p := 0; p < 256; p++ {
		if encoding.encodable.Has(obd.PID(p)) {
			out = append(out, obd.PID(p))
		}
	}
	return out
}

// NewECU validates cfg, attaches the simulated ECU to bus and starts serving
// requests until Close. The ECU must be the bus's only reader: on a
// VirtualBus give it its own node, on SocketCAN its own socket.
func NewECU(bus can.Bus, cfg ECUConfig) (*ECU, error) {
	if bus == nil {
		return nil, errors.New("sim: ECU bus is nil")
	}
	if cfg.Source == nil {
		return nil, errors.New("sim: ECUConfig.Source is nil")
	}
	if cfg.ResponseTime < 0 {
		return nil, fmt.Errorf("sim: ECUConfig.ResponseTime %v is negative", cfg.ResponseTime)
	}
	if cfg.Format != obd.ID11 && cfg.Format != obd.ID29 {
		return nil, fmt.Errorf("sim: ECUConfig.Format %v unknown", cfg.Format)
	}
	if len(cfg.Addrs) == 0 {
		if cfg.Format == obd.ID29 {
			cfg.Addrs = []uint8{0x10}
		} else {
			cfg.Addrs = []uint8{0}
		}
	}
	if cfg.PIDs == nil {
		cfg.PIDs = EncodablePIDs()
	}
	if cfg.MultiPIDNRC == 0 {
		cfg.MultiPIDNRC = obd.NRCSubFunctionNotSupported
	}
	if cfg.VIN == "" {
		cfg.VIN = DemoVIN
	}
	if len(cfg.VIN) != obd.VINLength {
		return nil, fmt.Errorf("sim: ECUConfig.VIN %q: %d characters, want %d", cfg.VIN, len(cfg.VIN), obd.VINLength)
	}
	if len(cfg.DTCs) > 127 {
		return nil, fmt.Errorf("sim: ECUConfig.DTCs: %d codes, at most 127 fit PID 0x01", len(cfg.DTCs))
	}
	if cfg.Clock == nil {
		cfg.Clock = clock.System{}
	}
	if cfg.NBs == 0 {
		cfg.NBs = isotp.OBDNBs
	}
	if cfg.NCr == 0 {
		cfg.NCr = isotp.OBDNCr
	}
	e := &ECU{cfg: cfg, workers: map[uint32]*ecuWorker{}}
	for i, p := range cfg.PIDs {
		if obd.IsBitmapPID(p) || !encoding.encodable.Has(p) {
			return nil, fmt.Errorf("sim: ECUConfig.PIDs[%d]: PID 0x%02X cannot be simulated", i, uint8(p))
		}
		e.supported.Add(p)
	}
	var first *ecuWorker
	respIDs := map[uint32]uint32{} // response ID → request ID, for flow control
	for i, a := range cfg.Addrs {
		addr, err := obd.PhysicalAddr(cfg.Format, a)
		if err != nil {
			return nil, fmt.Errorf("sim: ECUConfig.Addrs[%d]: %w", i, err)
		}
		rq := addr.RequestID()
		if _, dup := e.workers[rq]; dup {
			return nil, fmt.Errorf("sim: ECUConfig.Addrs[%d]: address %v repeated", i, addr)
		}
		rs, _ := addr.ResponseID()
		w := &ecuWorker{addr: addr, respID: rs, in: make(chan request, 16), pending: cfg.PendingOnce}
		e.workers[rq] = w
		respIDs[rs] = rq
		if first == nil {
			first = w
		}
	}
	functional := obd.FunctionalAddr(cfg.Format).RequestID()
	firstRq := first.addr.RequestID()
	conn, err := isotp.NewConn(bus, isotp.Config{
		TxID: first.respID, RxID: firstRq, Extended: cfg.Format == obd.ID29,
		Accept: func(id uint32) (uint32, bool) {
			if id == functional {
				return first.respID, true // single frames only: no flow control is ever sent
			}
			if w, ok := e.workers[id]; ok {
				return w.respID, true
			}
			return 0, false
		},
		NBs: cfg.NBs, NCr: cfg.NCr,
	})
	if err != nil {
		return nil, fmt.Errorf("sim: ECU: %w", err)
	}
	e.conn = conn
	ctx, cancel := context.WithCancel(context.Background())
	e.cancel = cancel
	for _, w := range e.workers {
		e.wg.Add(1)
		go func() { defer e.wg.Done(); e.serve(ctx, w) }()
	}
	e.wg.Add(1)
	go func() { defer e.wg.Done(); e.receive(ctx, functional) }()
	return e, nil
}

// Addrs returns the physical addresses the ECU answers on.
func (e *ECU) Addrs() []obd.Addr {
	out := make([]obd.Addr, 0, len(e.cfg.Addrs))
	for _, a := range e.cfg.Addrs {
		addr, _ := obd.PhysicalAddr(e.cfg.Format, a)
		out = append(out, addr)
	}
	return out
}

// Stats returns a snapshot of the counters.
func (e *ECU) Stats() ECUStats {
	return ECUStats{Requests: e.stats.requests.Load(), Responses: e.stats.responses.Load(),
		Negatives: e.stats.negatives.Load(), Silent: e.stats.silent.Load(), Errors: e.stats.errors.Load()}
}

// Close stops the ECU. It does not close the bus.
func (e *ECU) Close() error {
	e.cancel()
	err := e.conn.Close()
	e.wg.Wait()
	return err
}

// receive hands each request to the ECUs it addresses.
func (e *ECU) receive(ctx context.Context, functional uint32) {
	for {
		m, err := e.conn.Receive(ctx)
		if ctx.Err() != nil || errors.Is(err, isotp.ErrClosed) {
			return
		}
		if err != nil {
			e.stats.errors.Add(1)
			continue
		}
		e.stats.requests.Add(1)
		r := request{functional: m.ID == functional, payload: m.Payload, at: e.cfg.Clock.Now()}
		for id, w := range e.workers {
			if r.functional || id == m.ID {
				select {
				case w.in <- r:
				default: // a real ECU busy with an earlier request drops this one too
					e.stats.silent.Add(1)
				}
			}
		}
	}
}

// serve answers the requests of one ECU address, one at a time.
func (e *ECU) serve(ctx context.Context, w *ecuWorker) {
	var buf []byte
	for {
		var r request
		select {
		case <-ctx.Done():
			return
		case r = <-w.in:
		}
		if !e.wait(ctx, r.at.Add(e.cfg.ResponseTime)) {
			return
		}
		var pendingFirst bool
		buf, pendingFirst = e.answer(buf[:0], w, r)
		if len(buf) == 0 {
			e.stats.silent.Add(1)
			continue
		}
		if pendingFirst {
			if !e.send(ctx, w, []byte{0x7F, r.payload[0], byte(obd.NRCRequestCorrectlyReceivedResponsePending)}) ||
				!e.wait(ctx, e.cfg.Clock.Now().Add(e.cfg.ResponseTime)) {
				continue
			}
		}
		e.send(ctx, w, buf)
	}
}

func (e *ECU) wait(ctx context.Context, until time.Time) bool {
	if d := until.Sub(e.cfg.Clock.Now()); d > 0 {
		select {
		case <-ctx.Done():
			return false
		case <-e.cfg.Clock.After(d):
		}
	}
	return true
}

func (e *ECU) send(ctx context.Context, w *ecuWorker, p []byte) bool {
	if err := e.conn.SendTo(ctx, w.respID, p); err != nil {
		if ctx.Err() == nil {
			e.stats.errors.Add(1)
		}
		return false
	}
	if p[0] == 0x7F {
		e.stats.negatives.Add(1)
	} else {
		e.stats.responses.Add(1)
	}
	return true
}

// answer builds the response to r into dst; an empty result means silence.
// pendingFirst asks for an NRC 0x78 before it.
func (e *ECU) answer(dst []byte, w *ecuWorker, r request) (out []byte, pendingFirst bool) {
	p := r.payload
	base := len(dst)
	if len(p) == 0 { // ISO-TP delivers no empty message; stay silent if one came
		return dst, false
	}
	neg := func(nrc obd.NRC) []byte {
		if r.functional { // functional requests are never answered negatively here
			return dst[:base]
		}
		return append(dst[:base], 0x7F, p[0], byte(nrc))
	}
	switch p[0] {
	case 0x01:
		pids := p[1:]
		if len(pids) == 0 || len(pids) > obd.MaxPIDsPerRequest {
			return neg(obd.NRCIncorrectMessageLengthOrInvalidFormat), false
		}
		if len(pids) > 1 && e.cfg.SinglePID {
			return neg(e.cfg.MultiPIDNRC), false
		}
		if len(pids) == 1 {
			if nrc, ok := e.cfg.NRCs[obd.PID(pids[0])]; ok {
				return neg(nrc), false
			}
		}
		st := e.cfg.Source()
		dst = append(dst, 0x41)
		data := false
		for _, b := range pids {
			pid := obd.PID(b)
			switch {
			case obd.IsBitmapPID(pid):
				if pid != 0 && !e.bitmapSupported(pid) {
					continue
				}
				dst = append(dst, b)
				dst = e.appendBitmap(dst, pid)
			case e.supported.Has(pid):
				if _, rejected := e.cfg.NRCs[pid]; rejected {
					continue
				}
				dst = append(dst, b)
				dst = e.encode(dst, pid, &st)
				data = true
			}
		}
		if len(dst) == base+1 {
			return neg(obd.NRCRequestOutOfRange), false
		}
		if data && w.pending {
			w.pending = false
			return dst, true
		}
		return dst, false
	case 0x03:
		dst = append(dst, 0x43, byte(len(e.cfg.DTCs)))
		for _, d := range e.cfg.DTCs {
			dst = append(dst, byte(d>>8), byte(d))
		}
		return dst, false
	case 0x09:
		if len(p) != 2 {
			return neg(obd.NRCIncorrectMessageLengthOrInvalidFormat), false
		}
		switch p[1] {
		case 0x00: // supported InfoTypes: 02 (VIN) only; A6 is InfoType 02
			return append(dst, 0x49, 0x00, 0x40, 0, 0, 0), false
		case 0x02:
			dst = append(dst, 0x49, 0x02, 0x01)
			return append(dst, e.cfg.VIN...), false
		}
		return neg(obd.NRCRequestOutOfRange), false
	}
	return neg(obd.NRCServiceNotSupported), false
}

// bitmapSupported reports whether bitmap PID base is supported: some PID
// above base is, which the previous bitmap announces with its bit D0.
func (e *ECU) bitmapSupported(base obd.PID) bool {
	for p := int(base) + 1; p < 256; p++ {
		if e.supported.Has(obd.PID(p)) {
			return true
		}
	}
	return false
}

// appendBitmap appends the 4-byte supported-PID bitmap for base: bit A7 is
// PID base+1 … D0 base+0x20, set for base+0x20 when a later bitmap has
// anything (SAE J1979 / ISO 15031-5).
func (e *ECU) appendBitmap(dst []byte, base obd.PID) []byte {
	var b [4]byte
	for i := 0; i < 32; i++ {
		p := int(base) + 1 + i
		if p > 0xFF {
			break
		}
		if e.supported.Has(obd.PID(p)) || (i == 31 && e.bitmapSupported(obd.PID(p))) {
			b[i/8] |= 0x80 >> (i % 8)
		}
	}
	return append(dst, b[:]...)
}

// Timing advance and vehicle speed are not in the engine model; these
// invented constants make them plausible for the demo car in 4th gear.
const (
	kmhPer1000RPM = 36.0  // road speed per 1000 rpm in the dyno gear, invented
	stdAirDensity = 1.184 // kg/m³ at 25 °C and 101.325 kPa, from memory
)

// stateValue gives one standard OBD channel's value, in its canonical unit,
// for engine state s.
type stateValue func(s *State, e *ECU) float64

// stateChannels are the standard OBD channels the simulator reports, by
// name. Their bytes come from obd.EncodePID, which reads the same table the
// Poller decodes with, so encoder and decoder cannot disagree.
var stateChannels = map[string]stateValue{
	"ecu_mil_on": func(_ *State, e *ECU) float64 { // A7
		if len(e.cfg.DTCs) > 0 {
			return 1
		}
		return 0
	},
	"ecu_dtc_count":                    func(_ *State, e *ECU) float64 { return float64(len(e.cfg.DTCs)) },
	"ecu_engine_load":                  func(s *State, _ *ECU) float64 { return engineLoad(s) },
	"ecu_coolant_temperature":          func(s *State, _ *ECU) float64 { return s.CoolantTemp },
	"ecu_manifold_pressure":            func(s *State, _ *ECU) float64 { return s.ManifoldPressure },
	"ecu_engine_speed":                 func(s *State, _ *ECU) float64 { return s.EngineSpeed },
	"ecu_vehicle_speed":                func(s *State, _ *ECU) float64 { return vehicleSpeedKMH(s) / 3.6 },
	"ecu_timing_advance":               func(s *State, _ *ECU) float64 { return timingAdvance(s) },
	"ecu_intake_air_temperature":       func(s *State, _ *ECU) float64 { return s.IntakeAirTemp },
	"ecu_mass_air_flow":                func(s *State, _ *ECU) float64 { return s.AirMassFlow * 1000 },
	"ecu_throttle_position":            func(s *State, _ *ECU) float64 { return s.Throttle },
	"ecu_run_time":                     func(s *State, _ *ECU) float64 { return s.Elapsed.Seconds() },
	"ecu_o2_s1_lambda_v":               func(s *State, _ *ECU) float64 { return s.Lambda },
	"ecu_o2_s1_voltage":                func(s *State, _ *ECU) float64 { return lambdaVolts(s.Lambda) },
	"ecu_barometric_pressure":          func(s *State, _ *ECU) float64 { return s.BaroPressure },
	"ecu_commanded_lambda":             func(s *State, _ *ECU) float64 { return s.CommandedLambda },
	"ecu_ambient_air_temperature":      func(s *State, _ *ECU) float64 { return s.AmbientTemp },
	"ecu_oil_temperature":              func(s *State, _ *ECU) float64 { return s.OilTemp },
	"ecu_boost_pressure_a":             func(s *State, _ *ECU) float64 { return s.CompressorOut },
	"ecu_exhaust_gas_temperature_b1s1": func(s *State, _ *ECU) float64 { return s.ExhaustTemp },
}

// encoding is stateChannels resolved against the obd table once: the value
// function per ChannelIndex and the PIDs whose every field the simulator can
// fill (a multi-sensor PID needs one).
var encoding = func() (enc struct {
	values    []stateValue
	encodable obd.PIDSet
}) {
	enc.values = make([]stateValue, obd.NumStandardChannels())
	for name, f := range stateChannels {
		ch, _, ok := obd.LookupChannel(name)
		if !ok {
			panic("sim: " + name + " is not a standard OBD channel")
		}
		enc.values[ch] = f
	}
	for p := 1; p < 256; p++ {
		pid := obd.PID(p)
		if !obd.KnownPID(pid) || obd.IsBitmapPID(pid) {
			continue
		}
		some := false
		obd.PIDChannels(pid, func(ch obd.ChannelIndex) { some = some || enc.values[ch] != nil })
		if _, err := obd.EncodePID(nil, pid, func(ch obd.ChannelIndex) (float64, bool) { return 0, enc.values[ch] != nil }); some && err == nil {
			enc.encodable.Add(pid)
		}
	}
	return enc
}()

// encode appends the data bytes of PID pid (without the echo) for state s.
func (e *ECU) encode(dst []byte, pid obd.PID, s *State) []byte {
	out, err := obd.EncodePID(dst, pid, func(ch obd.ChannelIndex) (float64, bool) {
		if f := encoding.values[ch]; f != nil {
			return f(s, e), true
		}
		return 0, false
	})
	if err != nil { // only a NaN in the state fails an encodable PID: send zero counts
		return append(dst, make([]byte, pidLength(pid))...)
	}
	return out
}

func pidLength(pid obd.PID) int { n, _ := obd.PIDLength(pid); return n }

// engineLoad is the model's calculated load: air mass flow over the flow of
// an ideal fill at standard density (the J1979 definition uses the peak
// flow at wide-open throttle; this is a simplification).
func engineLoad(s *State) float64 {
	p := DefaultParams()
	ideal := stdAirDensity * p.Displacement * s.EngineSpeed / 60 / 2
	if ideal <= 0 {
		return 0
	}
	return clamp(s.AirMassFlow/ideal, 0, 1)
}

// vehicleSpeedKMH is the road speed the hub dyno shows in the dyno gear.
func vehicleSpeedKMH(s *State) float64 {
	if !s.Running {
		return 0
	}
	return s.EngineSpeed / 1000 * kmhPer1000RPM
}

// timingAdvance is an invented ignition map: more advance with speed, less
// with manifold pressure, in degrees before top dead centre.
func timingAdvance(s *State) float64 {
	if !s.Running {
		return 0
	}
	return clamp(8+18*clamp(s.EngineSpeed/6000, 0, 1)-14*clamp((s.ManifoldPressure-30000)/180000, 0, 1), -10, 45)
}

// Shared makes one Engine usable from several goroutines, so the serial
// microcontroller simulator and the simulated ECU report the same engine.
type Shared struct {
	mu sync.Mutex
	e  *Engine
	s  State
}

// NewShared wraps e.
func NewShared(e *Engine) *Shared { return &Shared{e: e, s: e.State()} }

// Step advances the engine by dt and returns the new state.
func (s *Shared) Step(dt time.Duration) State {
	s.mu.Lock()
	defer s.mu.Unlock()
	s.s = s.e.Step(dt)
	return s.s
}

// State returns the state after the last Step; it fits ECUConfig.Source.
func (s *Shared) State() State {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.s
}
