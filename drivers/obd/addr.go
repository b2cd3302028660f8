package obd

import (
	"fmt"
)

// Format is the CAN identifier format of an ISO 15765-4 bus.
type Format uint8

const (
	// ID11 uses 11-bit identifiers: functional 0x7DF, physical 0x7E0–0x7E7,
	// responses 0x7E8–0x7EF (request + 8). ISO 15765-4, see reference-facts §2.5
	// (C via [WP-PIDs] mirror and several sources).
	ID11 Format = iota
	// ID29 uses 29-bit normal fixed addressing: functional 0x18DB33F1, physical
	// request 0x18DAxxF1, response 0x18DAF1xx (xx = ECU address, F1 = tester).
	// ISO 15765-2 Tables 26–27 structure; ISO 15765-4 values (reference-facts §2.5).
	ID29
)

// String returns "11bit" or "29bit".
func (f Format) String() string {
	switch f {
	case ID11:
		return "11bit"
	case ID29:
		return "29bit"
	}
	return fmt.Sprintf("format(%d)", uint8(f))
}

// ISO 15765-4 identifiers (reference-facts §2.5).
const (
	// FunctionalID11 is the 11-bit functional (broadcast) request identifier.
	FunctionalID11 uint32 = 0x7DF
	// PhysicalID11Base is the 11-bit physical request identifier of ECU #1; ECU n uses base+n.
	PhysicalID11Base uint32 = 0x7E0
	// ResponseID11Base is the 11-bit response identifier of ECU #1 (request + 8).
	ResponseID11Base uint32 = 0x7E8
	// FunctionalID29 is the 29-bit functional request identifier: priority 6, PF 0xDB, TA 0x33, SA 0xF1.
	FunctionalID29 uint32 = 0x18DB33F1
	// PhysicalID29Base is the 29-bit physical request identifier with the ECU address byte zeroed (PF 0xDA, SA 0xF1).
	PhysicalID29Base uint32 = 0x18DA00F1
	// ResponseID29Base is the 29-bit response identifier with the ECU address byte zeroed (TA 0xF1).
	ResponseID29Base uint32 = 0x18DAF100
	// TesterAddress is the external test equipment's address in 29-bit identifiers.
	TesterAddress uint8 = 0xF1
)

// BitRate is a CAN bit rate in bit/s.
type BitRate uint32

// ISO 15765-4 bit rates (reference-facts §2.5, M [ISO15765-4]).
const (
	// BitRate500k is 500 kbit/s.
	BitRate500k BitRate = 500_000
	// BitRate250k is 250 kbit/s.
	BitRate250k BitRate = 250_000
)

// Validate reports whether b is one of the ISO 15765-4 bit rates.
func (b BitRate) Validate() error {
	if b != BitRate500k && b != BitRate250k {
		return fmt.Errorf("obd: bit rate %d bit/s: ISO 15765-4 allows 500000 or 250000", uint32(b))
	}
	return nil
}

// Addr names a request destination or a response source on an ISO 15765-4 bus.
// Functional addresses every emissions ECU at once (requests only). A physical
// Addr names one ECU: for ID11, ECU is the index 0–7 (0x7E0+ECU / 0x7E8+ECU);
// for ID29, ECU is the ECU's 8-bit address (0x18DA<ECU>F1 / 0x18DAF1<ECU>).
// The zero value is the 11-bit physical address of ECU #1 (0x7E0/0x7E8).
type Addr struct {
	Format     Format
	Functional bool
	ECU        uint8
}

// FunctionalAddr returns the functional (broadcast) request address for f.
func FunctionalAddr(f Format) Addr { return Addr{Format: f, Functional: true} }

// PhysicalAddr returns the physical address of an ECU: index 0–7 for ID11,
// the ECU's address byte for ID29.
func PhysicalAddr(f Format, ecu uint8) (Addr, error) {
	a := Addr{Format: f, ECU: ecu}
	return a, a.Validate()
}

// AddrFromResponseID maps a response CAN identifier to the ECU that sent it:
// 0x7E8–0x7EF for ID11, 0x18DAF1xx for ID29.
func AddrFromResponseID(f Format, id uint32) (Addr, error) {
	switch f {
	case ID11:
		if id < ResponseID11Base || id > ResponseID11Base+7 {
			return Addr{}, fmt.Errorf("obd: CAN ID 0x%X is not an 11-bit OBD response ID (0x7E8–0x7EF)", id)
		}
		return Addr{Format: ID11, ECU: uint8(id - ResponseID11Base)}, nil
	case ID29:
		if id&^0xFF != ResponseID29Base {
			return Addr{}, fmt.Errorf("obd: CAN ID 0x%X is not a 29-bit OBD response ID (0x18DAF1xx)", id)
		}
		return Addr{Format: ID29, ECU: uint8(id)}, nil
	}
	return Addr{}, fmt.Errorf("obd: unknown identifier format %d", uint8(f))
}

// Validate checks that a names a possible ISO 15765-4 address.
func (a Addr) Validate() error {
	switch a.Format {
	case ID11:
		if !a.Functional && a.ECU > 7 {
			return fmt.Errorf("obd: 11-bit ECU index %d out of range 0–7", a.ECU)
		}
	case ID29:
		if !a.Functional && a.ECU == TesterAddress {
			return fmt.Errorf("obd: 29-bit ECU address 0x%02X is the tester's own", a.ECU)
		}
	default:
		return fmt.Errorf("obd: unknown identifier format %d", uint8(a.Format))
	}
	return nil
}

// RequestID is the CAN identifier a request to a is sent on.
func (a Addr) RequestID() uint32 {
	switch {
	case a.Format == ID11 && a.Functional:
		return FunctionalID11
	case a.Format == ID11:
		return PhysicalID11Base + uint32(a.ECU&7)
	case a.Functional:
		return FunctionalID29
	default:
		return PhysicalID29Base | uint32(a.ECU)<<8
	}
}

// ResponseID is the CAN identifier the ECU a answers on; ok is false for a
// functional address, which has no single responder.
func (a Addr) ResponseID() (id uint32, ok bool) {
	switch {
	case a.Functional:
		return 0, false
	case a.Format == ID11:
		return ResponseID11Base + uint32(a.ECU&7), true
	default:
		return ResponseID29Base | uint32(a.ECU), true
	}
}

// String names the address by its CAN identifier: the response ID for an ECU
// (e.g. "7E8", "18DAF110"), the request ID for a functional address ("7DF").
func (a Addr) String() string {
	if id, ok := a.ResponseID(); ok {
		return fmt.Sprintf("%X", id)
	}
	return fmt.Sprintf("%X", a.RequestID())
}
