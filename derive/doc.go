// Package derive holds Plenum's engine physics as pure functions: air
// density and speed-density air mass flow, volumetric-efficiency tables,
// boost and pressure ratio, wideband lambda, AFR and fuel flow, compressor
// efficiency and corrected flow, intercooler effectiveness, power from
// torque, SAE J1349 / ISO 1585 / DIN 70020 power correction and BSFC.
//
// There is no I/O and no clock: time comes in with the samples, so the same
// code runs live and in replay. Quantities are SI-coherent (pascals, degrees
// Celsius or kelvin as each name says, kilograms per second, cubic metres,
// watts, seconds). Invalid arithmetic (a zero denominator, a non-physical
// input) gives NaN or 0 as each function documents, never a panic.
//
// The streaming detectors live in subpackages: derive/lag (step-response
// metrics and the turbo-lag event detector), derive/warn (the warning rules
// engine and its rule syntax) and derive/turbo (warm-up guard and cool-down
// model).
package derive
