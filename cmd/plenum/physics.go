package main

import (
	"fmt"
	"math"
	"net/http"
	"sync"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/derive"
	"github.com/plenum-engine/plenum/pipeline"
)

// The derivations wire derive/'s pure functions into the pipeline graph.
// Each declares what it reads and writes; Derive does not allocate.

// airflow computes speed-density air mass flow from MAP, IAT and engine speed.
type airflow struct {
	displacement float64
	ve           float64
	table        *derive.VETable
}

func (d *airflow) Name() string { return "speed_density" }
func (d *airflow) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "manifold_pressure"}, {Name: "intake_air_temp"}, {Name: "engine_speed"}}
}
func (d *airflow) Outputs() []pipeline.Channel {
	return []pipeline.Channel{
		{Name: "air_mass_flow", Quantity: "mass_flow", Unit: pipeline.GramsPerSec, Sensor: "speed_density", Min: 0, Max: 5000},
		{Name: "volumetric_efficiency", Quantity: "volumetric_efficiency", Unit: pipeline.Ratio, Sensor: "model"},
	}
}
func (d *airflow) Derive(_ time.Time, in, out []float64) uint64 {
	ve := d.ve
	if d.table != nil {
		ve = d.table.At(in[2], in[0])
	}
	out[0] = derive.SpeedDensity(in[0], in[1], in[2], d.displacement, ve) * 1000 // g/s, the Prometheus base unit
	out[1] = ve
	return 0b11
}

// boost computes manifold gauge pressure and the compressor pressure ratio,
// from a barometric channel when fresh, else from the configured pressure.
type boost struct{ baro float64 }

func (d *boost) Name() string { return "boost" }
func (d *boost) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "manifold_pressure"}, {Name: "baro_pressure", Optional: true}}
}
func (d *boost) Outputs() []pipeline.Channel {
	return []pipeline.Channel{
		{Name: "boost_pressure", Quantity: "relative_pressure", Unit: pipeline.Pascal, Sensor: "boost", Min: -110000, Max: 500000},
		{Name: "manifold_pressure_ratio", Quantity: "pressure_ratio", Unit: pipeline.Ratio, Sensor: "manifold_to_ambient"},
	}
}
func (d *boost) Derive(_ time.Time, in, out []float64) uint64 {
	baro := in[1]
	if math.IsNaN(baro) {
		baro = d.baro
	}
	out[0] = derive.Boost(in[0], baro)
	out[1] = derive.PressureRatio(in[0], baro)
	return 0b11
}

// mixture turns the wideband controller's voltage into λ and AFR.
type mixture struct {
	wb     derive.Wideband
	stoich float64
}

func (d *mixture) Name() string { return "mixture" }
func (d *mixture) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "wideband_voltage"}}
}
func (d *mixture) Outputs() []pipeline.Channel {
	return []pipeline.Channel{
		{Name: "lambda", Quantity: "lambda", Unit: pipeline.Ratio, Sensor: "wideband", Min: 0.5, Max: 2},
		{Name: "air_fuel_ratio", Quantity: "air_fuel_ratio", Unit: pipeline.Ratio, Sensor: "wideband"},
	}
}
func (d *mixture) Derive(_ time.Time, in, out []float64) uint64 {
	out[0] = d.wb.Lambda(in[0])
	out[1] = derive.AFR(out[0], d.stoich)
	return 0b11
}

// fuelFlow computes fuel mass flow (g/s) and volume flow (m³/s) from air
// mass flow (g/s) and λ.
type fuelFlow struct{ fuel derive.Fuel }

func (d *fuelFlow) Name() string { return "fuel_flow" }
func (d *fuelFlow) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "air_mass_flow"}, {Name: "lambda"}}
}
func (d *fuelFlow) Outputs() []pipeline.Channel {
	return []pipeline.Channel{
		{Name: "fuel_mass_flow", Quantity: "mass_flow", Unit: pipeline.GramsPerSec, Sensor: "fuel"},
		{Name: "fuel_volume_flow", Quantity: "volume_flow", Unit: pipeline.CubicMetresPerS, Sensor: "fuel"},
	}
}
func (d *fuelFlow) Derive(_ time.Time, in, out []float64) uint64 {
	out[0] = derive.FuelMassFlow(in[0], in[1], d.fuel.Stoich) // g/s in, g/s out
	out[1] = derive.FuelVolumeFlow(out[0]/1000, d.fuel.Density)
	return 0b11
}

// compressorRatio is the compressor's outlet over inlet pressure, when an
// outlet sensor exists; the inlet is a pre-compressor sensor or barometric.
type compressorRatio struct{ baro float64 }

func (d *compressorRatio) Name() string { return "compressor_ratio" }
func (d *compressorRatio) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "compressor_outlet_pressure"}, {Name: "compressor_inlet_pressure", Optional: true}, {Name: "baro_pressure", Optional: true}}
}
func (d *compressorRatio) Outputs() []pipeline.Channel {
	return []pipeline.Channel{{Name: "compressor_pressure_ratio", Quantity: "pressure_ratio", Unit: pipeline.Ratio, Sensor: "compressor"}}
}
func (d *compressorRatio) Derive(_ time.Time, in, out []float64) uint64 {
	inlet := in[1]
	if math.IsNaN(inlet) {
		inlet = in[2]
	}
	if math.IsNaN(inlet) {
		inlet = d.baro
	}
	out[0] = derive.PressureRatio(in[0], inlet)
	return 1
}

// lambdaError is measured λ less the λ the ECU commands, when the ECU's
// commanded equivalence ratio (PID 0x44) is polled.
type lambdaError struct{}

func (lambdaError) Name() string { return "lambda_error" }
func (lambdaError) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "lambda"}, {Name: "ecu_commanded_lambda"}}
}
func (lambdaError) Outputs() []pipeline.Channel {
	return []pipeline.Channel{{Name: "lambda_error", Quantity: "lambda_error", Unit: pipeline.Ratio, Sensor: "measured_minus_commanded"}}
}
func (lambdaError) Derive(_ time.Time, in, out []float64) uint64 {
	out[0] = in[0] - in[1]
	return 1
}

// veEstimate is the live VE estimate from a measured MAF (the ECU's PID
// 0x10), accumulated per cell for export as CSV at /ve-table.csv.
type veEstimate struct {
	displacement float64
	mu           sync.Mutex // guards acc: the HTTP handler reads it
	acc          *derive.VEAccumulator
}

func (d *veEstimate) Name() string { return "ve_estimate" }
func (d *veEstimate) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "ecu_mass_air_flow"}, {Name: "manifold_pressure"}, {Name: "intake_air_temp"}, {Name: "engine_speed"}}
}
func (d *veEstimate) Outputs() []pipeline.Channel {
	return []pipeline.Channel{{Name: "volumetric_efficiency_measured", Quantity: "volumetric_efficiency", Unit: pipeline.Ratio, Sensor: "measured_maf"}}
}
func (d *veEstimate) Derive(_ time.Time, in, out []float64) uint64 {
	ve := derive.MeasuredVE(in[0]/1000, in[1], in[2], in[3], d.displacement)
	if math.IsNaN(ve) || in[3] < 500 {
		return 0
	}
	d.mu.Lock()
	d.acc.Add(in[3], in[1], ve)
	d.mu.Unlock()
	out[0] = ve
	return 1
}

// ServeHTTP writes the accumulated table as CSV.
func (d *veEstimate) ServeHTTP(w http.ResponseWriter, _ *http.Request) {
	w.Header().Set("Content-Type", "text/csv")
	d.mu.Lock()
	defer d.mu.Unlock()
	d.acc.WriteCSV(w)
}

// buildDerivations returns the derivations the configured channels allow.
func buildDerivations(cfg *config.Config, reg *pipeline.Registry) ([]pipeline.Derivation, error) {
	has := func(names ...string) bool {
		for _, n := range names {
			if _, ok := reg.Lookup(n); !ok {
				return false
			}
		}
		return true
	}
	e := cfg.Engine
	baro := e.BaroKPa * 1000
	fuel, err := derive.LookupFuel(e.Fuel)
	if err != nil {
		return nil, fmt.Errorf("engine.fuel: %w", err)
	}
	var ds []pipeline.Derivation
	if has("manifold_pressure", "intake_air_temp", "engine_speed") {
		af := &airflow{displacement: e.DisplacementL / 1000, ve: e.VE}
		if t := e.VETable; t != nil {
			tb := &derive.VETable{Speeds: t.SpeedsRPM, Values: t.Values}
			for _, p := range t.PressuresKPa {
				tb.Pressures = append(tb.Pressures, p*1000)
			}
			if err := tb.Validate(); err != nil {
				return nil, fmt.Errorf("engine.ve_table: %w", err)
			}
			af.table = tb
		}
		ds = append(ds, af)
	}
	if has("manifold_pressure") {
		ds = append(ds, &boost{baro: baro})
	}
	if has("wideband_voltage") && e.Wideband != (config.Wideband{}) {
		w := e.Wideband
		ds = append(ds, &mixture{wb: derive.Wideband{VoltsLow: w.VoltsLow, LambdaLow: w.LambdaLow, VoltsHigh: w.VoltsHigh, LambdaHigh: w.LambdaHigh}, stoich: fuel.Stoich})
		if has("manifold_pressure", "intake_air_temp", "engine_speed") {
			ds = append(ds, &fuelFlow{fuel: fuel})
		}
	}
	if has("compressor_outlet_pressure") {
		ds = append(ds, &compressorRatio{baro: baro})
	}
	if has("ecu_mass_air_flow", "manifold_pressure", "intake_air_temp", "engine_speed") {
		speeds := []float64{1000, 1500, 2000, 2500, 3000, 3500, 4000, 4500, 5000, 5500, 6000, 6500, 7000}
		pressures := []float64{20000, 40000, 60000, 80000, 100000, 120000, 140000, 160000, 180000, 200000, 220000, 240000}
		if t := e.VETable; t != nil {
			speeds, pressures = t.SpeedsRPM, nil
			for _, p := range t.PressuresKPa {
				pressures = append(pressures, p*1000)
			}
		}
		acc, err := derive.NewVEAccumulator(speeds, pressures)
		if err != nil {
			return nil, fmt.Errorf("engine.ve_table: %w", err)
		}
		ds = append(ds, &veEstimate{displacement: e.DisplacementL / 1000, acc: acc})
	}
	if has("wideband_voltage", "ecu_commanded_lambda") && e.Wideband != (config.Wideband{}) {
		ds = append(ds, lambdaError{})
	}
	return ds, nil
}

// buildAll returns the derivations and then the detectors for cfg over the
// channels registered in reg, and the turbo guard (nil without engine speed).
func buildAll(cfg *config.Config, reg *pipeline.Registry) ([]pipeline.Derivation, *turboGuard, error) {
	ds, err := buildDerivations(cfg, reg)
	if err != nil {
		return nil, nil, err
	}
	derived := map[string]bool{}
	for _, d := range ds {
		for _, c := range d.Outputs() {
			derived[c.Name] = true
		}
	}
	dets, guard, err := buildDetectors(cfg, reg, derived)
	if err != nil {
		return nil, nil, err
	}
	return append(ds, dets...), guard, nil
}
