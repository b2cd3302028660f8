package isotp

import (
	"errors"
	"fmt"
	"time"
)

// N_PCI types, the high nibble of the first data byte (ISO 15765-2 Table 8).
const (
	pciSF = 0x0
	pciFF = 0x1
	pciCF = 0x2
	pciFC = 0x3
)

// Limits of classical CAN with normal addressing (ISO 15765-2 Tables 9–11).
const (
	// MaxSingleFrame is the largest payload of a single frame (SF_DL 1–7).
	MaxSingleFrame = 7
	// Max12BitLength is the largest FF_DL of a non-escaped first frame.
	Max12BitLength = 0xFFF
	// MaxLength is the largest FF_DL an escaped first frame can announce.
	MaxLength = 0xFFFFFFFF
	// DefaultPadding is the padding byte, chosen "to minimize the stuff-bit
	// insertions" (ISO 15765-2 §10.4.2.1; also the Linux default).
	DefaultPadding byte = 0xCC
)

// Timing presets for N_Bs (sender waiting for FC) and N_Cr (receiver waiting for CF).
const (
	// GenericNBs and GenericNCr are the ISO 15765-2 timeouts, 1000 ms each
	// (ISO 15765-2 Table 21; the Linux and Zephyr implementations agree).
	GenericNBs = 1000 * time.Millisecond
	GenericNCr = 1000 * time.Millisecond
	// OBDNBs and OBDNCr are the ISO 15765-4 network timing for emissions
	// OBD, 75 ms and 150 ms (from memory of ISO 15765-4, matching a
	// published ISO 15765-3/14229-2 timing table; not read in the standard).
	OBDNBs = 75 * time.Millisecond
	OBDNCr = 150 * time.Millisecond
)

// Errors. Each is wrapped with the CAN ID and, where known, the byte offset.
var (
	// ErrIgnored: the frame was ignored as ISO 15765-2 requires (unknown or
	// reserved PCI, bad length, unexpected CF); any message in progress continues.
	ErrIgnored = errors.New("isotp: frame ignored")
	// ErrWrongSN: a CF carried the wrong sequence number; the message was aborted (N_WRONG_SN).
	ErrWrongSN = errors.New("isotp: wrong sequence number")
	// ErrShortFrame: a CF carried fewer bytes than the message still needed; the message was aborted.
	ErrShortFrame = errors.New("isotp: consecutive frame too short")
	// ErrInterrupted: a new SF or FF from the same sender abandoned the message in progress (N_UNEXP_PDU).
	ErrInterrupted = errors.New("isotp: message interrupted by a new message")
	// ErrTooLong: an FF announced more than the receiver accepts; FC Overflow was sent.
	ErrTooLong = errors.New("isotp: message longer than the receive buffer")
	// ErrTimeout: N_Bs (no FC) or N_Cr (no CF) expired; the message was aborted.
	ErrTimeout = errors.New("isotp: timeout")
	// ErrOverflow: the peer answered our FF with FC Overflow.
	ErrOverflow = errors.New("isotp: peer reported overflow")
	// ErrInvalidFS: the peer sent an FC with a reserved flow status (N_INVALID_FS).
	ErrInvalidFS = errors.New("isotp: invalid flow status")
	// ErrWaitLimit: the peer sent more consecutive FC Wait frames than allowed (N_WFTmax).
	ErrWaitLimit = errors.New("isotp: too many flow control waits")
	// ErrClosed: the Conn was closed.
	ErrClosed = errors.New("isotp: closed")
)

// FlowStatus is the FS field of a flow control frame (ISO 15765-2 Table 18).
type FlowStatus uint8

const (
	// ContinueToSend (CTS) lets the sender send the next block.
	ContinueToSend FlowStatus = 0
	// Wait asks the sender to wait for another FC.
	Wait FlowStatus = 1
	// Overflow says the message does not fit; the sender aborts.
	Overflow FlowStatus = 2
)

// String names the flow status.
func (s FlowStatus) String() string {
	switch s {
	case ContinueToSend:
		return "CTS"
	case Wait:
		return "WAIT"
	case Overflow:
		return "OVFLW"
	}
	return fmt.Sprintf("FS(%d)", uint8(s))
}

// FlowControl is the content of an FC frame: status, block size (0: send
// all remaining CFs without further FC) and the raw STmin byte.
type FlowControl struct {
	Status    FlowStatus
	BlockSize uint8
	STmin     byte
}

// parseFlowControl decodes an FC frame's data (PCI byte first).
func parseFlowControl(data []byte) (FlowControl, error) {
	if len(data) < 3 {
		return FlowControl{}, fmt.Errorf("FC of %d bytes, need 3: %w", len(data), ErrIgnored)
	}
	if data[0]>>4 != pciFC {
		return FlowControl{}, fmt.Errorf("byte 0: PCI type %d is not FC: %w", data[0]>>4, ErrIgnored)
	}
	fc := FlowControl{Status: FlowStatus(data[0] & 0xF), BlockSize: data[1], STmin: data[2]}
	if fc.Status > Overflow {
		return fc, fmt.Errorf("byte 0: flow status %d: %w", fc.Status, ErrInvalidFS)
	}
	return fc, nil
}

// DecodeSTmin converts an STmin byte to a duration (ISO 15765-2 Table 20):
// 0x00–0x7F are 0–127 ms, 0xF1–0xF9 are 100–900 µs. A reserved value
// (0x80–0xF0, 0xFA–0xFF) makes the sender use 0x7F = 127 ms (§9.6.5.5).
func DecodeSTmin(b byte) time.Duration {
	switch {
	case b <= 0x7F:
		return time.Duration(b) * time.Millisecond
	case b >= 0xF1 && b <= 0xF9:
		return time.Duration(b-0xF0) * 100 * time.Microsecond
	}
	return 127 * time.Millisecond
}

// EncodeSTmin returns the smallest STmin byte whose duration is at least d.
// It fails for d < 0 or d > 127 ms.
func EncodeSTmin(d time.Duration) (byte, error) {
	switch {
	case d < 0 || d > 127*time.Millisecond:
		return 0, fmt.Errorf("isotp: STmin %v outside 0–127 ms", d)
	case d == 0:
		return 0, nil
	case d <= 900*time.Microsecond:
		return 0xF0 + byte((d+100*time.Microsecond-1)/(100*time.Microsecond)), nil
	}
	return byte((d + time.Millisecond - 1) / time.Millisecond), nil
}
