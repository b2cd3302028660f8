package obd

import (
	"errors"
	"fmt"
)

// NRC is an ISO 14229-1 negative response code.
type NRC uint8

// Negative response codes (ISO 14229-1:2013 NRC table).
const (
	NRCGeneralReject                           NRC = 0x10
	NRCServiceNotSupported                     NRC = 0x11
	NRCSubFunctionNotSupported                 NRC = 0x12
	NRCIncorrectMessageLengthOrInvalidFormat   NRC = 0x13
	NRCBusyRepeatRequest                       NRC = 0x21
	NRCConditionsNotCorrect                    NRC = 0x22
	NRCRequestOutOfRange                       NRC = 0x31
	NRCRequestCorrectlyReceivedResponsePending NRC = 0x78
)

// String returns the ISO 14229-1 name of the code, e.g. "requestOutOfRange".
func (n NRC) String() string {
	switch n {
	case NRCGeneralReject:
		return "generalReject"
	case NRCServiceNotSupported:
		return "serviceNotSupported"
	case NRCSubFunctionNotSupported:
		return "subFunctionNotSupported"
	case NRCIncorrectMessageLengthOrInvalidFormat:
		return "incorrectMessageLengthOrInvalidFormat"
	case NRCBusyRepeatRequest:
		return "busyRepeatRequest"
	case NRCConditionsNotCorrect:
		return "conditionsNotCorrect"
	case NRCRequestOutOfRange:
		return "requestOutOfRange"
	case NRCRequestCorrectlyReceivedResponsePending:
		return "requestCorrectlyReceived-ResponsePending"
	// The names below are from memory of ISO 14229-1 (not in reference-facts).
	case 0x14:
		return "responseTooLong"
	case 0x24:
		return "requestSequenceError"
	case 0x33:
		return "securityAccessDenied"
	case 0x7E:
		return "subFunctionNotSupportedInActiveSession"
	case 0x7F:
		return "serviceNotSupportedInActiveSession"
	}
	return fmt.Sprintf("nrc(0x%02X)", uint8(n))
}

// Unsupported reports whether the code says the request itself is not
// supported (0x11, 0x12, 0x31): retrying it is pointless.
func (n NRC) Unsupported() bool {
	return n == NRCServiceNotSupported || n == NRCSubFunctionNotSupported || n == NRCRequestOutOfRange
}

// NegativeError is a negative response `7F sid nrc` seen as an error.
type NegativeError struct {
	Service byte // the rejected request's service identifier
	NRC     NRC
}

// Error implements error.
func (e *NegativeError) Error() string {
	return fmt.Sprintf("obd: service 0x%02X rejected: NRC 0x%02X %s", e.Service, uint8(e.NRC), e.NRC)
}

// ErrUnsupported is matched (errors.Is) by a NegativeError whose NRC marks the request unsupported.
var ErrUnsupported = errors.New("obd: request not supported by the ECU")

// Is lets errors.Is(err, ErrUnsupported) match NRCs 0x11, 0x12 and 0x31.
func (e *NegativeError) Is(target error) bool { return target == ErrUnsupported && e.NRC.Unsupported() }

// Response is a parsed response payload. For a positive response Service is
// the request's service (the response SID minus 0x40) and Data holds the bytes
// after the SID, aliasing the payload. For a negative response Negative is
// set, Service is the rejected service and NRC the code; Data is empty.
type Response struct {
	Service  byte
	Negative bool
	NRC      NRC
	Data     []byte
}

// Err returns the negative response as a *NegativeError, or nil.
func (r Response) Err() error {
	if !r.Negative {
		return nil
	}
	return &NegativeError{Service: r.Service, NRC: r.NRC}
}

// ParseResponse checks the response SID of a reassembled ISO-TP payload. It
// accepts positive responses to the six read services (0x41, 0x42, 0x43, 0x47,
// 0x49, 0x62) and negative responses `7F sid nrc`. It does not allocate.
func ParseResponse(p []byte) (Response, error) {
	if len(p) == 0 {
		return Response{}, errors.New("obd: empty response payload")
	}
	if p[0] == 0x7F {
		if len(p) != 3 {
			return Response{}, fmt.Errorf("obd: negative response: %d bytes, want 3 (7F sid nrc)", len(p))
		}
		return Response{Service: p[1], Negative: true, NRC: NRC(p[2])}, nil
	}
	switch service(p[0] - 0x40) {
	case svcCurrentData, svcFreezeFrame, svcStoredDTCs, svcPendingDTCs, svcVehicleInfo, svcReadDataByIdent:
		if p[0] < 0x40 {
			break
		}
		return Response{Service: p[0] - 0x40, Data: p[1:]}, nil
	}
	return Response{}, fmt.Errorf("obd: byte 0: response SID 0x%02X is not a reply to a read service", p[0])
}

// WalkCurrentData splits service 01 response data (after the 0x41) into its
// PIDs: `pidA dataA pidB dataB …`, in any order, each length taken from the
// decode table. An unknown PID stops the walk with an error naming its offset
// in data. It does not allocate.
func WalkCurrentData(data []byte, fn func(pid PID, b []byte)) error {
	if len(data) == 0 {
		return errors.New("obd: service 01 response: no PID")
	}
	for off := 0; off < len(data); {
		pid := PID(data[off])
		n, ok := PIDLength(pid)
		if !ok {
			return fmt.Errorf("obd: service 01 response: unknown PID 0x%02X at offset %d", uint8(pid), off+1)
		}
		if off+1+n > len(data) {
			return fmt.Errorf("obd: service 01 response: PID 0x%02X at offset %d needs %d bytes, %d left", uint8(pid), off+1, n, len(data)-off-1)
		}
		fn(pid, data[off+1:off+1+n])
		off += 1 + n
	}
	return nil
}

// DecodeCurrentData decodes every PID of service 01 response data (after the
// 0x41), calling fn for each field present. Offsets in errors count from the
// start of the payload (the 0x41 is offset 0). It does not allocate.
func DecodeCurrentData(data []byte, fn FieldFunc) error {
	var err error
	werr := WalkCurrentData(data, func(pid PID, b []byte) {
		if err == nil {
			err = DecodePID(pid, b, fn)
		}
	})
	if werr != nil {
		return werr
	}
	return err
}

// DecodeFreezeFrame decodes service 02 response data (after the 0x42):
// `pid frame data…`, repeated; fn gets each field and the frame number.
func DecodeFreezeFrame(data []byte, fn func(frame uint8, pid PID, ch ChannelIndex, v float64)) error {
	if len(data) == 0 {
		return errors.New("obd: service 02 response: no PID")
	}
	for off := 0; off < len(data); {
		if off+2 > len(data) {
			return fmt.Errorf("obd: service 02 response: truncated PID/frame pair at offset %d", off+1)
		}
		pid, frame := PID(data[off]), data[off+1]
		n, ok := PIDLength(pid)
		if !ok {
			return fmt.Errorf("obd: service 02 response: unknown PID 0x%02X at offset %d", uint8(pid), off+1)
		}
		if off+2+n > len(data) {
			return fmt.Errorf("obd: service 02 response: PID 0x%02X at offset %d needs %d bytes, %d left", uint8(pid), off+1, n, len(data)-off-2)
		}
		if err := DecodePID(pid, data[off+2:off+2+n], func(p PID, ch ChannelIndex, v float64) { fn(frame, p, ch, v) }); err != nil {
			return err
		}
		off += 2 + n
	}
	return nil
}

// PIDSet is a set of service 01 PIDs, filled from supported-PID bitmaps. The
// zero value is empty.
type PIDSet [4]uint64

// Has reports whether pid is in the set.
func (s *PIDSet) Has(pid PID) bool { return s[pid>>6]&(1<<(pid&63)) != 0 }

// Add puts pid in the set.
func (s *PIDSet) Add(pid PID) { s[pid>>6] |= 1 << (pid & 63) }

// AddBitmap adds the PIDs of one supported-PID bitmap: base is the bitmap PID
// (0x00, 0x20, …, 0xE0), b its 4 data bytes; bit A7 is PID base+1 … D0 is
// base+0x20 (SAE J1979 / ISO 15031-5; [WP-PIDs], cross-checked with Scapy).
// It reports whether the next bitmap (base+0x20) is supported, i.e. bit D0.
func (s *PIDSet) AddBitmap(base PID, b []byte) (next bool, err error) {
	if !IsBitmapPID(base) {
		return false, fmt.Errorf("obd: PID 0x%02X is not a supported-PID bitmap", uint8(base))
	}
	if len(b) != 4 {
		return false, fmt.Errorf("obd: bitmap PID 0x%02X: %d bytes, want 4", uint8(base), len(b))
	}
	for i := 0; i < 32; i++ {
		if b[i/8]&(0x80>>(i%8)) != 0 && int(base)+1+i <= 0xFF {
			s.Add(base + PID(1+i))
		}
	}
	return b[3]&1 != 0 && base < 0xE0, nil
}

// DTC is a diagnostic trouble code as two raw bytes (A<<8 | B).
type DTC uint16

// String formats the code per SAE J2012: a letter from bits A7–A6 (P, C, B, U)
// then four hex digits, e.g. 0x0133 → "P0133", 0xC158 → "U0158".
func (d DTC) String() string {
	var b [5]byte
	return string(d.appendTo(b[:0]))
}

// AppendText implements encoding.TextAppender.
func (d DTC) AppendText(b []byte) ([]byte, error) { return d.appendTo(b), nil }

func (d DTC) appendTo(b []byte) []byte {
	const hex = "0123456789ABCDEF"
	return append(b, "PCBU"[d>>14], hex[(d>>12)&3], hex[(d>>8)&15], hex[(d>>4)&15], hex[d&15])
}

// DecodeDTCs decodes service 03 or 07 response data (after the 0x43/0x47):
// `count A B …` (ISO 15765-4 carries the count byte). 00 00 pairs are padding
// and skipped. It does not allocate.
func DecodeDTCs(data []byte, fn func(DTC)) error {
	if len(data) == 0 {
		return errors.New("obd: DTC response: missing count byte at offset 1")
	}
	n := int(data[0])
	if len(data)-1 != 2*n {
		return fmt.Errorf("obd: DTC response: count %d needs %d bytes after offset 1, have %d", n, 2*n, len(data)-1)
	}
	for i := 0; i < n; i++ {
		d := DTC(data[1+2*i])<<8 | DTC(data[2+2*i])
		if d != 0 {
			fn(d)
		}
	}
	return nil
}

// VINLength is the length of a vehicle identification number.
const VINLength = 17

// DecodeVIN decodes service 09 InfoType 02 response data (after the 0x49):
// `02 01` then 17 ASCII characters (SAE J1979 service 09). Characters must be
// digits or capital letters other than I, O and Q (ISO 3779, from memory).
func DecodeVIN(data []byte) (string, error) {
	if len(data) != 2+VINLength {
		return "", fmt.Errorf("obd: VIN response: %d bytes after SID, want %d (02 01 + 17 characters)", len(data), 2+VINLength)
	}
	if data[0] != 0x02 {
		return "", fmt.Errorf("obd: VIN response: byte 1: InfoType 0x%02X, want 0x02", data[0])
	}
	if data[1] != 0x01 {
		return "", fmt.Errorf("obd: VIN response: byte 2: %d data items, want 1", data[1])
	}
	v := data[2:]
	for i, c := range v {
		ok := (c >= '0' && c <= '9') || (c >= 'A' && c <= 'Z' && c != 'I' && c != 'O' && c != 'Q')
		if !ok {
			return "", fmt.Errorf("obd: VIN response: byte %d: 0x%02X is not a VIN character", 3+i, c)
		}
	}
	return string(v), nil
}

// DecodeDID checks a service 22 response data (after the 0x62) against the
// requested identifier and returns the record bytes after the DID.
func DecodeDID(data []byte, did uint16) ([]byte, error) {
	if len(data) < 2 {
		return nil, fmt.Errorf("obd: service 22 response: %d bytes, missing DID at offset 1", len(data))
	}
	got := uint16(data[0])<<8 | uint16(data[1])
	if got != did {
		return nil, fmt.Errorf("obd: service 22 response: offset 1: DID 0x%04X, requested 0x%04X", got, did)
	}
	return data[2:], nil
}
