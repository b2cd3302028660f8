package can

import (
	"math"
	"math/rand/v2"
	"testing"
	"time"
)

// reference-facts §3: derived from Davis et al. 2007 and ISO 11898-1 field widths.
func TestFrameBitsReference(t *testing.T) {
	std := Frame{ID: 0x7E8, DLC: 8}
	ext := Frame{ID: 0x18DAF110, Extended: true, DLC: 8}
	tests := []struct {
		name string
		f    Frame
		m    Stuffing
		want int
	}{
		{"11-bit 8 bytes unstuffed", std, StuffNone, 111},
		{"11-bit 8 bytes worst case", std, StuffWorstCase, 135},
		{"29-bit 8 bytes unstuffed", ext, StuffNone, 131},
		{"29-bit 8 bytes worst case", ext, StuffWorstCase, 160},
		// Without data: 11-bit 47 bits; worst case ⌊(34−1)/4⌋ = 8 stuff bits.
		{"11-bit 0 bytes unstuffed", Frame{ID: 1}, StuffNone, 47},
		{"11-bit 0 bytes worst case", Frame{ID: 1}, StuffWorstCase, 55},
		{"remote carries no data bits", Frame{ID: 1, Remote: true, DLC: 8}, StuffNone, 47},
	}
	for _, tt := range tests {
		if got := FrameBits(tt.f, tt.m); got != tt.want {
			t.Errorf("%s: FrameBits = %d, want %d", tt.name, got, tt.want)
		}
	}
	// reference-facts §3: 4504 frames/s unstuffed, 3704 worst case at 500 kbit/s.
	for _, c := range []struct {
		m    Stuffing
		want int
	}{{StuffNone, 4504}, {StuffWorstCase, 3704}} {
		d := FrameDuration(std, 500_000, c.m)
		// The sheet's figures are rounded to whole frames (4504.5 and 3703.7).
		if got := float64(time.Second) / float64(d); math.Abs(got-float64(c.want)) > 1 {
			t.Errorf("%v: %.1f frames/s at 500 kbit/s, want %d", c.m, got, c.want)
		}
	}
}

// CRC-15/CAN check value over ASCII "123456789" is 0x059E (RevEng CRC
// catalogue, from memory).
func TestCRC15Check(t *testing.T) {
	if got := CRC15([]byte("123456789")); got != 0x059E {
		t.Fatalf("CRC15 = %#04x, want 0x059e", got)
	}
	// The bit-wise register used on frames agrees with the byte-wise one.
	var bits []uint8
	for _, c := range []byte("123456789") {
		for i := 7; i >= 0; i-- {
			bits = append(bits, c>>uint(i)&1)
		}
	}
	if got := crc15Bits(bits); got != 0x059E {
		t.Fatalf("crc15Bits = %#04x", got)
	}
}

// A hand-worked stream: ID 0, DLC 0 is SOF + 11 ID + RTR + IDE + r0 = 15
// dominant bits, then DLC 0000 = 4 more: 19 zeros = 5+5+5+4, a stuff bit
// after each full run of five (the inserted 1 ends the run): 3 stuff bits.
func TestStuffCountHandWorked(t *testing.T) {
	zeros := make([]uint8, 19)
	if got := stuffCount(zeros); got != 3 {
		t.Fatalf("stuffCount(19 zeros) = %d, want 3", got)
	}
	alt := []uint8{0, 1, 0, 1, 0, 1, 0, 1, 0, 1}
	if got := stuffCount(alt); got != 0 {
		t.Fatalf("alternating: %d stuff bits", got)
	}
	// 00000 then 1111: the stuff bit 1 joins the run, so 5 ones occur and a 0 is stuffed.
	if got := stuffCount([]uint8{0, 0, 0, 0, 0, 1, 1, 1, 1}); got != 2 {
		t.Fatalf("run continuing through stuff bit: %d, want 2", got)
	}
}

// Property: the stuffed stream has no run of six equal bits, destuffs to the
// original stream, and the actual count never exceeds the worst case.
func TestStuffingProperties(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 2))
	for i := 0; i < 5000; i++ {
		f := Frame{ID: uint32(rng.IntN(0x800)), DLC: uint8(rng.IntN(9))}
		if i%2 == 1 {
			f.Extended, f.ID = true, uint32(rng.IntN(0x20000000))
		}
		for j := 0; j < int(f.DLC); j++ {
			f.Data[j] = []byte{0x00, 0xFF, 0x55, byte(rng.IntN(256))}[rng.IntN(4)]
		}
		st := StuffBits(f)
		run, last := 0, uint8(2)
		var destuffed []uint8
		skip := false
		for _, b := range st {
			if skip {
				skip = false
				if b == last {
					t.Fatalf("%v: stuff bit equals the run", f)
				}
				last, run = b, 1
				continue
			}
			destuffed = append(destuffed, b)
			if b == last {
				run++
			} else {
				last, run = b, 1
			}
			if run > 5 {
				t.Fatalf("%v: run of %d equal bits", f, run)
			}
			if run == 5 {
				skip = true
			}
		}
		var s bitStream
		s.build(&f)
		if string(destuffed) != string(s.bits[:s.n]) {
			t.Fatalf("%v: destuffing does not give the original stream", f)
		}
		actual, worst, none := FrameBits(f, StuffActual), FrameBits(f, StuffWorstCase), FrameBits(f, StuffNone)
		if actual != none+len(st)-s.n || actual > worst || actual < none {
			t.Fatalf("%v: none %d actual %d worst %d", f, none, actual, worst)
		}
	}
}

func TestArbitrationKeyOrder(t *testing.T) {
	// Lower wins: lower ID; base before extended with same base ID; data before remote.
	order := []Frame{
		{ID: 0x100},
		{ID: 0x100, Remote: true},
		{ID: 0x100 << 18, Extended: true},
		{ID: 0x100<<18 | 1, Extended: true},
		{ID: 0x100<<18 | 1, Extended: true, Remote: true},
		{ID: 0x101},
	}
	for i := 1; i < len(order); i++ {
		if arbitrationKey(&order[i-1]) >= arbitrationKey(&order[i]) {
			t.Errorf("%v should win over %v", order[i-1], order[i])
		}
	}
}
