package pipeline

import (
	"sort"
	"strings"
	"time"
)

// Origin says where a catalogued channel's values come from.
type Origin uint8

// Origins.
const (
	// FromInput is a sensor reading from a driver (the microcontroller's inputs).
	FromInput Origin = iota + 1
	// FromOBD is a value read from the ECU over SAE J1979.
	FromOBD
	// FromDerived is computed by a derivation from other channels.
	FromDerived
)

// String names the origin as configurations and documents do.
func (o Origin) String() string {
	switch o {
	case FromInput:
		return "input"
	case FromOBD:
		return "obd"
	case FromDerived:
		return "derived"
	}
	return "unknown"
}

// catalogue is every channel Plenum writes: the single source of each
// channel's name, quantity, canonical unit, origin, range, maximum age and
// description. A name ending in "_" is a family: warning_ stands for
// warning_<rule> of every rule. Read-only.
var catalogue = []Channel{
	// Inputs: what a configuration maps the microcontroller's readings to.
	{Name: "engine_speed", Origin: FromInput, Quantity: "engine_speed", Unit: RPM, Sensor: "crank", Min: 0, Max: 20000,
		Description: "Crankshaft speed."},
	{Name: "throttle_position", Origin: FromInput, Quantity: "throttle_position", Unit: Ratio, Sensor: "throttle", Min: -0.05, Max: 1.05,
		Description: "Throttle opening, 0 closed to 1 wide open."},
	{Name: "manifold_pressure", Origin: FromInput, Quantity: "pressure", Unit: Pascal, Sensor: "manifold", Min: 5000, Max: 500000,
		Description: "Absolute pressure in the intake manifold (MAP)."},
	{Name: "baro_pressure", Origin: FromInput, Quantity: "pressure", Unit: Pascal, Sensor: "barometric", Min: 50000, Max: 110000, MaxAge: 10 * time.Second,
		Description: "Barometric (ambient absolute) pressure."},
	{Name: "compressor_inlet_pressure", Origin: FromInput, Quantity: "pressure", Unit: Pascal, Sensor: "compressor_inlet", Min: 50000, Max: 110000,
		Description: "Absolute pressure before the compressor, after the air filter."},
	{Name: "compressor_outlet_pressure", Origin: FromInput, Quantity: "pressure", Unit: Pascal, Sensor: "compressor_outlet", Min: 20000, Max: 600000,
		Description: "Absolute pressure after the compressor, before the intercooler."},
	{Name: "intake_air_temp", Origin: FromInput, Quantity: "temperature", Unit: Celsius, Sensor: "intake_air", Min: -40, Max: 150,
		Description: "Intake air temperature in the manifold (IAT), after the intercooler."},
	{Name: "charge_temp_pre_cooler", Origin: FromInput, Quantity: "temperature", Unit: Celsius, Sensor: "charge_pre_cooler", Min: -40, Max: 250,
		Description: "Charge-air temperature after the compressor, before the intercooler."},
	{Name: "ambient_temp", Origin: FromInput, Quantity: "temperature", Unit: Celsius, Sensor: "ambient", Min: -40, Max: 60, MaxAge: 10 * time.Second,
		Description: "Ambient air temperature at the engine's air intake."},
	{Name: "ambient_humidity", Origin: FromInput, Quantity: "relative_humidity", Unit: Ratio, Sensor: "ambient", Min: 0, Max: 1, MaxAge: 30 * time.Second,
		Description: "Relative humidity of the ambient air, 0 to 1."},
	{Name: "coolant_temp", Origin: FromInput, Quantity: "temperature", Unit: Celsius, Sensor: "coolant", Min: -40, Max: 150,
		Description: "Engine coolant temperature."},
	{Name: "oil_temp", Origin: FromInput, Quantity: "temperature", Unit: Celsius, Sensor: "oil", Min: -40, Max: 180,
		Description: "Engine oil temperature (it also cools the turbocharger's bearings)."},
	{Name: "exhaust_temp", Origin: FromInput, Quantity: "temperature", Unit: Celsius, Sensor: "exhaust", Min: -40, Max: 1200,
		Description: "Exhaust gas temperature before the turbine (EGT)."},
	{Name: "oil_pressure", Origin: FromInput, Quantity: "relative_pressure", Unit: Pascal, Sensor: "oil", Min: -10000, Max: 1200000,
		Description: "Engine oil pressure above ambient (gauge)."},
	{Name: "wideband_voltage", Origin: FromInput, Quantity: "voltage", Unit: Volts, Sensor: "wideband", Min: -0.1, Max: 5.2,
		Description: "Analog output of the wideband λ controller."},
	{Name: "dyno_torque", Origin: FromInput, Quantity: "torque", Unit: NewtonMetres, Sensor: "dyno", Min: -2000, Max: 5000,
		Description: "Torque measured by the dynamometer, referred to the crankshaft."},
	{Name: "gear", Origin: FromInput, Quantity: "gear", Unit: None, Sensor: "gearbox", Min: -1, Max: 10,
		Description: "Engaged gear: 0 neutral, -1 reverse."},

	// Derived: what the derivations compute.
	{Name: "air_mass_flow", Origin: FromDerived, Quantity: "mass_flow", Unit: GramsPerSec, Sensor: "speed_density", Min: 0, Max: 5000,
		Description: "Air mass flow into the engine by speed-density from MAP, IAT, engine speed and volumetric efficiency."},
	{Name: "volumetric_efficiency", Origin: FromDerived, Quantity: "volumetric_efficiency", Unit: Ratio, Sensor: "model",
		Description: "Volumetric efficiency used by speed-density: the configured value or the VE table's."},
	{Name: "volumetric_efficiency_measured", Origin: FromDerived, Quantity: "volumetric_efficiency", Unit: Ratio, Sensor: "measured_maf",
		Description: "Volumetric efficiency implied by the ECU's mass air flow reading."},
	{Name: "boost_pressure", Origin: FromDerived, Quantity: "relative_pressure", Unit: Pascal, Sensor: "boost", Min: -110000, Max: 500000,
		Description: "Boost: manifold pressure above barometric (negative under vacuum)."},
	{Name: "manifold_pressure_ratio", Origin: FromDerived, Quantity: "pressure_ratio", Unit: Ratio, Sensor: "manifold_to_ambient",
		Description: "Manifold absolute pressure over barometric pressure."},
	{Name: "lambda", Origin: FromDerived, Quantity: "lambda", Unit: Ratio, Sensor: "wideband", Min: 0.5, Max: 2,
		Description: "Air-fuel equivalence ratio λ from the wideband controller: 1 is stoichiometric."},
	{Name: "air_fuel_ratio", Origin: FromDerived, Quantity: "air_fuel_ratio", Unit: Ratio, Sensor: "wideband",
		Description: "Air-fuel mass ratio (AFR) for the configured fuel: λ times its stoichiometric ratio."},
	{Name: "fuel_mass_flow", Origin: FromDerived, Quantity: "mass_flow", Unit: GramsPerSec, Sensor: "fuel",
		Description: "Fuel mass flow from air mass flow, λ and the fuel's stoichiometric ratio."},
	{Name: "fuel_volume_flow", Origin: FromDerived, Quantity: "volume_flow", Unit: CubicMetresPerS, Sensor: "fuel",
		Description: "Fuel volume flow: fuel mass flow over the fuel's density."},
	{Name: "compressor_pressure_ratio", Origin: FromDerived, Quantity: "pressure_ratio", Unit: Ratio, Sensor: "compressor",
		Description: "Compressor outlet over inlet absolute pressure."},
	{Name: "lambda_error", Origin: FromDerived, Quantity: "lambda_error", Unit: Ratio, Sensor: "measured_minus_commanded",
		Description: "Measured λ minus the λ the ECU commands."},
	{Name: "compressor_efficiency", Origin: FromDerived, Quantity: "compressor_efficiency", Unit: Ratio, Sensor: "isentropic",
		Description: "Isentropic efficiency of the compressor from its pressure ratio and temperature rise."},
	{Name: "corrected_compressor_flow", Origin: FromDerived, Quantity: "corrected_mass_flow", Unit: GramsPerSec, Sensor: "compressor",
		Description: "Air mass flow corrected to the compressor map's reference inlet conditions."},
	{Name: "intercooler_effectiveness", Origin: FromDerived, Quantity: "intercooler_effectiveness", Unit: Ratio, Sensor: "intercooler",
		Description: "Share of the possible charge-air cooling the intercooler achieves, 0 to 1."},
	{Name: "brake_power", Origin: FromDerived, Quantity: "power", Unit: Watts, Sensor: "observed",
		Description: "Power from dyno torque and engine speed, as observed."},
	{Name: "corrected_power", Origin: FromDerived, Quantity: "power", Unit: Watts, Sensor: "corrected",
		Description: "Brake power corrected to the reference conditions of the configured standard."},
	{Name: "correction_factor", Origin: FromDerived, Quantity: "power_correction_factor", Unit: Ratio, Sensor: "standard",
		Description: "Factor of the configured power-correction standard for the ambient conditions."},
	{Name: "bsfc", Origin: FromDerived, Quantity: "brake_specific_fuel_consumption", Unit: GramsPerJoule, Sensor: "dyno",
		Description: "Brake-specific fuel consumption: fuel mass flow over brake power."},
	{Name: "turbo_warmup_warning", Origin: FromDerived, Quantity: "warmup_warning", Unit: None, Sensor: "turbo_guard",
		Description: "1 while the engine is loaded before its oil is warm enough for the turbocharger."},
	{Name: "turbo_thermal_state", Origin: FromDerived, Quantity: "temperature", Unit: Celsius, Sensor: "turbo_thermal_model",
		Description: "Modelled temperature of the turbocharger's bearing housing."},
	{Name: "cooldown_idle_remaining", Origin: FromDerived, Quantity: "cooldown_idle_remaining", Unit: Seconds, Sensor: "turbo_guard",
		Description: "Idling still needed before switching off, so the turbocharger is not heat-soaked."},
	{Name: "safe_to_switch_off", Origin: FromDerived, Quantity: "switch_off_safe", Unit: None, Sensor: "turbo_guard",
		Description: "1 once the turbocharger has cooled enough to switch off."},
	{Name: "turbo_shutdown_hot", Origin: FromDerived, Quantity: "shutdown_hot", Unit: None, Sensor: "turbo_guard", MaxAge: time.Hour,
		Description: "1 after the engine was switched off with the turbocharger hot."},
	{Name: "warning_", Origin: FromDerived, Quantity: "warning_active", Unit: None, MaxAge: time.Hour,
		Description: "1 while the warning rule of that name is raised."},

	// OBD: SAE J1979 service 01, decoded by drivers/obd.
	{Name: "ecu_mil_on", Origin: FromOBD, Quantity: "status", Unit: None, Min: 0, Max: 1,
		Description: "ECU, service 01 PID 0x01: mil on."},
	{Name: "ecu_dtc_count", Origin: FromOBD, Quantity: "count", Unit: Count, Min: 0, Max: 127,
		Description: "ECU, service 01 PID 0x01: dtc count."},
	{Name: "ecu_engine_load", Origin: FromOBD, Quantity: "load", Unit: Ratio, Min: 0, Max: 1,
		Description: "ECU, service 01 PID 0x04: engine load."},
	{Name: "ecu_coolant_temperature", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 215,
		Description: "ECU, service 01 PID 0x05: coolant temperature."},
	{Name: "ecu_short_fuel_trim_bank1", Origin: FromOBD, Quantity: "fuel_trim", Unit: Ratio, Min: -1, Max: 0.9921875,
		Description: "ECU, service 01 PID 0x06: short fuel trim bank 1."},
	{Name: "ecu_long_fuel_trim_bank1", Origin: FromOBD, Quantity: "fuel_trim", Unit: Ratio, Min: -1, Max: 0.9921875,
		Description: "ECU, service 01 PID 0x07: long fuel trim bank 1."},
	{Name: "ecu_short_fuel_trim_bank2", Origin: FromOBD, Quantity: "fuel_trim", Unit: Ratio, Min: -1, Max: 0.9921875,
		Description: "ECU, service 01 PID 0x08: short fuel trim bank 2."},
	{Name: "ecu_long_fuel_trim_bank2", Origin: FromOBD, Quantity: "fuel_trim", Unit: Ratio, Min: -1, Max: 0.9921875,
		Description: "ECU, service 01 PID 0x09: long fuel trim bank 2."},
	{Name: "ecu_fuel_pressure", Origin: FromOBD, Quantity: "pressure", Unit: Pascal, Min: 0, Max: 765000,
		Description: "ECU, service 01 PID 0x0A: fuel pressure."},
	{Name: "ecu_manifold_pressure", Origin: FromOBD, Quantity: "pressure", Unit: Pascal, Min: 0, Max: 255000,
		Description: "ECU, service 01 PID 0x0B: manifold pressure."},
	{Name: "ecu_engine_speed", Origin: FromOBD, Quantity: "engine_speed", Unit: RPM, Min: 0, Max: 16383.75,
		Description: "ECU, service 01 PID 0x0C: engine speed."},
	{Name: "ecu_vehicle_speed", Origin: FromOBD, Quantity: "vehicle_speed", Unit: MetresPerSecond, Min: 0, Max: 70.83333333333334,
		Description: "ECU, service 01 PID 0x0D: vehicle speed."},
	{Name: "ecu_timing_advance", Origin: FromOBD, Quantity: "angle", Unit: Degrees, Min: -64, Max: 63.5,
		Description: "ECU, service 01 PID 0x0E: timing advance."},
	{Name: "ecu_intake_air_temperature", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 215,
		Description: "ECU, service 01 PID 0x0F: intake air temperature."},
	{Name: "ecu_mass_air_flow", Origin: FromOBD, Quantity: "mass_flow", Unit: GramsPerSec, Min: 0, Max: 655.35,
		Description: "ECU, service 01 PID 0x10: mass air flow."},
	{Name: "ecu_throttle_position", Origin: FromOBD, Quantity: "throttle_position", Unit: Ratio, Min: 0, Max: 1,
		Description: "ECU, service 01 PID 0x11: throttle position."},
	{Name: "ecu_run_time", Origin: FromOBD, Quantity: "time", Unit: Seconds, Min: 0, Max: 65535,
		Description: "ECU, service 01 PID 0x1F: run time."},
	{Name: "ecu_fuel_rail_pressure_relative", Origin: FromOBD, Quantity: "pressure", Unit: Pascal, Min: 0, Max: 5.177265e+06,
		Description: "ECU, service 01 PID 0x22: fuel rail pressure relative."},
	{Name: "ecu_fuel_rail_gauge_pressure", Origin: FromOBD, Quantity: "pressure", Unit: Pascal, Min: 0, Max: 6.5535e+08,
		Description: "ECU, service 01 PID 0x23: fuel rail gauge pressure."},
	{Name: "ecu_o2_s1_lambda_v", Origin: FromOBD, Quantity: "lambda", Unit: Ratio, Min: 0, Max: 1.999969482421875,
		Description: "ECU, service 01 PID 0x24: oxygen sensor 1 λ (voltage type)."},
	{Name: "ecu_o2_s1_voltage", Origin: FromOBD, Quantity: "voltage", Unit: Volts, Min: 0, Max: 7.9998779296875,
		Description: "ECU, service 01 PID 0x24: oxygen sensor 1 voltage."},
	{Name: "ecu_o2_s2_lambda_v", Origin: FromOBD, Quantity: "lambda", Unit: Ratio, Min: 0, Max: 1.999969482421875,
		Description: "ECU, service 01 PID 0x25: oxygen sensor 2 λ (voltage type)."},
	{Name: "ecu_o2_s2_voltage", Origin: FromOBD, Quantity: "voltage", Unit: Volts, Min: 0, Max: 7.9998779296875,
		Description: "ECU, service 01 PID 0x25: oxygen sensor 2 voltage."},
	{Name: "ecu_o2_s3_lambda_v", Origin: FromOBD, Quantity: "lambda", Unit: Ratio, Min: 0, Max: 1.999969482421875,
		Description: "ECU, service 01 PID 0x26: oxygen sensor 3 λ (voltage type)."},
	{Name: "ecu_o2_s3_voltage", Origin: FromOBD, Quantity: "voltage", Unit: Volts, Min: 0, Max: 7.9998779296875,
		Description: "ECU, service 01 PID 0x26: oxygen sensor 3 voltage."},
	{Name: "ecu_o2_s4_lambda_v", Origin: FromOBD, Quantity: "lambda", Unit: Ratio, Min: 0, Max: 1.999969482421875,
		Description: "ECU, service 01 PID 0x27: oxygen sensor 4 λ (voltage type)."},
	{Name: "ecu_o2_s4_voltage", Origin: FromOBD, Quantity: "voltage", Unit: Volts, Min: 0, Max: 7.9998779296875,
		Description: "ECU, service 01 PID 0x27: oxygen sensor 4 voltage."},
	{Name: "ecu_o2_s5_lambda_v", Origin: FromOBD, Quantity: "lambda", Unit: Ratio, Min: 0, Max: 1.999969482421875,
		Description: "ECU, service 01 PID 0x28: oxygen sensor 5 λ (voltage type)."},
	{Name: "ecu_o2_s5_voltage", Origin: FromOBD, Quantity: "voltage", Unit: Volts, Min: 0, Max: 7.9998779296875,
		Description: "ECU, service 01 PID 0x28: oxygen sensor 5 voltage."},
	{Name: "ecu_o2_s6_lambda_v", Origin: FromOBD, Quantity: "lambda", Unit: Ratio, Min: 0, Max: 1.999969482421875,
		Description: "ECU, service 01 PID 0x29: oxygen sensor 6 λ (voltage type)."},
	{Name: "ecu_o2_s6_voltage", Origin: FromOBD, Quantity: "voltage", Unit: Volts, Min: 0, Max: 7.9998779296875,
		Description: "ECU, service 01 PID 0x29: oxygen sensor 6 voltage."},
	{Name: "ecu_o2_s7_lambda_v", Origin: FromOBD, Quantity: "lambda", Unit: Ratio, Min: 0, Max: 1.999969482421875,
		Description: "ECU, service 01 PID 0x2A: oxygen sensor 7 λ (voltage type)."},
	{Name: "ecu_o2_s7_voltage", Origin: FromOBD, Quantity: "voltage", Unit: Volts, Min: 0, Max: 7.9998779296875,
		Description: "ECU, service 01 PID 0x2A: oxygen sensor 7 voltage."},
	{Name: "ecu_o2_s8_lambda_v", Origin: FromOBD, Quantity: "lambda", Unit: Ratio, Min: 0, Max: 1.999969482421875,
		Description: "ECU, service 01 PID 0x2B: oxygen sensor 8 λ (voltage type)."},
	{Name: "ecu_o2_s8_voltage", Origin: FromOBD, Quantity: "voltage", Unit: Volts, Min: 0, Max: 7.9998779296875,
		Description: "ECU, service 01 PID 0x2B: oxygen sensor 8 voltage."},
	{Name: "ecu_commanded_egr", Origin: FromOBD, Quantity: "position", Unit: Ratio, Min: 0, Max: 1,
		Description: "ECU, service 01 PID 0x2C: commanded egr."},
	{Name: "ecu_egr_error", Origin: FromOBD, Quantity: "error", Unit: Ratio, Min: -1, Max: 0.9921875,
		Description: "ECU, service 01 PID 0x2D: egr error."},
	{Name: "ecu_commanded_evap_purge", Origin: FromOBD, Quantity: "position", Unit: Ratio, Min: 0, Max: 1,
		Description: "ECU, service 01 PID 0x2E: commanded evap purge."},
	{Name: "ecu_fuel_level", Origin: FromOBD, Quantity: "level", Unit: Ratio, Min: 0, Max: 1,
		Description: "ECU, service 01 PID 0x2F: fuel level."},
	{Name: "ecu_evap_vapour_pressure", Origin: FromOBD, Quantity: "pressure", Unit: Pascal, Min: -8192, Max: 8191.75,
		Description: "ECU, service 01 PID 0x32: evap vapour pressure."},
	{Name: "ecu_barometric_pressure", Origin: FromOBD, Quantity: "pressure", Unit: Pascal, Min: 0, Max: 255000,
		Description: "ECU, service 01 PID 0x33: barometric pressure."},
	{Name: "ecu_o2_s1_lambda_i", Origin: FromOBD, Quantity: "lambda", Unit: Ratio, Min: 0, Max: 1.999969482421875,
		Description: "ECU, service 01 PID 0x34: oxygen sensor 1 λ (current type)."},
	{Name: "ecu_o2_s1_current", Origin: FromOBD, Quantity: "current", Unit: Amperes, Min: -0.128, Max: 0.12799609374999998,
		Description: "ECU, service 01 PID 0x34: oxygen sensor 1 current."},
	{Name: "ecu_o2_s2_lambda_i", Origin: FromOBD, Quantity: "lambda", Unit: Ratio, Min: 0, Max: 1.999969482421875,
		Description: "ECU, service 01 PID 0x35: oxygen sensor 2 λ (current type)."},
	{Name: "ecu_o2_s2_current", Origin: FromOBD, Quantity: "current", Unit: Amperes, Min: -0.128, Max: 0.12799609374999998,
		Description: "ECU, service 01 PID 0x35: oxygen sensor 2 current."},
	{Name: "ecu_o2_s3_lambda_i", Origin: FromOBD, Quantity: "lambda", Unit: Ratio, Min: 0, Max: 1.999969482421875,
		Description: "ECU, service 01 PID 0x36: oxygen sensor 3 λ (current type)."},
	{Name: "ecu_o2_s3_current", Origin: FromOBD, Quantity: "current", Unit: Amperes, Min: -0.128, Max: 0.12799609374999998,
		Description: "ECU, service 01 PID 0x36: oxygen sensor 3 current."},
	{Name: "ecu_o2_s4_lambda_i", Origin: FromOBD, Quantity: "lambda", Unit: Ratio, Min: 0, Max: 1.999969482421875,
		Description: "ECU, service 01 PID 0x37: oxygen sensor 4 λ (current type)."},
	{Name: "ecu_o2_s4_current", Origin: FromOBD, Quantity: "current", Unit: Amperes, Min: -0.128, Max: 0.12799609374999998,
		Description: "ECU, service 01 PID 0x37: oxygen sensor 4 current."},
	{Name: "ecu_o2_s5_lambda_i", Origin: FromOBD, Quantity: "lambda", Unit: Ratio, Min: 0, Max: 1.999969482421875,
		Description: "ECU, service 01 PID 0x38: oxygen sensor 5 λ (current type)."},
	{Name: "ecu_o2_s5_current", Origin: FromOBD, Quantity: "current", Unit: Amperes, Min: -0.128, Max: 0.12799609374999998,
		Description: "ECU, service 01 PID 0x38: oxygen sensor 5 current."},
	{Name: "ecu_o2_s6_lambda_i", Origin: FromOBD, Quantity: "lambda", Unit: Ratio, Min: 0, Max: 1.999969482421875,
		Description: "ECU, service 01 PID 0x39: oxygen sensor 6 λ (current type)."},
	{Name: "ecu_o2_s6_current", Origin: FromOBD, Quantity: "current", Unit: Amperes, Min: -0.128, Max: 0.12799609374999998,
		Description: "ECU, service 01 PID 0x39: oxygen sensor 6 current."},
	{Name: "ecu_o2_s7_lambda_i", Origin: FromOBD, Quantity: "lambda", Unit: Ratio, Min: 0, Max: 1.999969482421875,
		Description: "ECU, service 01 PID 0x3A: oxygen sensor 7 λ (current type)."},
	{Name: "ecu_o2_s7_current", Origin: FromOBD, Quantity: "current", Unit: Amperes, Min: -0.128, Max: 0.12799609374999998,
		Description: "ECU, service 01 PID 0x3A: oxygen sensor 7 current."},
	{Name: "ecu_o2_s8_lambda_i", Origin: FromOBD, Quantity: "lambda", Unit: Ratio, Min: 0, Max: 1.999969482421875,
		Description: "ECU, service 01 PID 0x3B: oxygen sensor 8 λ (current type)."},
	{Name: "ecu_o2_s8_current", Origin: FromOBD, Quantity: "current", Unit: Amperes, Min: -0.128, Max: 0.12799609374999998,
		Description: "ECU, service 01 PID 0x3B: oxygen sensor 8 current."},
	{Name: "ecu_catalyst_temperature_b1s1", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 6513.5,
		Description: "ECU, service 01 PID 0x3C: catalyst temperature bank 1 sensor 1."},
	{Name: "ecu_catalyst_temperature_b2s1", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 6513.5,
		Description: "ECU, service 01 PID 0x3D: catalyst temperature bank 2 sensor 1."},
	{Name: "ecu_catalyst_temperature_b1s2", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 6513.5,
		Description: "ECU, service 01 PID 0x3E: catalyst temperature bank 1 sensor 2."},
	{Name: "ecu_catalyst_temperature_b2s2", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 6513.5,
		Description: "ECU, service 01 PID 0x3F: catalyst temperature bank 2 sensor 2."},
	{Name: "ecu_module_voltage", Origin: FromOBD, Quantity: "voltage", Unit: Volts, Min: 0, Max: 65.535,
		Description: "ECU, service 01 PID 0x42: module voltage."},
	{Name: "ecu_absolute_load", Origin: FromOBD, Quantity: "load", Unit: Ratio, Min: 0, Max: 257,
		Description: "ECU, service 01 PID 0x43: absolute load."},
	{Name: "ecu_commanded_lambda", Origin: FromOBD, Quantity: "lambda", Unit: Ratio, Min: 0, Max: 1.999969482421875,
		Description: "ECU, service 01 PID 0x44: commanded lambda."},
	{Name: "ecu_relative_throttle_position", Origin: FromOBD, Quantity: "throttle_position", Unit: Ratio, Min: 0, Max: 1,
		Description: "ECU, service 01 PID 0x45: relative throttle position."},
	{Name: "ecu_ambient_air_temperature", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 215,
		Description: "ECU, service 01 PID 0x46: ambient air temperature."},
	{Name: "ecu_accelerator_pedal_d", Origin: FromOBD, Quantity: "position", Unit: Ratio, Min: 0, Max: 1,
		Description: "ECU, service 01 PID 0x49: accelerator pedal d."},
	{Name: "ecu_accelerator_pedal_e", Origin: FromOBD, Quantity: "position", Unit: Ratio, Min: 0, Max: 1,
		Description: "ECU, service 01 PID 0x4A: accelerator pedal e."},
	{Name: "ecu_accelerator_pedal_f", Origin: FromOBD, Quantity: "position", Unit: Ratio, Min: 0, Max: 1,
		Description: "ECU, service 01 PID 0x4B: accelerator pedal f."},
	{Name: "ecu_commanded_throttle", Origin: FromOBD, Quantity: "position", Unit: Ratio, Min: 0, Max: 1,
		Description: "ECU, service 01 PID 0x4C: commanded throttle."},
	{Name: "ecu_fuel_type", Origin: FromOBD, Quantity: "enum", Unit: None, Min: 0, Max: 255,
		Description: "ECU, service 01 PID 0x51: fuel type."},
	{Name: "ecu_ethanol_fraction", Origin: FromOBD, Quantity: "fraction", Unit: Ratio, Min: 0, Max: 1,
		Description: "ECU, service 01 PID 0x52: ethanol fraction."},
	{Name: "ecu_oil_temperature", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 215,
		Description: "ECU, service 01 PID 0x5C: oil temperature."},
	{Name: "ecu_fuel_rate", Origin: FromOBD, Quantity: "volume_flow", Unit: CubicMetresPerS, Min: 0, Max: 0.0009102083333333333,
		Description: "ECU, service 01 PID 0x5E: fuel rate."},
	{Name: "ecu_demand_torque_fraction", Origin: FromOBD, Quantity: "torque_fraction", Unit: Ratio, Min: -1.25, Max: 1.3000000000000003,
		Description: "ECU, service 01 PID 0x61: demand torque fraction."},
	{Name: "ecu_actual_torque_fraction", Origin: FromOBD, Quantity: "torque_fraction", Unit: Ratio, Min: -1.25, Max: 1.3000000000000003,
		Description: "ECU, service 01 PID 0x62: actual torque fraction."},
	{Name: "ecu_reference_torque", Origin: FromOBD, Quantity: "torque", Unit: NewtonMetres, Min: 0, Max: 65535,
		Description: "ECU, service 01 PID 0x63: reference torque."},
	{Name: "ecu_compressor_inlet_pressure_a", Origin: FromOBD, Quantity: "pressure", Unit: Pascal, Min: 0, Max: 255000,
		Description: "ECU, service 01 PID 0x6F: compressor inlet pressure a."},
	{Name: "ecu_compressor_inlet_pressure_b", Origin: FromOBD, Quantity: "pressure", Unit: Pascal, Min: 0, Max: 255000,
		Description: "ECU, service 01 PID 0x6F: compressor inlet pressure b."},
	{Name: "ecu_boost_commanded_a", Origin: FromOBD, Quantity: "pressure", Unit: Pascal, Min: 0, Max: 2.04796875e+06,
		Description: "ECU, service 01 PID 0x70: boost commanded a."},
	{Name: "ecu_boost_pressure_a", Origin: FromOBD, Quantity: "pressure", Unit: Pascal, Min: 0, Max: 2.04796875e+06,
		Description: "ECU, service 01 PID 0x70: boost pressure a."},
	{Name: "ecu_boost_commanded_b", Origin: FromOBD, Quantity: "pressure", Unit: Pascal, Min: 0, Max: 2.04796875e+06,
		Description: "ECU, service 01 PID 0x70: boost commanded b."},
	{Name: "ecu_boost_pressure_b", Origin: FromOBD, Quantity: "pressure", Unit: Pascal, Min: 0, Max: 2.04796875e+06,
		Description: "ECU, service 01 PID 0x70: boost pressure b."},
	{Name: "ecu_exhaust_pressure_b1", Origin: FromOBD, Quantity: "pressure", Unit: Pascal, Min: 0, Max: 655350,
		Description: "ECU, service 01 PID 0x73: exhaust pressure b1."},
	{Name: "ecu_exhaust_pressure_b2", Origin: FromOBD, Quantity: "pressure", Unit: Pascal, Min: 0, Max: 655350,
		Description: "ECU, service 01 PID 0x73: exhaust pressure b2."},
	{Name: "ecu_turbo_speed_a", Origin: FromOBD, Quantity: "turbo_speed", Unit: RPM, Min: 0, Max: 655350,
		Description: "ECU, service 01 PID 0x74: turbo speed a."},
	{Name: "ecu_turbo_speed_b", Origin: FromOBD, Quantity: "turbo_speed", Unit: RPM, Min: 0, Max: 655350,
		Description: "ECU, service 01 PID 0x74: turbo speed b."},
	{Name: "ecu_turbo_a_compressor_inlet_temperature", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 215,
		Description: "ECU, service 01 PID 0x75: turbo a compressor inlet temperature."},
	{Name: "ecu_turbo_a_compressor_outlet_temperature", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 215,
		Description: "ECU, service 01 PID 0x75: turbo a compressor outlet temperature."},
	{Name: "ecu_turbo_a_turbine_inlet_temperature", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 6513.5,
		Description: "ECU, service 01 PID 0x75: turbo a turbine inlet temperature."},
	{Name: "ecu_turbo_a_turbine_outlet_temperature", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 6513.5,
		Description: "ECU, service 01 PID 0x75: turbo a turbine outlet temperature."},
	{Name: "ecu_turbo_b_compressor_inlet_temperature", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 215,
		Description: "ECU, service 01 PID 0x76: turbo b compressor inlet temperature."},
	{Name: "ecu_turbo_b_compressor_outlet_temperature", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 215,
		Description: "ECU, service 01 PID 0x76: turbo b compressor outlet temperature."},
	{Name: "ecu_turbo_b_turbine_inlet_temperature", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 6513.5,
		Description: "ECU, service 01 PID 0x76: turbo b turbine inlet temperature."},
	{Name: "ecu_turbo_b_turbine_outlet_temperature", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 6513.5,
		Description: "ECU, service 01 PID 0x76: turbo b turbine outlet temperature."},
	{Name: "ecu_charge_cooler_temperature_b1s1", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 215,
		Description: "ECU, service 01 PID 0x77: charge cooler temperature bank 1 sensor 1."},
	{Name: "ecu_charge_cooler_temperature_b1s2", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 215,
		Description: "ECU, service 01 PID 0x77: charge cooler temperature bank 1 sensor 2."},
	{Name: "ecu_charge_cooler_temperature_b2s1", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 215,
		Description: "ECU, service 01 PID 0x77: charge cooler temperature bank 2 sensor 1."},
	{Name: "ecu_charge_cooler_temperature_b2s2", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 215,
		Description: "ECU, service 01 PID 0x77: charge cooler temperature bank 2 sensor 2."},
	{Name: "ecu_exhaust_gas_temperature_b1s1", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 6513.5,
		Description: "ECU, service 01 PID 0x78: exhaust gas temperature bank 1 sensor 1."},
	{Name: "ecu_exhaust_gas_temperature_b1s2", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 6513.5,
		Description: "ECU, service 01 PID 0x78: exhaust gas temperature bank 1 sensor 2."},
	{Name: "ecu_exhaust_gas_temperature_b1s3", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 6513.5,
		Description: "ECU, service 01 PID 0x78: exhaust gas temperature bank 1 sensor 3."},
	{Name: "ecu_exhaust_gas_temperature_b1s4", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 6513.5,
		Description: "ECU, service 01 PID 0x78: exhaust gas temperature bank 1 sensor 4."},
	{Name: "ecu_exhaust_gas_temperature_b2s1", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 6513.5,
		Description: "ECU, service 01 PID 0x79: exhaust gas temperature bank 2 sensor 1."},
	{Name: "ecu_exhaust_gas_temperature_b2s2", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 6513.5,
		Description: "ECU, service 01 PID 0x79: exhaust gas temperature bank 2 sensor 2."},
	{Name: "ecu_exhaust_gas_temperature_b2s3", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 6513.5,
		Description: "ECU, service 01 PID 0x79: exhaust gas temperature bank 2 sensor 3."},
	{Name: "ecu_exhaust_gas_temperature_b2s4", Origin: FromOBD, Quantity: "temperature", Unit: Celsius, Min: -40, Max: 6513.5,
		Description: "ECU, service 01 PID 0x79: exhaust gas temperature bank 2 sensor 4."},
	{Name: "ecu_manifold_pressure_wide_a", Origin: FromOBD, Quantity: "pressure", Unit: Pascal, Min: 0, Max: 2.04796875e+06,
		Description: "ECU, service 01 PID 0x87: manifold pressure wide a."},
	{Name: "ecu_manifold_pressure_wide_b", Origin: FromOBD, Quantity: "pressure", Unit: Pascal, Min: 0, Max: 2.04796875e+06,
		Description: "ECU, service 01 PID 0x87: manifold pressure wide b."},
}

// Catalogued returns the catalogue's entry for name (for a family member such
// as warning_over_boost, the family's entry with the full name and the rule
// name as sensor label).
func Catalogued(name string) (Channel, bool) {
	for _, c := range catalogue {
		if c.Name == name && !strings.HasSuffix(name, "_") {
			return c, true
		}
	}
	for _, c := range catalogue {
		if strings.HasSuffix(c.Name, "_") && strings.HasPrefix(name, c.Name) && len(name) > len(c.Name) {
			c.Sensor = name[len(c.Name):]
			c.Name = name
			return c, true
		}
	}
	return Channel{}, false
}

// Catalogue returns every entry, sorted by name.
func Catalogue() []Channel {
	out := append([]Channel(nil), catalogue...)
	sort.Slice(out, func(i, j int) bool { return out[i].Name < out[j].Name })
	return out
}

// Standard returns the catalogue's entry of one of Plenum's standard input
// channels, with the source left for the caller.
func Standard(name string) (Channel, bool) {
	c, ok := Catalogued(name)
	if !ok || c.Origin != FromInput {
		return Channel{Name: name}, false
	}
	return c, true
}

// StandardNames lists the standard input channel names, sorted.
func StandardNames() []string {
	var s []string
	for _, c := range catalogue {
		if c.Origin == FromInput {
			s = append(s, c.Name)
		}
	}
	sort.Strings(s)
	return s
}

// DerivedOutputs returns the catalogue's entries of derived channels, in the
// order named: what a derivation's Outputs returns. It panics on a name the
// catalogue lacks or that is not derived, a programming error that every
// test building the derivations catches.
func DerivedOutputs(names ...string) []Channel {
	out := make([]Channel, len(names))
	for i, n := range names {
		c, ok := Catalogued(n)
		if !ok || c.Origin != FromDerived {
			panic("pipeline: derived channel " + n + " is not in the catalogue")
		}
		out[i] = c
	}
	return out
}

// CheckCatalogued returns the names of registered channels that have no
// catalogue entry or whose quantity or unit differs from it.
func CheckCatalogued(reg *Registry) []string {
	var bad []string
	for _, c := range reg.Channels() {
		e, ok := Catalogued(c.Name)
		if !ok || e.Unit != c.Unit || e.Quantity != c.Quantity {
			bad = append(bad, c.Name)
		}
	}
	return bad
}
