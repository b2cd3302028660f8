package obd

import (
	"errors"
	"fmt"
	"math"

	"github.com/plenum-engine/plenum/pipeline"
)

// Signal is a user-defined value carried in a service 01 PID or a service 22
// data identifier response. ByteOffset counts from the first data byte after
// the echo (after the PID for service 01, after the two DID bytes for 22).
// The value is raw·Scale + Offset, where raw is the Length-byte integer at
// ByteOffset, big- or little-endian, two's complement when Signed.
type Signal struct {
	Name       string        // channel name, snake_case, Plenum's own
	Quantity   string        // e.g. "pressure"
	Unit       pipeline.Unit // canonical unit the scaled value is in
	DID        uint16        // data identifier for service 22 (when UsePID is false)
	PID        PID           // service 01 PID (when UsePID is true)
	UsePID     bool          // read from service 01 PID instead of service 22 DID
	ByteOffset int           // first byte of the raw value
	Length     int           // 1–4 bytes
	Signed     bool          // two's complement
	BigEndian  bool          // most significant byte first
	Scale      float64       // multiplier; 0 is invalid
	Offset     float64       // added after scaling
}

// Validate checks the signal's layout and scaling.
func (s Signal) Validate() error {
	if err := (pipeline.Channel{Name: s.Name}).Validate(); err != nil {
		return fmt.Errorf("obd: signal: %w", err)
	}
	if s.Length < 1 || s.Length > 4 {
		return fmt.Errorf("obd: signal %q: Length %d: must be 1–4 bytes", s.Name, s.Length)
	}
	if s.ByteOffset < 0 || s.ByteOffset > 4095-s.Length {
		return fmt.Errorf("obd: signal %q: ByteOffset %d out of range", s.Name, s.ByteOffset)
	}
	if s.Scale == 0 || math.IsNaN(s.Scale) || math.IsInf(s.Scale, 0) {
		return fmt.Errorf("obd: signal %q: Scale %v: must be finite and non-zero", s.Name, s.Scale)
	}
	if math.IsNaN(s.Offset) || math.IsInf(s.Offset, 0) {
		return fmt.Errorf("obd: signal %q: Offset %v: must be finite", s.Name, s.Offset)
	}
	if s.UsePID && (IsBitmapPID(s.PID) || s.PID == 0) {
		return fmt.Errorf("obd: signal %q: PID 0x%02X is a supported-PID bitmap", s.Name, uint8(s.PID))
	}
	return nil
}

// Request returns the read request that carries the signal.
func (s Signal) Request() Request {
	if s.UsePID {
		r, _ := CurrentData(s.PID) // one PID never fails
		return r
	}
	return ReadDID(s.DID)
}

// ErrShortData is wrapped by Decode when the record is too short for the signal.
var ErrShortData = errors.New("obd: record too short for signal")

// Decode extracts the signal from record, the data bytes after the echo.
// It does not allocate on success.
func (s Signal) Decode(record []byte) (float64, error) {
	if s.Length < 1 || s.Length > 4 || s.ByteOffset < 0 {
		return 0, fmt.Errorf("obd: signal %q: invalid layout (call Validate)", s.Name)
	}
	end := s.ByteOffset + s.Length
	if end > len(record) {
		return 0, fmt.Errorf("obd: signal %q: bytes %d–%d beyond record of %d bytes: %w", s.Name, s.ByteOffset, end-1, len(record), ErrShortData)
	}
	b := record[s.ByteOffset:end]
	var raw uint32
	if s.BigEndian {
		for _, x := range b {
			raw = raw<<8 | uint32(x)
		}
	} else {
		for i := len(b) - 1; i >= 0; i-- {
			raw = raw<<8 | uint32(b[i])
		}
	}
	v := float64(raw)
	if s.Signed {
		shift := 32 - 8*uint(s.Length)
		v = float64(int32(raw<<shift) >> shift)
	}
	return v*s.Scale + s.Offset, nil
}
