package obd

import (
	"math"
	"testing"
)

// FuzzParseResponse feeds arbitrary payloads through every response decoder:
// none may panic, every value must be finite and inside its channel's range.
func FuzzParseResponse(f *testing.F) {
	f.Add([]byte{0x41, 0x0C, 0x1A, 0xF8, 0x0D, 0x32})
	f.Add([]byte{0x41, 0x00, 0xBE, 0x1F, 0xA8, 0x13})
	f.Add([]byte{0x7F, 0x01, 0x78})
	f.Add([]byte{0x43, 0x01, 0x01, 0x33})
	f.Fuzz(func(t *testing.T, p []byte) {
		r, err := ParseResponse(p)
		if err != nil {
			return
		}
		if r.Negative {
			_ = r.Err().Error()
			return
		}
		check := func(pid PID, ch ChannelIndex, v float64) {
			c, owner, ok := StandardChannel(ch)
			if !ok || owner != pid {
				t.Fatalf("PID 0x%02X produced channel %d of PID 0x%02X", pid, ch, owner)
			}
			if math.IsNaN(v) || math.IsInf(v, 0) || v < c.Min-1e-9 || v > c.Max+1e-9 {
				t.Fatalf("%s = %v outside %v–%v", c.Name, v, c.Min, c.Max)
			}
		}
		switch r.Service {
		case 0x01:
			var s PIDSet
			_ = WalkCurrentData(r.Data, func(pid PID, b []byte) {
				if n, _ := PIDLength(pid); n != len(b) {
					t.Fatalf("walk gave PID 0x%02X %d bytes, table says %d", pid, len(b), n)
				}
				if IsBitmapPID(pid) {
					if _, err := s.AddBitmap(pid, b); err != nil {
						t.Fatal(err)
					}
				}
			})
			_ = DecodeCurrentData(r.Data, check)
		case 0x02:
			_ = DecodeFreezeFrame(r.Data, func(_ uint8, pid PID, ch ChannelIndex, v float64) { check(pid, ch, v) })
		case 0x03, 0x07:
			_ = DecodeDTCs(r.Data, func(d DTC) {
				if s := d.String(); len(s) != 5 || d == 0 {
					t.Fatalf("DTC %q", s)
				}
			})
		case 0x09:
			if v, err := DecodeVIN(r.Data); err == nil && len(v) != VINLength {
				t.Fatalf("VIN %q", v)
			}
		case 0x22:
			if rec, err := DecodeDID(r.Data, uint16(safeAt(r.Data, 0))<<8|uint16(safeAt(r.Data, 1))); err == nil {
				s := Signal{Name: "x", ByteOffset: 1, Length: 3, Signed: true, BigEndian: true, Scale: 0.1}
				if v, err := s.Decode(rec); err == nil && (math.IsNaN(v) || math.Abs(v) > 1<<23) {
					t.Fatalf("signal %v", v)
				}
			}
		}
	})
}

func safeAt(b []byte, i int) byte {
	if i < len(b) {
		return b[i]
	}
	return 0
}
