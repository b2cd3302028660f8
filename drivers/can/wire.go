package can

import (
	"fmt"
	"time"
)

// Stuffing selects how the wire-time model counts stuff bits.
type Stuffing uint8

const (
	// StuffActual counts the stuff bits of the frame's real bit stream:
	// SOF through the CRC sequence, with the CRC-15 computed, one complementary
	// bit after every five equal bits (stuff bits included in the run).
	StuffActual Stuffing = iota
	// StuffWorstCase counts the worst case for the frame's length, ⌊(g+8s−1)/4⌋
	// (Davis et al. 2007, "CAN schedulability analysis: refuted, revisited and revised").
	StuffWorstCase
	// StuffNone counts no stuff bits.
	StuffNone
)

// String names the stuffing mode.
func (s Stuffing) String() string {
	switch s {
	case StuffActual:
		return "actual"
	case StuffWorstCase:
		return "worst-case"
	case StuffNone:
		return "none"
	}
	return fmt.Sprintf("stuffing(%d)", uint8(s))
}

// Fixed-form bits after the CRC sequence: CRC delimiter 1, ACK slot and
// delimiter 2, EOF 7, interframe space 3 (ISO 11898-1 field widths).
const trailerBits = 1 + 2 + 7 + 3

// crc15Poly is the CAN CRC-15 generator x^15+x^14+x^10+x^8+x^7+x^4+x^3+1 (ISO 11898-1).
const crc15Poly = 0x4599

// bitStream is SOF..data of a frame, MSB first, one bit per entry (0 dominant).
type bitStream struct {
	bits [1 + 11 + 1 + 1 + 18 + 1 + 2 + 4 + 64 + 15]uint8
	n    int
}

func (s *bitStream) put(v uint32, width int) {
	for i := width - 1; i >= 0; i-- {
		s.bits[s.n] = uint8(v>>uint(i)) & 1
		s.n++
	}
}

// build fills s with the unstuffed bits SOF..CRC of f.
func (s *bitStream) build(f *Frame) {
	s.n = 0
	rtr := uint32(0)
	if f.Remote {
		rtr = 1
	}
	s.put(0, 1) // SOF
	if f.Extended {
		s.put(f.ID>>18, 11) // base ID
		s.put(1, 1)         // SRR (recessive)
		s.put(1, 1)         // IDE (recessive: extended)
		s.put(f.ID, 18)     // ID extension
		s.put(rtr, 1)
		s.put(0, 2) // r1, r0
	} else {
		s.put(f.ID, 11)
		s.put(rtr, 1)
		s.put(0, 1) // IDE (dominant: base format)
		s.put(0, 1) // r0
	}
	s.put(uint32(f.DLC&0xF), 4)
	if !f.Remote {
		n := int(f.DLC)
		if n > MaxDLC {
			n = MaxDLC
		}
		for _, b := range f.Data[:n] {
			s.put(uint32(b), 8)
		}
	}
	s.put(uint32(crc15Bits(s.bits[:s.n])), 15)
}

// crc15Bits computes the CAN CRC-15 over bits (one bit per entry), as the
// shift-register procedure of ISO 11898-1 / Bosch CAN 2.0 describes it.
func crc15Bits(bits []uint8) uint16 {
	var crc uint16
	for _, b := range bits {
		next := b ^ uint8(crc>>14&1)
		crc = crc << 1 & 0x7FFF
		if next != 0 {
			crc ^= crc15Poly
		}
	}
	return crc
}

// CRC15 computes the CAN CRC-15 (polynomial 0x4599, initial value 0, no
// reflection) over the bits of data, most significant bit of each byte first.
func CRC15(data []byte) uint16 {
	var crc uint16
	for _, c := range data {
		for i := 7; i >= 0; i-- {
			next := (c >> uint(i) & 1) ^ uint8(crc>>14&1)
			crc = crc << 1 & 0x7FFF
			if next != 0 {
				crc ^= crc15Poly
			}
		}
	}
	return crc
}

// stuffCount returns the number of stuff bits a transmitter inserts into bits:
// after five consecutive equal bits it inserts one complementary bit, which
// itself starts the next run.
func stuffCount(bits []uint8) int {
	stuffed := 0
	run := 0
	var last uint8 = 2
	for _, b := range bits {
		if b == last {
			run++
		} else {
			last, run = b, 1
		}
		if run == 5 {
			stuffed++
			last ^= 1 // the stuff bit
			run = 1
		}
	}
	return stuffed
}

// StuffBits returns f's bit stream from SOF to the end of the CRC sequence
// after bit stuffing, one bit per byte (0 = dominant, 1 = recessive).
func StuffBits(f Frame) []uint8 {
	var s bitStream
	s.build(&f)
	out := make([]uint8, 0, s.n+s.n/4+1)
	run := 0
	var last uint8 = 2
	for _, b := range s.bits[:s.n] {
		out = append(out, b)
		if b == last {
			run++
		} else {
			last, run = b, 1
		}
		if run == 5 {
			last ^= 1
			out = append(out, last)
			run = 1
		}
	}
	return out
}

// FrameBits returns the number of bit times f occupies on the bus, from SOF
// through the 3-bit interframe space, with stuff bits counted as m says.
//
// Without stuffing an 11-bit data frame has 47+8s bits and a 29-bit one 67+8s
// (s data bytes); for 8 bytes that is 111 and 131 bits, and the worst case
// adds 24 and 29 stuff bits: 135 and 160 (Davis et al. 2007; ISO 11898-1
// field widths).
func FrameBits(f Frame, m Stuffing) int {
	var s bitStream
	s.build(&f)
	n := s.n + trailerBits
	switch m {
	case StuffNone:
	case StuffWorstCase:
		// s.n is g + 8s: the stuffable bits SOF..CRC.
		n += (s.n - 1) / 4
	default:
		n += stuffCount(s.bits[:s.n])
	}
	return n
}

// FrameDuration returns how long f occupies a bus running at bitRate bit/s.
func FrameDuration(f Frame, bitRate int, m Stuffing) time.Duration {
	if bitRate <= 0 {
		return 0
	}
	return time.Duration(int64(FrameBits(f, m)) * int64(time.Second) / int64(bitRate))
}

// arbitrationKey orders frames as bitwise arbitration does: a lower key wins.
// The key is the arbitration field as a bit string (base ID, RTR or SRR, IDE,
// ID extension, RTR), padded for base-format frames; a dominant (0) bit wins.
func arbitrationKey(f *Frame) uint32 {
	rtr := uint32(0)
	if f.Remote {
		rtr = 1
	}
	if f.Extended {
		return (f.ID>>18)<<21 | 1<<20 | 1<<19 | (f.ID&0x3FFFF)<<1 | rtr
	}
	return f.ID<<21 | rtr<<20
}
