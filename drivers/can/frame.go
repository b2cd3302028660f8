package can

import (
	"errors"
	"fmt"
	"strings"
)

// Identifier limits (ISO 11898-1).
const (
	// MaxStandardID is the largest 11-bit (base format) identifier.
	MaxStandardID uint32 = 0x7FF
	// MaxExtendedID is the largest 29-bit (extended format) identifier.
	MaxExtendedID uint32 = 0x1FFFFFFF
	// MaxDLC is the largest data length code of a classical CAN frame with 8 data bytes.
	MaxDLC = 8
)

// ErrInvalidFrame is wrapped by every error from Frame.Validate and ParseFrame.
var ErrInvalidFrame = errors.New("invalid CAN frame")

// Frame is one classical CAN data or remote frame.
//
// The zero value is a valid data frame with 11-bit ID 0 and no data. Bytes of
// Data beyond DLC are not transmitted; Validate requires them to be zero so
// that two equal frames compare equal with ==.
type Frame struct {
	// ID is the identifier: 0–0x7FF, or 0–0x1FFFFFFF when Extended.
	ID uint32
	// Extended selects the 29-bit identifier format.
	Extended bool
	// Remote marks a remote transmission request (RTR): no data bytes on the wire.
	Remote bool
	// DLC is the data length code, 0–8; for a data frame it is the number of bytes in Data.
	DLC uint8
	// Data holds the payload; only Data[:DLC] is meaningful.
	Data [8]byte
}

// Payload returns the transmitted data bytes, Data[:DLC] (nil for a remote frame).
// The slice aliases f's array, so it is only valid while f is.
func (f *Frame) Payload() []byte {
	if f.Remote || f.DLC > MaxDLC {
		return nil
	}
	return f.Data[:f.DLC]
}

// Validate reports whether f is a transmittable classical CAN frame.
func (f Frame) Validate() error {
	if f.Extended {
		if f.ID > MaxExtendedID {
			return fmt.Errorf("can: frame ID 0x%X: %w: 29-bit ID exceeds 0x1FFFFFFF", f.ID, ErrInvalidFrame)
		}
	} else if f.ID > MaxStandardID {
		return fmt.Errorf("can: frame ID 0x%X: %w: 11-bit ID exceeds 0x7FF", f.ID, ErrInvalidFrame)
	}
	if f.DLC > MaxDLC {
		return fmt.Errorf("can: frame ID 0x%X: %w: DLC %d exceeds 8", f.ID, ErrInvalidFrame, f.DLC)
	}
	start := int(f.DLC)
	if f.Remote {
		start = 0
	}
	for i := start; i < len(f.Data); i++ {
		if f.Data[i] != 0 {
			return fmt.Errorf("can: frame ID 0x%X: %w: data byte %d set beyond DLC %d", f.ID, ErrInvalidFrame, i, f.DLC)
		}
	}
	return nil
}

// String formats f in the compact "ID#DATA" notation of the Linux can-utils:
// three hex digits for an 11-bit ID, eight for a 29-bit ID, then the data
// bytes in upper-case hex ("7E8#0641000000000000"); a remote frame is "7DF#R"
// (with the DLC appended when it is not 0, "7DF#R8").
func (f Frame) String() string {
	var b strings.Builder
	if f.Extended {
		fmt.Fprintf(&b, "%08X#", f.ID)
	} else {
		fmt.Fprintf(&b, "%03X#", f.ID)
	}
	if f.Remote {
		b.WriteByte('R')
		if f.DLC != 0 {
			fmt.Fprintf(&b, "%d", f.DLC)
		}
		return b.String()
	}
	n := int(f.DLC)
	if n > MaxDLC {
		n = MaxDLC
	}
	for _, c := range f.Data[:n] {
		fmt.Fprintf(&b, "%02X", c)
	}
	return b.String()
}

// ParseFrame parses the notation written by Frame.String: "ID#DATA" with a
// 3-digit (11-bit) or 8-digit (29-bit) hex ID, up to 8 data bytes as hex
// pairs optionally separated by '.', or "ID#R" / "ID#R<dlc>" for a remote
// frame. Errors name the byte offset of the problem.
func ParseFrame(s string) (Frame, error) {
	var f Frame
	hash := strings.IndexByte(s, '#')
	if hash < 0 {
		return f, fmt.Errorf("can: parse %q: %w: no '#' separator", s, ErrInvalidFrame)
	}
	idText := s[:hash]
	switch len(idText) {
	case 3:
	case 8:
		f.Extended = true
	default:
		return f, fmt.Errorf("can: parse %q offset 0: %w: ID needs 3 or 8 hex digits, got %d", s, ErrInvalidFrame, len(idText))
	}
	for i := 0; i < len(idText); i++ {
		v, ok := hexVal(idText[i])
		if !ok {
			return f, fmt.Errorf("can: parse %q offset %d: %w: %q is not a hex digit", s, i, ErrInvalidFrame, idText[i])
		}
		f.ID = f.ID<<4 | uint32(v)
	}
	rest := s[hash+1:]
	off := hash + 1
	if len(rest) > 0 && (rest[0] == 'R' || rest[0] == 'r') {
		f.Remote = true
		switch len(rest) {
		case 1:
		case 2:
			if rest[1] < '0' || rest[1] > '8' {
				return f, fmt.Errorf("can: parse %q offset %d: %w: remote DLC %q not 0–8", s, off+1, ErrInvalidFrame, rest[1])
			}
			f.DLC = rest[1] - '0'
		default:
			return f, fmt.Errorf("can: parse %q offset %d: %w: trailing text after remote DLC", s, off+2, ErrInvalidFrame)
		}
		return f, f.Validate()
	}
	for i := 0; i < len(rest); {
		if rest[i] == '.' {
			i++
			continue
		}
		if f.DLC == MaxDLC {
			return f, fmt.Errorf("can: parse %q offset %d: %w: more than 8 data bytes", s, off+i, ErrInvalidFrame)
		}
		if i+1 >= len(rest) {
			return f, fmt.Errorf("can: parse %q offset %d: %w: odd number of hex digits", s, off+i, ErrInvalidFrame)
		}
		hi, ok1 := hexVal(rest[i])
		lo, ok2 := hexVal(rest[i+1])
		if !ok1 || !ok2 {
			return f, fmt.Errorf("can: parse %q offset %d: %w: %q is not a hex byte", s, off+i, ErrInvalidFrame, rest[i:i+2])
		}
		f.Data[f.DLC] = hi<<4 | lo
		f.DLC++
		i += 2
	}
	return f, f.Validate()
}

func hexVal(c byte) (byte, bool) {
	switch {
	case c >= '0' && c <= '9':
		return c - '0', true
	case c >= 'a' && c <= 'f':
		return c - 'a' + 10, true
	case c >= 'A' && c <= 'F':
		return c - 'A' + 10, true
	}
	return 0, false
}
