package obd

import (
	"fmt"
	"math"

	"github.com/plenum-engine/plenum/pipeline"
)

// ChannelIndex identifies a channel this package can emit. Indexes below
// NumStandardChannels name the decoded fields of the standard PID table (see
// StandardChannel); a Poller numbers its user-defined signals from
// NumStandardChannels() upwards, in configuration order.
type ChannelIndex uint16

// TurboSpeedRPMPerBit is the scaling chosen for PID 0x74 (turbocharger speed).
// reference-facts §10 item 2 records a disagreement: 10 rpm/bit (an independent
// implementation; J1979-DA range 0–655 350 rpm, from memory) against 1 rpm/bit
// (Scapy). We take 10 rpm/bit: 1 rpm/bit would cap the reading at 65 535 rpm,
// below the shaft speed of common small turbochargers (common practice, no
// source). Not yet checked against J1979-DA.
const TurboSpeedRPMPerBit = 10

// fieldSpec decodes one value from a PID's data bytes (A = data[0]):
// raw = big-endian unsigned (or signed) integer of size bytes at off,
// then (raw>>shift)&mask when mask != 0, value = raw*mul + add.
// support >= 0 names the bit of byte A that must be set for the field to exist.
type fieldSpec struct {
	ch      ChannelIndex
	off     uint8
	size    uint8
	shift   uint8
	mask    uint16
	signed  bool
	support int8
	mul     float64
	add     float64
}

// pidSpec is one row of the service 01 decode table.
type pidSpec struct {
	known  bool
	bitmap bool // supported-PID bitmap (0x00, 0x20, …)
	length uint8
	nf     uint8
	fields [4]fieldSpec
}

// chanSpec is the static description of a standard channel: its name in
// the channel catalogue (which holds its quantity, canonical unit and
// description), its PID and the range its encoding can carry.
type chanSpec struct {
	name     string
	pid      PID
	min, max float64
}

// table is the service 01 decode table. It is built once at package
// initialisation and never written afterwards.
type table struct {
	pids  [256]pidSpec
	chans []chanSpec
}

var std = buildTable()

// NumStandardChannels returns the number of channels in the standard PID table.
func NumStandardChannels() ChannelIndex { return ChannelIndex(len(std.chans)) }

// fld is the builder's description of one field and its channel.
type fld struct {
	name      string
	off, size uint8
	shift     uint8
	mask      uint16
	signed    bool
	support   int8
	mul, add  float64
}

func (t *table) add(pid PID, length uint8, fs ...fld) {
	s := &t.pids[pid]
	s.known, s.length = true, length
	for _, f := range fs {
		ch := ChannelIndex(len(t.chans))
		spec := fieldSpec{ch: ch, off: f.off, size: f.size, shift: f.shift, mask: f.mask,
			signed: f.signed, support: f.support, mul: f.mul, add: f.add}
		lo, hi := spec.rawRange()
		t.chans = append(t.chans, chanSpec{name: f.name, pid: pid,
			min: lo*f.mul + f.add, max: hi*f.mul + f.add})
		s.fields[s.nf] = spec
		s.nf++
	}
}

// Helpers for the common shapes. A is data[0], B data[1] and so on.
func u8(name string, off uint8, mul, add float64) fld {
	return fld{name: name, off: off, size: 1, support: -1, mul: mul, add: add}
}

func u16(name string, off uint8, mul, add float64) fld {
	return fld{name: name, off: off, size: 2, support: -1, mul: mul, add: add}
}

func sup(f fld, bit int8) fld { f.support = bit; return f }

func buildTable() *table {
	t := &table{}
	// All formulas: SAE J1979 / ISO 15031-5 Service $01 scalings as listed in
	// reference-facts §1.1 (cross-checked against [WP-PIDs] and, for C*
	// rows, the Scapy OBD PID definitions), converted to the canonical unit
	// the channel catalogue (pipeline/catalog.go) gives each name.
	for p := 0x00; p <= 0xE0; p += 0x20 { // supported-PID bitmaps
		t.pids[p] = pidSpec{known: true, bitmap: true, length: 4}
	}
	// 01: monitor status: A7 = MIL, A6..A0 = confirmed DTC count (C* Scapy).
	t.add(0x01, 4,
		fld{name: "ecu_mil_on", off: 0, size: 1, shift: 7, mask: 1, support: -1, mul: 1},
		fld{name: "ecu_dtc_count", off: 0, size: 1, mask: 0x7F, support: -1, mul: 1})
	t.add(0x04, 1, u8("ecu_engine_load", 0, 1.0/255, 0))     // 100·A/255 %
	t.add(0x05, 1, u8("ecu_coolant_temperature", 0, 1, -40)) // A−40 °C
	for i, n := range []string{"ecu_short_fuel_trim_bank1", "ecu_long_fuel_trim_bank1", "ecu_short_fuel_trim_bank2", "ecu_long_fuel_trim_bank2"} {
		t.add(PID(0x06+i), 1, u8(n, 0, 1.0/128, -1)) // 100·A/128 − 100 %
	}
	t.add(0x0A, 1, u8("ecu_fuel_pressure", 0, 3000, 0))     // 3·A kPa gauge
	t.add(0x0B, 1, u8("ecu_manifold_pressure", 0, 1000, 0)) // A kPa abs
	t.add(0x0C, 2, u16("ecu_engine_speed", 0, 0.25, 0))     // (256A+B)/4 rpm
	t.add(0x0D, 1, u8("ecu_vehicle_speed", 0, 1/3.6, 0))
	t.add(0x0E, 1, u8("ecu_timing_advance", 0, 0.5, -64)) // A/2 − 64 ° BTDC
	t.add(0x0F, 1, u8("ecu_intake_air_temperature", 0, 1, -40))
	t.add(0x10, 2, u16("ecu_mass_air_flow", 0, 0.01, 0)) // (256A+B)/100 g/s
	t.add(0x11, 1, u8("ecu_throttle_position", 0, 1.0/255, 0))
	t.add(0x1F, 2, u16("ecu_run_time", 0, 1, 0))
	t.add(0x22, 2, u16("ecu_fuel_rail_pressure_relative", 0, 79, 0)) // 0.079 kPa/bit
	t.add(0x23, 2, u16("ecu_fuel_rail_gauge_pressure", 0, 10000, 0)) // 10 kPa/bit
	for i := 0; i < 8; i++ {                                         // 24–2B: λ = (256A+B)·2/65536, V = (256C+D)·8/65536
		s := fmt.Sprintf("ecu_o2_s%d", i+1)
		t.add(PID(0x24+i), 4,
			u16(s+"_lambda_v", 0, 2.0/65536, 0),
			u16(s+"_voltage", 2, 8.0/65536, 0))
	}
	t.add(0x2C, 1, u8("ecu_commanded_egr", 0, 1.0/255, 0))
	t.add(0x2D, 1, u8("ecu_egr_error", 0, 1.0/128, -1))
	t.add(0x2E, 1, u8("ecu_commanded_evap_purge", 0, 1.0/255, 0))
	t.add(0x2F, 1, u8("ecu_fuel_level", 0, 1.0/255, 0))
	t.add(0x32, 2, fld{name: "ecu_evap_vapour_pressure", size: 2, signed: true, support: -1, mul: 0.25}) // signed /4 Pa
	t.add(0x33, 1, u8("ecu_barometric_pressure", 0, 1000, 0))
	for i := 0; i < 8; i++ { // 34–3B: λ as above; I = (256C+D)/256 − 128 mA (reference-facts §10 item 1: J1979/Wikipedia)
		s := fmt.Sprintf("ecu_o2_s%d", i+1)
		t.add(PID(0x34+i), 4,
			u16(s+"_lambda_i", 0, 2.0/65536, 0),
			u16(s+"_current", 2, 1.0/256e3, -0.128))
	}
	for i, n := range []string{"ecu_catalyst_temperature_b1s1", "ecu_catalyst_temperature_b2s1", "ecu_catalyst_temperature_b1s2", "ecu_catalyst_temperature_b2s2"} {
		t.add(PID(0x3C+i), 2, u16(n, 0, 0.1, -40)) // (256A+B)/10 − 40
	}
	t.add(0x42, 2, u16("ecu_module_voltage", 0, 0.001, 0))
	t.add(0x43, 2, u16("ecu_absolute_load", 0, 1.0/255, 0)) // 100·(256A+B)/255 %
	t.add(0x44, 2, u16("ecu_commanded_lambda", 0, 2.0/65536, 0))
	t.add(0x45, 1, u8("ecu_relative_throttle_position", 0, 1.0/255, 0))
	t.add(0x46, 1, u8("ecu_ambient_air_temperature", 0, 1, -40))
	for i, n := range []string{"ecu_accelerator_pedal_d", "ecu_accelerator_pedal_e", "ecu_accelerator_pedal_f", "ecu_commanded_throttle"} {
		t.add(PID(0x49+i), 1, u8(n, 0, 1.0/255, 0))
	}
	t.add(0x51, 1, u8("ecu_fuel_type", 0, 1, 0))
	t.add(0x52, 1, u8("ecu_ethanol_fraction", 0, 1.0/255, 0))
	t.add(0x5C, 1, u8("ecu_oil_temperature", 0, 1, -40))
	t.add(0x5E, 2, u16("ecu_fuel_rate", 0, 0.05e-3/3600, 0))         // (256A+B)/20 L/h
	t.add(0x61, 1, u8("ecu_demand_torque_fraction", 0, 0.01, -1.25)) // A − 125 %
	t.add(0x62, 1, u8("ecu_actual_torque_fraction", 0, 0.01, -1.25))
	t.add(0x63, 2, u16("ecu_reference_torque", 0, 1, 0))
	// Multi-sensor PIDs: A = support bits (bit n = field n present).
	t.add(0x6F, 3,
		sup(u8("ecu_compressor_inlet_pressure_a", 1, 1000, 0), 0),
		sup(u8("ecu_compressor_inlet_pressure_b", 2, 1000, 0), 1))
	t.add(0x70, 10, // each (256x+y)/32 kPa; J (status bits) not decoded
		sup(u16("ecu_boost_commanded_a", 1, 1000.0/32, 0), 0),
		sup(u16("ecu_boost_pressure_a", 3, 1000.0/32, 0), 1),
		sup(u16("ecu_boost_commanded_b", 5, 1000.0/32, 0), 2),
		sup(u16("ecu_boost_pressure_b", 7, 1000.0/32, 0), 3))
	t.add(0x73, 5,
		sup(u16("ecu_exhaust_pressure_b1", 1, 10, 0), 0), // /100 kPa
		sup(u16("ecu_exhaust_pressure_b2", 3, 10, 0), 1))
	t.add(0x74, 5,
		sup(u16("ecu_turbo_speed_a", 1, TurboSpeedRPMPerBit, 0), 0),
		sup(u16("ecu_turbo_speed_b", 3, TurboSpeedRPMPerBit, 0), 1))
	for i, x := range []string{"a", "b"} {
		s := "ecu_turbo_" + x
		t.add(PID(0x75+i), 7,
			sup(u8(s+"_compressor_inlet_temperature", 1, 1, -40), 0),
			sup(u8(s+"_compressor_outlet_temperature", 2, 1, -40), 1),
			sup(u16(s+"_turbine_inlet_temperature", 3, 0.1, -40), 2),
			sup(u16(s+"_turbine_outlet_temperature", 5, 0.1, -40), 3))
	}
	t.add(0x77, 5,
		sup(u8("ecu_charge_cooler_temperature_b1s1", 1, 1, -40), 0),
		sup(u8("ecu_charge_cooler_temperature_b1s2", 2, 1, -40), 1),
		sup(u8("ecu_charge_cooler_temperature_b2s1", 3, 1, -40), 2),
		sup(u8("ecu_charge_cooler_temperature_b2s2", 4, 1, -40), 3))
	for b := 0; b < 2; b++ {
		var fs []fld
		for s := 0; s < 4; s++ {
			fs = append(fs, sup(u16(fmt.Sprintf("ecu_exhaust_gas_temperature_b%ds%d", b+1, s+1), uint8(1+2*s), 0.1, -40), int8(s)))
		}
		t.add(PID(0x78+b), 9, fs...)
	}
	t.add(0x87, 5,
		sup(u16("ecu_manifold_pressure_wide_a", 1, 1000.0/32, 0), 0),
		sup(u16("ecu_manifold_pressure_wide_b", 3, 1000.0/32, 0), 1))
	return t
}

// PIDLength returns the number of data bytes (after the PID echo) of a known
// service 01 PID, and false for a PID not in the table.
func PIDLength(pid PID) (int, bool) {
	s := &std.pids[pid]
	return int(s.length), s.known
}

// KnownPID reports whether pid is in the decode table (bitmaps included).
func KnownPID(pid PID) bool { return std.pids[pid].known }

// IsBitmapPID reports whether pid is a supported-PID bitmap (0x00, 0x20, … 0xE0).
func IsBitmapPID(pid PID) bool { return std.pids[pid].bitmap }

// StandardChannel describes standard channel ch as a pipeline channel
// (Source "obd") plus the PID that carries it; ok is false when ch is not a
// standard channel. Min and Max are the full encodable range of the field.
func StandardChannel(ch ChannelIndex) (c pipeline.Channel, pid PID, ok bool) {
	if int(ch) >= len(std.chans) {
		return pipeline.Channel{}, 0, false
	}
	s := std.chans[ch]
	c, _ = pipeline.Catalogued(s.name) // every name is catalogued (TestChannelsCatalogued)
	c.Source = "obd"
	return c, s.pid, true
}

// LookupChannel finds a standard channel by name.
func LookupChannel(name string) (ChannelIndex, PID, bool) {
	for i, s := range std.chans {
		if s.name == name {
			return ChannelIndex(i), s.pid, true
		}
	}
	return 0, 0, false
}

// PIDChannels calls fn for each channel that PID pid can produce.
func PIDChannels(pid PID, fn func(ChannelIndex)) {
	s := &std.pids[pid]
	for i := 0; i < int(s.nf); i++ {
		fn(s.fields[i].ch)
	}
}

// FieldFunc receives one decoded value: the PID it came from, its channel and
// its value in the channel's canonical unit.
type FieldFunc func(pid PID, ch ChannelIndex, value float64)

// DecodePID decodes the data bytes of one service 01 (or 02) PID, without the
// PID echo, calling fn for every field present. Fields whose support bit is
// clear produce no call. data must be exactly the table length. Bitmap PIDs
// produce no fields (use PIDSet.AddBitmap). It does not allocate.
func DecodePID(pid PID, data []byte, fn FieldFunc) error {
	s := &std.pids[pid]
	if !s.known {
		return fmt.Errorf("obd: PID 0x%02X: not in the decode table", uint8(pid))
	}
	if len(data) != int(s.length) {
		return fmt.Errorf("obd: PID 0x%02X: %d data bytes, want %d", uint8(pid), len(data), s.length)
	}
	for i := 0; i < int(s.nf); i++ {
		f := &s.fields[i]
		if f.support >= 0 && data[0]&(1<<uint(f.support)) == 0 {
			continue
		}
		var raw uint32
		for j := 0; j < int(f.size); j++ {
			raw = raw<<8 | uint32(data[int(f.off)+j])
		}
		var v float64
		switch {
		case f.signed && f.size == 2:
			v = float64(int16(raw))
		case f.signed:
			v = float64(int8(raw))
		default:
			if f.mask != 0 {
				raw = (raw >> f.shift) & uint32(f.mask)
			}
			v = float64(raw)
		}
		v = v*f.mul + f.add
		if math.IsNaN(v) || math.IsInf(v, 0) { // impossible for table rows; guards future edits
			return fmt.Errorf("obd: PID 0x%02X field %d: non-finite value", uint8(pid), i)
		}
		fn(pid, f.ch, v)
	}
	return nil
}

// ValueFunc gives the value of one channel, in its canonical unit, for
// EncodePID; ok false leaves the field out.
type ValueFunc func(ch ChannelIndex) (value float64, ok bool)

// EncodePID appends the data bytes of service 01 PID pid (without the PID
// echo) to dst, from the same table DecodePID reads: each field present is
// converted to counts by the field's scale and offset, rounded to the nearest
// count and clamped to the field's range; a field with a support bit sets it
// when present and is left zero when not. Bytes no field covers are zero. A
// field without a support bit must be present. Bitmap PIDs are not encoded
// here (see PIDSet).
func EncodePID(dst []byte, pid PID, value ValueFunc) ([]byte, error) {
	s := &std.pids[pid]
	if !s.known || s.bitmap {
		return dst, fmt.Errorf("obd: PID 0x%02X: not an encodable PID of the table", uint8(pid))
	}
	base := len(dst)
	dst = append(dst, make([]byte, s.length)...)
	data := dst[base:]
	for i := 0; i < int(s.nf); i++ {
		f := &s.fields[i]
		v, ok := value(f.ch)
		if !ok {
			if f.support < 0 {
				return dst[:base], fmt.Errorf("obd: PID 0x%02X: no value for %s", uint8(pid), std.chans[f.ch].name)
			}
			continue
		}
		if math.IsNaN(v) {
			return dst[:base], fmt.Errorf("obd: PID 0x%02X: %s is NaN", uint8(pid), std.chans[f.ch].name)
		}
		lo, hi := f.rawRange()
		raw := math.Round((v - f.add) / f.mul)
		raw = math.Max(lo, math.Min(hi, raw))
		var bits uint32
		if f.signed {
			bits = uint32(int32(raw)) & (1<<(8*uint(f.size)) - 1)
		} else {
			bits = uint32(raw)
		}
		if f.mask != 0 {
			bits = (bits & uint32(f.mask)) << f.shift
		}
		for j := int(f.size) - 1; j >= 0; j-- {
			data[int(f.off)+j] |= byte(bits)
			bits >>= 8
		}
		if f.support >= 0 {
			data[0] |= 1 << uint(f.support)
		}
	}
	return dst, nil
}

// rawRange is the range of the field's integer count.
func (f *fieldSpec) rawRange() (lo, hi float64) {
	switch {
	case f.signed:
		return -float64(uint64(1) << (8*f.size - 1)), float64(uint64(1)<<(8*f.size-1) - 1)
	case f.mask != 0:
		return 0, float64(f.mask)
	default:
		return 0, float64(uint64(1)<<(8*f.size) - 1)
	}
}

// Resolution returns the value of one count of standard channel ch (its
// least significant bit, in the canonical unit); false when ch is not a
// standard channel.
func Resolution(ch ChannelIndex) (float64, bool) {
	if int(ch) >= len(std.chans) {
		return 0, false
	}
	s := &std.pids[std.chans[ch].pid]
	for i := 0; i < int(s.nf); i++ {
		if s.fields[i].ch == ch {
			return math.Abs(s.fields[i].mul), true
		}
	}
	return 0, false
}
