package turbo

import (
	"fmt"
	"math"
	"time"
)

// CoolDownConfig sets the cool-down model. Zero fields take the defaults;
// all defaults are common practice, no source.
type CoolDownConfig struct {
	// Tau is the time constant of the first-order thermal state while the
	// engine runs. Default 60 s.
	Tau time.Duration
	// IdleDrive is the temperature (°C) that idling drives the state toward
	// (an idle exhaust gas temperature). Default 250 °C.
	IdleDrive float64
	// Safe is the state temperature (°C) at or below which switching off is
	// safe. Must exceed IdleDrive. Default 350 °C.
	Safe float64
	// ProxyGain turns air mass flow into a drive temperature when there is
	// no EGT: drive = IdleDrive + ProxyGain·ṁ (°C per kg/s), capped at
	// MaxDrive. Default 4000 °C/(kg/s) (0.15 kg/s → 850 °C).
	ProxyGain float64
	// MaxDrive caps the proxy drive. Default 950 °C.
	MaxDrive float64
	// IdleRPM is the engine speed (rpm) at or below which the engine counts
	// as idling. Default 1200 rpm.
	IdleRPM float64
	// RunningRPM is the speed above which the engine counts as running.
	// Default 400 rpm.
	RunningRPM float64
	// Ambient is the temperature (°C) the state cools toward with the
	// engine off, and its starting value. Default 25 °C.
	Ambient float64
	// OffTau is the time constant of cooling with the engine off. Default
	// 20 min.
	OffTau time.Duration
}

func (c CoolDownConfig) withDefaults() CoolDownConfig {
	def := func(v *float64, d float64) {
		if *v == 0 {
			*v = d
		}
	}
	if c.Tau == 0 {
		c.Tau = 60 * time.Second
	}
	if c.OffTau == 0 {
		c.OffTau = 20 * time.Minute
	}
	def(&c.IdleDrive, 250)
	def(&c.Safe, 350)
	def(&c.ProxyGain, 4000)
	def(&c.MaxDrive, 950)
	def(&c.IdleRPM, 1200)
	def(&c.RunningRPM, 400)
	def(&c.Ambient, 25)
	return c
}

// Validate checks the configuration after defaults and names the bad field.
func (c CoolDownConfig) Validate() error {
	c = c.withDefaults()
	for _, f := range []struct {
		n string
		v float64
	}{{"idle_drive", c.IdleDrive}, {"safe", c.Safe}, {"proxy_gain", c.ProxyGain}, {"max_drive", c.MaxDrive}, {"idle_rpm", c.IdleRPM}, {"running_rpm", c.RunningRPM}, {"ambient", c.Ambient}} {
		if !finite(f.v) {
			return fmt.Errorf("cool-down: %s %g is not finite", f.n, f.v)
		}
	}
	switch {
	case c.Tau <= 0 || c.OffTau <= 0:
		return fmt.Errorf("cool-down: tau and off_tau must be positive")
	case !(c.Safe > c.IdleDrive):
		return fmt.Errorf("cool-down: safe %g °C must exceed idle_drive %g °C", c.Safe, c.IdleDrive)
	case c.ProxyGain < 0:
		return fmt.Errorf("cool-down: proxy_gain %g is negative", c.ProxyGain)
	case !(c.MaxDrive > c.IdleDrive):
		return fmt.Errorf("cool-down: max_drive %g must exceed idle_drive %g", c.MaxDrive, c.IdleDrive)
	case !(c.IdleRPM > c.RunningRPM):
		return fmt.Errorf("cool-down: idle_rpm %g must exceed running_rpm %g", c.IdleRPM, c.RunningRPM)
	}
	return nil
}

// CoolDownState is the model's state, small enough to persist across a
// restart of the daemon: the state temperature and when it was computed.
type CoolDownState struct {
	Temp float64   // °C
	Time time.Time // zero if never updated
}

// CoolDownStatus is the model's output for one sample.
type CoolDownStatus struct {
	Temp            float64       // state temperature, °C
	Drive           float64       // temperature the state is moving toward, °C
	FromEGT         bool          // Drive came from the EGT input, not the air-flow proxy
	Running, Idling bool          // engine state from rpm
	IdleRemaining   time.Duration // idling still needed before switch-off
	SafeToSwitchOff bool          // the state is at or below Safe
}

// CoolDown is the cool-down thermal model: a first-order state heated by the
// exhaust (EGT if given, else a proxy from air mass flow) and cooled at idle.
// Not safe for concurrent use.
type CoolDown struct {
	cfg CoolDownConfig
	st  CoolDownState
}

// NewCoolDown returns a model at ambient temperature (defaults applied).
func NewCoolDown(cfg CoolDownConfig) (*CoolDown, error) {
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	cfg = cfg.withDefaults()
	return &CoolDown{cfg: cfg, st: CoolDownState{Temp: cfg.Ambient}}, nil
}

// State returns the state for persistence.
func (c *CoolDown) State() CoolDownState { return c.st }

// Restore loads a persisted state. The time between the state's Time and
// now is taken as engine-off time and cooled toward Ambient with OffTau. A
// state with a non-finite temperature is rejected.
func (c *CoolDown) Restore(s CoolDownState, now time.Time) error {
	if !finite(s.Temp) {
		return fmt.Errorf("cool-down: restored temperature %g is not finite", s.Temp)
	}
	c.st = s
	if !s.Time.IsZero() && now.After(s.Time) {
		c.relax(c.cfg.Ambient, now.Sub(s.Time), c.cfg.OffTau)
		c.st.Time = now
	}
	return nil
}

// relax moves the state toward drive over dt with time constant tau (exact
// solution of the first-order lag for a constant drive).
func (c *CoolDown) relax(drive float64, dt, tau time.Duration) {
	c.st.Temp = drive + (c.st.Temp-drive)*math.Exp(-dt.Seconds()/tau.Seconds())
}

// Update advances the model to time t with engine speed (rpm), exhaust gas
// temperature (°C, NaN when there is none) and air mass flow (kg/s).
// Samples whose time does not advance only report the status.
func (c *CoolDown) Update(t time.Time, rpm, egtC, airKgS float64) CoolDownStatus {
	cfg := &c.cfg
	s := CoolDownStatus{Running: rpm > cfg.RunningRPM}
	s.Idling = s.Running && rpm <= cfg.IdleRPM
	switch {
	case !s.Running:
		s.Drive = cfg.Ambient
	case finite(egtC):
		s.Drive, s.FromEGT = egtC, true
	default:
		m := airKgS
		if !finite(m) || m < 0 {
			m = 0
		}
		s.Drive = math.Min(cfg.IdleDrive+cfg.ProxyGain*m, cfg.MaxDrive)
	}
	if c.st.Time.IsZero() {
		c.st.Time = t
	} else if t.After(c.st.Time) {
		tau := cfg.Tau
		if !s.Running {
			tau = cfg.OffTau
		}
		c.relax(s.Drive, t.Sub(c.st.Time), tau)
		c.st.Time = t
	}
	s.Temp = c.st.Temp
	s.SafeToSwitchOff = c.st.Temp <= cfg.Safe
	s.IdleRemaining = c.IdleRemaining()
	return s
}

// IdleRemaining returns how long idling (drive IdleDrive, time constant
// Tau) takes to bring the state down to Safe: τ·ln((T − T_idle)/(T_safe −
// T_idle)), 0 when already safe.
func (c *CoolDown) IdleRemaining() time.Duration {
	cfg := &c.cfg
	if c.st.Temp <= cfg.Safe {
		return 0
	}
	sec := cfg.Tau.Seconds() * math.Log((c.st.Temp-cfg.IdleDrive)/(cfg.Safe-cfg.IdleDrive))
	return time.Duration(math.Ceil(sec * 1e9))
}
