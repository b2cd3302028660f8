package obd

import (
	"errors"
	"fmt"
	"strings"
)

// PID is a SAE J1979 parameter identifier (service 01/02) or InfoType (service 09).
type PID uint8

// service is a request service identifier. It is unexported and its only
// values are the constants below, so no code outside this package can make a
// Request carry any other service byte (design notes: the ECU is read-only).
type service uint8

// The read services, and nothing else.
const (
	svcCurrentData     service = 0x01 // SAE J1979 service 01: current powertrain data
	svcFreezeFrame     service = 0x02 // SAE J1979 service 02: freeze frame data
	svcStoredDTCs      service = 0x03 // SAE J1979 service 03: confirmed emission DTCs
	svcPendingDTCs     service = 0x07 // SAE J1979 service 07: pending emission DTCs
	svcVehicleInfo     service = 0x09 // SAE J1979 service 09: vehicle information
	svcReadDataByIdent service = 0x22 // ISO 14229-1 service 22: ReadDataByIdentifier
)

// MaxPIDsPerRequest is the most PIDs one service 01 request may carry on
// ISO 15765-4 (SAE J1979 / ISO 15031-5, from memory: no citable text read).
const MaxPIDsPerRequest = 6

// ErrZeroRequest is returned when the zero Request, built by no constructor, is encoded.
var ErrZeroRequest = errors.New("obd: zero Request (use a constructor such as CurrentData)")

// Request is one read request. Build it with CurrentData, FreezeFrame,
// StoredDTCs, PendingDTCs, VehicleInfo or ReadDID; it has no exported fields.
// Requests are small values, safe to copy and to share between goroutines.
type Request struct {
	svc service
	n   uint8   // number of used bytes in arg
	arg [6]byte // PIDs, PID+frame, InfoType, or DID (big-endian)
}

// CurrentData requests service 01 PIDs: 1 to 6 of them in one request
// (`01 pid…`). PID 0x00, 0x20, … ask for the supported-PID bitmaps.
func CurrentData(pids ...PID) (Request, error) {
	if len(pids) == 0 || len(pids) > MaxPIDsPerRequest {
		return Request{}, fmt.Errorf("obd: service 01 request with %d PIDs: must carry 1–%d", len(pids), MaxPIDsPerRequest)
	}
	r := Request{svc: svcCurrentData, n: uint8(len(pids))}
	for i, p := range pids {
		for _, q := range pids[:i] {
			if q == p {
				return Request{}, fmt.Errorf("obd: service 01 request: PID 0x%02X repeated at position %d", uint8(p), i)
			}
		}
		r.arg[i] = byte(p)
	}
	return r, nil
}

// FreezeFrame requests service 02 PID pid of freeze frame number frame (`02 pid frame`).
func FreezeFrame(pid PID, frame uint8) Request {
	return Request{svc: svcFreezeFrame, n: 2, arg: [6]byte{byte(pid), frame}}
}

// StoredDTCs requests the confirmed emission-related DTCs (service 03).
func StoredDTCs() Request { return Request{svc: svcStoredDTCs} }

// PendingDTCs requests the pending emission-related DTCs (service 07).
func PendingDTCs() Request { return Request{svc: svcPendingDTCs} }

// VehicleInfo requests service 09 InfoType info, e.g. 0x02 for the VIN (`09 02`).
func VehicleInfo(info PID) Request {
	return Request{svc: svcVehicleInfo, n: 1, arg: [6]byte{byte(info)}}
}

// ReadDID requests one data identifier with ISO 14229-1 service 22 (`22 hi lo`).
func ReadDID(did uint16) Request {
	return Request{svc: svcReadDataByIdent, n: 2, arg: [6]byte{byte(did >> 8), byte(did)}}
}

// IsZero reports whether r was built by no constructor.
func (r Request) IsZero() bool { return r.svc == 0 }

// Service returns the request's service identifier (0x01, 0x02, 0x03, 0x07,
// 0x09 or 0x22), or 0 for the zero Request.
func (r Request) Service() byte { return byte(r.svc) }

// NumPIDs returns how many PIDs a service 01 request carries (0 for other services).
func (r Request) NumPIDs() int {
	if r.svc != svcCurrentData {
		return 0
	}
	return int(r.n)
}

// PID returns the i-th PID of a service 01 request, or the PID of a service 02
// or 09 request when i is 0.
func (r Request) PID(i int) PID {
	if i < 0 || i >= int(r.n) || r.svc == svcReadDataByIdent {
		return 0
	}
	return PID(r.arg[i])
}

// DID returns the data identifier of a service 22 request.
func (r Request) DID() uint16 {
	if r.svc != svcReadDataByIdent {
		return 0
	}
	return uint16(r.arg[0])<<8 | uint16(r.arg[1])
}

// PayloadLen is the encoded length in bytes (1–7), 0 for the zero Request.
func (r Request) PayloadLen() int {
	if r.svc == 0 {
		return 0
	}
	return 1 + int(r.n)
}

// AppendPayload appends the request's ISO-TP payload (service byte then
// arguments, at most 7 bytes, always one single frame) to dst.
func (r Request) AppendPayload(dst []byte) ([]byte, error) {
	if r.svc == 0 {
		return dst, ErrZeroRequest
	}
	dst = append(dst, byte(r.svc))
	return append(dst, r.arg[:r.n]...), nil
}

// String renders the payload in hex, e.g. "01 0C 0D".
func (r Request) String() string {
	if r.svc == 0 {
		return "(zero request)"
	}
	var b strings.Builder
	fmt.Fprintf(&b, "%02X", byte(r.svc))
	for _, x := range r.arg[:r.n] {
		fmt.Fprintf(&b, " %02X", x)
	}
	return b.String()
}
