// Package sim simulates a turbocharged engine on a workshop hub dyno, and the
// devices that report it: a microcontroller writing Plenum's serial line
// protocol into a pseudo-terminal, and (later) an ECU answering OBD-II requests.
//
// The scenario is fictional: the "Brackenfell RS", a 2.0-litre turbocharged
// petrol four, strapped to the hub dyno of Tamsin Road Motor Works. Every number
// in the model is invented for the demo and the tests; none is a measurement of
// a real engine.
package sim

import (
	"math"
	"math/rand/v2"
	"time"
)

// State is the engine's physical state at one instant, in canonical units.
type State struct {
	Elapsed          time.Duration // simulated time since the cycle started
	Phase            string        // drive-cycle phase name
	EngineSpeed      float64       // rpm
	Throttle         float64       // ratio 0–1
	ManifoldPressure float64       // Pa absolute (MAP)
	BaroPressure     float64       // Pa absolute
	CompressorOut    float64       // Pa absolute, before the intercooler
	ChargeTempPre    float64       // °C, compressor outlet / intercooler inlet
	IntakeAirTemp    float64       // °C, after the intercooler (IAT)
	AmbientTemp      float64       // °C
	Humidity         float64       // relative, 0–1
	Lambda           float64       // actual air-fuel equivalence ratio
	CommandedLambda  float64       // what the ECU asks for
	OilTemp          float64       // °C
	OilPressure      float64       // Pa gauge
	CoolantTemp      float64       // °C
	ExhaustTemp      float64       // °C, turbine inlet
	AirMassFlow      float64       // kg/s, the model's true value
	Torque           float64       // N·m at the hub, as the dyno's load cell reports
	Gear             float64       // gear number (dyno pulls in 4th)
	Running          bool
}

// Params are the model constants. The defaults describe the fictional car.
type Params struct {
	Displacement    float64       // m³
	VE              float64       // volumetric efficiency, constant in the model
	WastegateBoost  float64       // Pa of boost where the wastegate opens
	SpoolStart      float64       // rpm where boost can start to build
	SpoolFull       float64       // rpm where full boost is available
	SpoolTau        time.Duration // first-order lag of boost build-up
	DumpTau         time.Duration // decay of boost after lift-off (blow-off valve open)
	IntercoolerEff  float64       // effectiveness 0–1
	CompressorEff   float64       // isentropic efficiency 0–1
	Ambient         float64       // °C
	Baro            float64       // Pa
	WarmupPerSecond float64       // °C/s oil warm-up rate at idle, compressed for the demo
	Seed            uint64
}

// DefaultParams returns the constants of the demo car.
func DefaultParams() Params {
	return Params{
		Displacement:    0.001998,
		VE:              0.90,
		WastegateBoost:  110000,
		SpoolStart:      1800,
		SpoolFull:       3400,
		SpoolTau:        450 * time.Millisecond,
		DumpTau:         150 * time.Millisecond,
		IntercoolerEff:  0.75,
		CompressorEff:   0.72,
		Ambient:         21,
		Baro:            100800,
		WarmupPerSecond: 3.2,
		Seed:            1,
	}
}

// phase is one step of the scripted drive cycle: the engine speed and throttle
// move linearly from the previous phase's end to this phase's targets.
type phase struct {
	name     string
	dur      time.Duration
	rpm      float64
	throttle float64
	lambda   float64 // commanded lambda at the end of the phase
	leanBias float64 // fuelling error added to actual lambda (a lean moment)
	running  bool
}

// cycle (read-only) is the scripted drive cycle of the demo, 60 s of simulated time: cold
// start, a rev on a cold engine, idle, two pulls to the limiter (the second with
// a lean moment under boost), cruise, a hot idle for the cool-down and switch-off.
var cycle = []phase{
	{"off", 1 * time.Second, 0, 0, 1, 0, false},
	{"cranking", 1 * time.Second, 1100, 0.02, 1, 0, true},
	{"cold_idle", 2 * time.Second, 1050, 0.02, 1, 0, true},
	{"cold_rev", 1500 * time.Millisecond, 4800, 0.45, 1, 0, true},
	{"cold_rev_drop", 1 * time.Second, 1000, 0.02, 1, 0, true},
	{"idle", 10500 * time.Millisecond, 850, 0.02, 1, 0, true},
	{"roll_to_pull", 2 * time.Second, 2000, 0.12, 1, 0, true},
	{"pull_1", 300 * time.Millisecond, 2050, 1.0, 0.80, 0, true},
	{"pull_1_sweep", 7 * time.Second, 6600, 1.0, 0.80, 0, true},
	{"lift_1", 1500 * time.Millisecond, 2200, 0.0, 1, 0, true},
	{"cruise_1", 2 * time.Second, 2000, 0.12, 1, 0, true},
	{"pull_2", 300 * time.Millisecond, 2050, 1.0, 0.80, 0, true},
	{"pull_2_sweep", 3 * time.Second, 4600, 1.0, 0.80, 0, true},
	{"pull_2_lean", 1500 * time.Millisecond, 5400, 1.0, 0.80, 0.18, true},
	{"pull_2_sweep_end", 2500 * time.Millisecond, 6600, 1.0, 0.80, 0, true},
	{"lift_2", 1500 * time.Millisecond, 1500, 0.0, 1, 0, true},
	{"hot_idle", 20 * time.Second, 850, 0.02, 1, 0, true},
	{"switch_off", 1 * time.Second, 0, 0, 1, 0, false},
}

// CycleLength is the length of one drive cycle in simulated time.
func CycleLength() time.Duration {
	var d time.Duration
	for _, p := range cycle {
		d += p.dur
	}
	return d
}

// Engine is the simulated engine. It is deterministic for a given seed and
// step sequence. Not safe for concurrent use.
type Engine struct {
	p     Params
	rng   *rand.Rand
	s     State
	t     time.Duration
	boost float64 // Pa, lagged
}

// NewEngine returns a cold engine at the start of the drive cycle.
func NewEngine(p Params) *Engine {
	e := &Engine{p: p, rng: rand.New(rand.NewPCG(p.Seed, p.Seed^0x9e3779b97f4a7c15))}
	e.reset()
	return e
}

func (e *Engine) reset() {
	e.t = 0
	e.boost = 0
	e.s = State{
		BaroPressure: e.p.Baro, ManifoldPressure: e.p.Baro, CompressorOut: e.p.Baro,
		AmbientTemp: e.p.Ambient, IntakeAirTemp: e.p.Ambient, ChargeTempPre: e.p.Ambient,
		OilTemp: e.p.Ambient, CoolantTemp: e.p.Ambient, ExhaustTemp: e.p.Ambient,
		Lambda: 1, CommandedLambda: 1, Humidity: 0.45, Gear: 4,
	}
}

// State returns the current state.
func (e *Engine) State() State { return e.s }

// where finds the phase at cycle time t and the fraction of it elapsed, plus
// the previous phase.
func where(t time.Duration) (prev, cur phase, frac float64) {
	prev = cycle[0]
	var start time.Duration
	for _, p := range cycle {
		if t < start+p.dur {
			return prev, p, float64(t-start) / float64(p.dur)
		}
		start += p.dur
		prev = p
	}
	return prev, cycle[len(cycle)-1], 1
}

// Step advances the model by dt and returns the new state. At the end of the
// cycle the engine starts again from cold.
func (e *Engine) Step(dt time.Duration) State {
	e.t += dt
	if e.t >= CycleLength() {
		e.reset()
	}
	prev, cur, f := where(e.t)
	s := &e.s
	s.Elapsed = e.t
	s.Phase = cur.name
	s.Running = cur.running
	s.EngineSpeed = prev.rpm + (cur.rpm-prev.rpm)*f
	s.Throttle = prev.throttle + (cur.throttle-prev.throttle)*f
	if cur.name == "pull_1" || cur.name == "pull_2" {
		s.Throttle = prev.throttle + (cur.throttle-prev.throttle)*math.Min(1, f*3) // a fast tip-in
	}
	if s.Running && s.EngineSpeed > 300 {
		s.EngineSpeed += e.rng.NormFloat64() * 6
	}
	dts := dt.Seconds()

	// Boost: a target from throttle and spool, a first-order lag toward it
	// (slower building, fast decay through the blow-off valve), capped by the
	// wastegate.
	spool := clamp((s.EngineSpeed-e.p.SpoolStart)/(e.p.SpoolFull-e.p.SpoolStart), 0, 1)
	target := 0.0
	if s.Running && s.Throttle > 0.5 {
		target = e.p.WastegateBoost * spool * clamp((s.Throttle-0.5)/0.4, 0, 1)
	}
	tau := e.p.SpoolTau
	if target < e.boost {
		tau = e.p.DumpTau
	}
	e.boost += (target - e.boost) * (1 - math.Exp(-dts/tau.Seconds()))
	if e.boost > e.p.WastegateBoost*1.06 {
		e.boost = e.p.WastegateBoost * 1.06
	}
	switch {
	case !s.Running:
		s.ManifoldPressure = e.p.Baro
	case e.boost > 500:
		s.ManifoldPressure = e.p.Baro + e.boost
	default:
		// Part throttle: manifold vacuum, 30 kPa at idle rising with throttle.
		vac := e.p.Baro * (0.30 + 0.70*clamp(s.Throttle/0.55, 0, 1))
		s.ManifoldPressure = vac + e.boost
	}
	s.ManifoldPressure += e.rng.NormFloat64() * 150
	s.BaroPressure = e.p.Baro + e.rng.NormFloat64()*20
	s.CompressorOut = math.Max(s.ManifoldPressure+2000*spool*s.Throttle, e.p.Baro)

	// Charge temperature: isentropic compression (γ = 1.4) at the model's
	// compressor efficiency, then the intercooler.
	t1 := e.p.Ambient + 273.15
	pr := s.CompressorOut / (e.p.Baro - 1500)
	t2s := t1 * math.Pow(math.Max(pr, 1), 0.4/1.4)
	t2 := t1 + (t2s-t1)/e.p.CompressorEff
	s.ChargeTempPre = follow(s.ChargeTempPre, t2-273.15, dts, 1.5)
	iat := s.ChargeTempPre - e.p.IntercoolerEff*(s.ChargeTempPre-e.p.Ambient)
	s.IntakeAirTemp = follow(s.IntakeAirTemp, iat+heatSoak(s), dts, 3) + e.rng.NormFloat64()*0.05

	// Fuelling.
	cmd := prev.lambda + (cur.lambda-prev.lambda)*f
	if !s.Running {
		cmd = 1
	}
	s.CommandedLambda = cmd
	actual := cmd + cur.leanBias
	if cur.leanBias == 0 && prev.leanBias != 0 {
		actual += prev.leanBias * math.Max(0, 1-f*4)
	}
	if s.Running {
		s.Lambda = follow(s.Lambda, actual, dts, 0.08) + e.rng.NormFloat64()*0.004
	} else {
		s.Lambda = follow(s.Lambda, 1.6, dts, 0.5)
	}

	// Air mass flow and torque. Torque comes from fuel energy at a plausible
	// brake efficiency, richer mixtures giving no more power than λ = 0.85.
	rho := s.ManifoldPressure / (287.05 * (s.IntakeAirTemp + 273.15))
	n := s.EngineSpeed / 60
	s.AirMassFlow = 0
	s.Torque = 0
	if s.Running && n > 0 {
		s.AirMassFlow = e.p.VE * rho * e.p.Displacement * n / 2
		fuel := s.AirMassFlow / (math.Max(s.Lambda, 0.85) * 14.7)
		eff := 0.30 - 0.06*math.Abs(s.Throttle-0.8)
		if s.Throttle < 0.05 {
			eff = 0.05
		}
		s.Torque = math.Max(0, fuel*43e6*eff/(2*math.Pi*n)-8) + e.rng.NormFloat64()*0.5
	}

	// Temperatures: oil and coolant warm with the fuel burnt (fast, for the demo),
	// coolant capped by the thermostat; exhaust temperature follows load.
	load := clamp(s.AirMassFlow/0.16, 0, 1)
	if s.Running {
		s.OilTemp = math.Min(s.OilTemp+(e.p.WarmupPerSecond*(0.3+2*load))*dts, 108)
		s.CoolantTemp = math.Min(s.CoolantTemp+e.p.WarmupPerSecond*1.2*(0.4+load)*dts, 92)
		s.ExhaustTemp = follow(s.ExhaustTemp, 300+640*load, dts, 1.2)
		s.OilPressure = 100000 + 380000*clamp(s.EngineSpeed/6000, 0, 1)*clamp(1.6-s.OilTemp/100, 0.6, 1.2)
	} else {
		s.OilPressure = 0
		s.ExhaustTemp = follow(s.ExhaustTemp, e.p.Ambient, dts, 40)
	}
	return *s
}

// heatSoak adds intake air temperature at low flow, as a hot engine bay does.
func heatSoak(s *State) float64 {
	if !s.Running {
		return 0
	}
	return clamp((s.CoolantTemp-40)/50, 0, 1) * 12 * (1 - s.Throttle)
}

func follow(cur, target, dt, tau float64) float64 {
	return cur + (target-cur)*(1-math.Exp(-dt/tau))
}

func clamp(x, lo, hi float64) float64 {
	return math.Max(lo, math.Min(hi, x))
}
