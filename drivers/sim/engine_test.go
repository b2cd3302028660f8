package sim

import (
	"math"
	"testing"
	"time"
)

func TestDriveCycleCoversTheDemo(t *testing.T) {
	e := NewEngine(DefaultParams())
	dt := 10 * time.Millisecond
	var maxBoost, maxRPM, coldRevRPM, leanLambda, hotIdleOil float64
	steps := int(CycleLength() / dt)
	for i := 0; i < steps-1; i++ {
		s := e.Step(dt)
		maxBoost = math.Max(maxBoost, s.ManifoldPressure-s.BaroPressure)
		maxRPM = math.Max(maxRPM, s.EngineSpeed)
		switch s.Phase {
		case "cold_rev":
			coldRevRPM = math.Max(coldRevRPM, s.EngineSpeed)
			if s.OilTemp > 60 {
				t.Errorf("oil %.0f °C during the cold rev: the warm-up guard would not trip", s.OilTemp)
			}
		case "pull_2_lean":
			if s.ManifoldPressure-s.BaroPressure > 50000 {
				leanLambda = math.Max(leanLambda, s.Lambda)
			}
		case "hot_idle":
			hotIdleOil = s.OilTemp
		}
		if s.Running && s.EngineSpeed > 100 && (s.AirMassFlow <= 0 || math.IsNaN(s.Torque)) {
			t.Fatalf("%s at %v: air mass flow %v torque %v", s.Phase, s.Elapsed, s.AirMassFlow, s.Torque)
		}
	}
	if maxBoost < 90000 || maxBoost > 120000 {
		t.Errorf("peak boost %.0f Pa, want about the 110 kPa wastegate limit", maxBoost)
	}
	if maxRPM < 6400 || coldRevRPM < 4000 {
		t.Errorf("peak rpm %.0f, cold rev %.0f", maxRPM, coldRevRPM)
	}
	if leanLambda < 0.92 {
		t.Errorf("lean moment under boost reached λ %.3f, want > 0.92", leanLambda)
	}
	if hotIdleOil < 85 {
		t.Errorf("oil %.0f °C at hot idle, want the engine warm", hotIdleOil)
	}
}

func TestEngineIsDeterministic(t *testing.T) {
	a, b := NewEngine(DefaultParams()), NewEngine(DefaultParams())
	for i := 0; i < 3000; i++ {
		if sa, sb := a.Step(20*time.Millisecond), b.Step(20*time.Millisecond); sa != sb {
			t.Fatalf("step %d differs: %+v vs %+v", i, sa, sb)
		}
	}
}
