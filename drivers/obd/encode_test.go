package obd

import (
	"bytes"
	"math"
	"math/rand/v2"
	"testing"
)

// encodeValues encodes pid with the named values (canonical units).
func encodeValues(t *testing.T, pid PID, vals map[string]float64) []byte {
	t.Helper()
	out, err := EncodePID(nil, pid, func(ch ChannelIndex) (float64, bool) {
		c, _, _ := StandardChannel(ch)
		v, ok := vals[c.Name]
		return v, ok
	})
	if err != nil {
		t.Fatalf("PID 0x%02X %v: %v", uint8(pid), vals, err)
	}
	return out
}

func decodeValues(t *testing.T, pid PID, data []byte) map[string]float64 {
	t.Helper()
	got := map[string]float64{}
	if err := DecodePID(pid, data, func(_ PID, ch ChannelIndex, v float64) {
		c, _, _ := StandardChannel(ch)
		got[c.Name] = v
	}); err != nil {
		t.Fatalf("PID 0x%02X % X: %v", uint8(pid), data, err)
	}
	return got
}

// TestEncodeWorkedExamples encodes the decode table's check values
// (pidCases: SAE J1979 / ISO 15031-5 Service $01 formulas, worked by hand)
// and decodes them back: the same fields, the same values.
func TestEncodeWorkedExamples(t *testing.T) {
	for _, c := range pidCases {
		enc := encodeValues(t, c.pid, c.want)
		got := decodeValues(t, c.pid, enc)
		if len(got) != len(c.want) {
			t.Errorf("PID 0x%02X %v: decoded %v", uint8(c.pid), c.want, got)
		}
		for name, w := range c.want {
			if g, ok := got[name]; !ok || !approx(g, w) {
				t.Errorf("PID 0x%02X %s: %v encoded as % X, decoded %v", uint8(c.pid), name, w, enc, g)
			}
		}
	}
}

// TestEncodeBytes checks exact encodings against the J1979 formulas.
// Source of every formula: SAE J1979 / ISO 15031-5 Service $01 (from memory,
// as in reference-facts §1.1); the bytes are worked by hand.
func TestEncodeBytes(t *testing.T) {
	for _, c := range []struct {
		pid  PID
		vals map[string]float64
		want []byte
		rule string
	}{
		{0x0C, map[string]float64{"ecu_engine_speed": 1726}, []byte{0x1A, 0xF8}, "(256A+B)/4 rpm"},
		{0x0C, map[string]float64{"ecu_engine_speed": 1000.1}, []byte{0x0F, 0xA0}, "(256A+B)/4 rpm, rounded"},
		{0x05, map[string]float64{"ecu_coolant_temperature": 83}, []byte{0x7B}, "A − 40 °C"},
		{0x0B, map[string]float64{"ecu_manifold_pressure": 101000}, []byte{0x65}, "A kPa"},
		{0x0D, map[string]float64{"ecu_vehicle_speed": 100 / 3.6}, []byte{0x64}, "A km/h"},
		{0x0E, map[string]float64{"ecu_timing_advance": 0}, []byte{0x80}, "A/2 − 64 °"},
		{0x10, map[string]float64{"ecu_mass_air_flow": 5}, []byte{0x01, 0xF4}, "(256A+B)/100 g/s"},
		{0x11, map[string]float64{"ecu_throttle_position": 1}, []byte{0xFF}, "100·A/255 %"},
		{0x44, map[string]float64{"ecu_commanded_lambda": 1}, []byte{0x80, 0x00}, "(256A+B)·2/65536"},
		{0x24, map[string]float64{"ecu_o2_s1_lambda_v": 1, "ecu_o2_s1_voltage": 4}, []byte{0x80, 0x00, 0x80, 0x00}, "λ (256A+B)·2/65536, V (256C+D)·8/65536"},
		{0x01, map[string]float64{"ecu_mil_on": 1, "ecu_dtc_count": 3}, []byte{0x83, 0, 0, 0}, "A7 MIL, A6–A0 DTC count"},
		{0x32, map[string]float64{"ecu_evap_vapour_pressure": -0.25}, []byte{0xFF, 0xFF}, "signed (256A+B)/4 Pa"},
		{0x06, map[string]float64{"ecu_short_fuel_trim_bank1": -1}, []byte{0x00}, "100·A/128 − 100 %"},
		{0x70, map[string]float64{"ecu_boost_pressure_a": 100000}, []byte{0x02, 0, 0, 0x0C, 0x80, 0, 0, 0, 0, 0}, "A support bits, (256D+E)/32 kPa"},
		{0x78, map[string]float64{"ecu_exhaust_gas_temperature_b1s1": 410}, []byte{0x01, 0x11, 0x94, 0, 0, 0, 0, 0, 0}, "A support bits, (256B+C)/10 − 40 °C"},
		// Out of range: clamped to the field.
		{0x05, map[string]float64{"ecu_coolant_temperature": 300}, []byte{0xFF}, "A − 40 °C, clamped"},
		{0x0C, map[string]float64{"ecu_engine_speed": -5}, []byte{0x00, 0x00}, "(256A+B)/4 rpm, clamped"},
		{0x01, map[string]float64{"ecu_mil_on": 0, "ecu_dtc_count": 200}, []byte{0x7F, 0, 0, 0}, "DTC count clamped to 7 bits"},
		{0x32, map[string]float64{"ecu_evap_vapour_pressure": -1e6}, []byte{0x80, 0x00}, "signed, clamped"},
	} {
		got := encodeValues(t, c.pid, c.vals)
		if !bytes.Equal(got, c.want) {
			t.Errorf("PID 0x%02X %v (%s): % X, want % X", uint8(c.pid), c.vals, c.rule, got, c.want)
		}
	}
}

// TestEncodeDecodeProperty: for every field of every data PID, across its
// whole range, decode(encode(v)) is within half a count of v, and a value
// beyond the range comes back as the range's end.
func TestEncodeDecodeProperty(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 2))
	for p := 0; p < 256; p++ {
		pid := PID(p)
		if !KnownPID(pid) || IsBitmapPID(pid) {
			continue
		}
		var chans []ChannelIndex
		PIDChannels(pid, func(ch ChannelIndex) { chans = append(chans, ch) })
		for _, ch := range chans {
			def, _, _ := StandardChannel(ch)
			lsb, ok := Resolution(ch)
			if !ok || !(lsb > 0) {
				t.Fatalf("%s: resolution %v", def.Name, lsb)
			}
			vals := []float64{def.Min, def.Max, (def.Min + def.Max) / 2}
			for i := 0; i < 500; i++ {
				vals = append(vals, def.Min+rng.Float64()*(def.Max-def.Min))
			}
			for _, v := range vals {
				// The other fields of the PID at their minimum.
				enc, err := EncodePID(nil, pid, func(c ChannelIndex) (float64, bool) {
					if c == ch {
						return v, true
					}
					o, _, _ := StandardChannel(c)
					return o.Min, true
				})
				if err != nil {
					t.Fatalf("%s = %v: %v", def.Name, v, err)
				}
				got := decodeValues(t, pid, enc)[def.Name]
				if math.Abs(got-v) > lsb/2*(1+1e-9) {
					t.Fatalf("%s: %v encoded as % X decodes to %v (LSB %v)", def.Name, v, enc, got, lsb)
				}
			}
			for _, c := range []struct{ in, want float64 }{{def.Min - 100*lsb, def.Min}, {def.Max + 100*lsb, def.Max}} {
				enc, err := EncodePID(nil, pid, func(c2 ChannelIndex) (float64, bool) {
					if c2 == ch {
						return c.in, true
					}
					o, _, _ := StandardChannel(c2)
					return o.Min, true
				})
				if err != nil {
					t.Fatal(err)
				}
				if got := decodeValues(t, pid, enc)[def.Name]; !approx(got, c.want) {
					t.Errorf("%s: %v clamps to %v, want %v", def.Name, c.in, got, c.want)
				}
			}
		}
	}
}

func TestEncodePIDErrors(t *testing.T) {
	all := func(ChannelIndex) (float64, bool) { return 1, true }
	none := func(ChannelIndex) (float64, bool) { return 0, false }
	nan := func(ChannelIndex) (float64, bool) { return math.NaN(), true }
	for _, c := range []struct {
		name string
		pid  PID
		fn   ValueFunc
	}{
		{"bitmap", 0x00, all},
		{"unknown", 0x02, all},
		{"missing required field", 0x0C, none},
		{"NaN", 0x0C, nan},
	} {
		dst := []byte{0x41, 0x0C}
		out, err := EncodePID(dst, c.pid, c.fn)
		if err == nil {
			t.Errorf("%s: accepted: % X", c.name, out)
		}
		if !bytes.Equal(out, dst) {
			t.Errorf("%s: dst changed to % X", c.name, out)
		}
	}
	// Multi-sensor PID with no field present: support byte clear.
	out, err := EncodePID(nil, 0x70, none)
	if err != nil || !bytes.Equal(out, make([]byte, 10)) {
		t.Errorf("0x70 without fields: % X, %v", out, err)
	}
	if _, ok := Resolution(NumStandardChannels()); ok {
		t.Error("Resolution of a non-standard channel")
	}
}
