package isotp

import (
	"errors"
	"fmt"

	"github.com/plenum-engine/plenum/drivers/can"
)

// ReceiverConfig configures a Receiver.
type ReceiverConfig struct {
	// BlockSize is announced in FC frames: the number of CFs the sender may
	// send before waiting for the next FC (0: all of them).
	BlockSize uint8
	// STmin is the raw STmin byte announced in FC frames (see EncodeSTmin).
	STmin byte
	// MaxLength is the longest message accepted (default 4095). A longer FF
	// is answered with FC Overflow.
	MaxLength uint32
	// StrictDLC ignores frames whose DLC is not 8, as ISO 15765-2 §9.6.2.2
	// requires when padding is in use. Off by default, so DLC-optimised
	// senders (such as the Linux kernel without TX padding) are accepted.
	StrictDLC bool
}

// Action tells the caller of Receiver.Feed what to do next.
type Action uint8

const (
	// ActionNone: nothing to do.
	ActionNone Action = iota
	// ActionFlowControl: send the FC frame Receiver.FlowControl describes.
	ActionFlowControl
	// ActionComplete: Receiver.Message holds a complete message.
	ActionComplete
)

// Receiver reassembles the ISO-TP messages of one sender (one CAN ID) from
// the frames fed to it. It does no I/O and keeps no clock: the caller sends
// the FC frames it asks for and enforces N_Cr by calling Reset when no frame
// came in time. Its buffer is reused, so steady-state Feed does not
// allocate. A Receiver is not safe for concurrent use.
type Receiver struct {
	cfg       ReceiverConfig
	buf       []byte
	want      uint32
	sn        uint8
	blockLeft int
	busy      bool
	fc        FlowControl
}

// NewReceiver returns a Receiver for cfg.
func NewReceiver(cfg ReceiverConfig) *Receiver {
	if cfg.MaxLength == 0 {
		cfg.MaxLength = Max12BitLength
	}
	return &Receiver{cfg: cfg}
}

// Busy reports whether a multi-frame message is in progress.
func (r *Receiver) Busy() bool { return r.busy }

// Reset abandons any message in progress (for example when N_Cr expired).
func (r *Receiver) Reset() { r.busy = false; r.buf = r.buf[:0] }

// Message returns the last completed message. The slice is reused by the
// next Feed; copy it to keep it.
func (r *Receiver) Message() []byte { return r.buf }

// FlowControl returns the FC frame content requested by the last ActionFlowControl.
func (r *Receiver) FlowControl() FlowControl { return r.fc }

// Feed processes one frame received from this Receiver's sender. The
// returned Action is valid even when err is not nil: an FF that is too long
// yields ActionFlowControl (Overflow) with ErrTooLong, and an SF or FF that
// interrupts a message yields its own action with ErrInterrupted. An FF that
// is too long and interrupts a message reports both: its error is an
// errors.Join of the ErrInterrupted and the ErrTooLong errors. Errors
// wrapping ErrIgnored leave the state unchanged; ErrWrongSN and
// ErrShortFrame abort the message in progress.
func (r *Receiver) Feed(f can.Frame) (Action, error) {
	if f.Remote || f.DLC == 0 || f.DLC > can.MaxDLC {
		return ActionNone, fmt.Errorf("isotp: frame %X: DLC %d or remote frame: %w", f.ID, f.DLC, ErrIgnored)
	}
	if r.cfg.StrictDLC && f.DLC != 8 {
		return ActionNone, fmt.Errorf("isotp: frame %X: DLC %d with padding required: %w", f.ID, f.DLC, ErrIgnored)
	}
	d := f.Data[:f.DLC]
	switch d[0] >> 4 {
	case pciSF:
		n := int(d[0] & 0xF)
		if n == 0 || n > len(d)-1 {
			return ActionNone, fmt.Errorf("isotp: SF %X byte 0: SF_DL %d with DLC %d: %w", f.ID, n, f.DLC, ErrIgnored)
		}
		err := r.interrupted(f.ID, "SF")
		r.busy = false
		r.buf = append(r.buf[:0], d[1:1+n]...)
		return ActionComplete, err
	case pciFF:
		return r.firstFrame(f.ID, d)
	case pciCF:
		return r.consecutive(f.ID, d)
	case pciFC:
		return ActionNone, fmt.Errorf("isotp: frame %X: FC is for the sender: %w", f.ID, ErrIgnored)
	}
	return ActionNone, fmt.Errorf("isotp: frame %X byte 0: reserved PCI type %d: %w", f.ID, d[0]>>4, ErrIgnored)
}

func (r *Receiver) interrupted(id uint32, what string) error {
	if !r.busy {
		return nil
	}
	return fmt.Errorf("isotp: frame %X: %s after %d of %d bytes: %w", id, what, len(r.buf), r.want, ErrInterrupted)
}

func (r *Receiver) firstFrame(id uint32, d []byte) (Action, error) {
	if len(d) != 8 {
		return ActionNone, fmt.Errorf("isotp: FF %X: DLC %d, FF needs 8: %w", id, len(d), ErrIgnored)
	}
	size := uint32(d[0]&0xF)<<8 | uint32(d[1])
	data := d[2:]
	if size == 0 {
		size = uint32(d[2])<<24 | uint32(d[3])<<16 | uint32(d[4])<<8 | uint32(d[5])
		if size <= Max12BitLength {
			return ActionNone, fmt.Errorf("isotp: FF %X bytes 2–5: escaped FF_DL %d fits 12 bits: %w", id, size, ErrIgnored)
		}
		data = d[6:]
	}
	if size < 8 {
		return ActionNone, fmt.Errorf("isotp: FF %X byte 1: FF_DL %d below 8: %w", id, size, ErrIgnored)
	}
	err := r.interrupted(id, "FF")
	if size > r.cfg.MaxLength {
		r.busy = false
		r.buf = r.buf[:0]
		r.fc = FlowControl{Status: Overflow}
		tooLong := fmt.Errorf("isotp: FF %X: FF_DL %d exceeds %d: %w", id, size, r.cfg.MaxLength, ErrTooLong)
		if err != nil {
			// Two outcomes: the message in progress is lost and the new one refused.
			return ActionFlowControl, errors.Join(err, tooLong)
		}
		return ActionFlowControl, tooLong
	}
	r.busy = true
	r.want = size
	r.sn = 1
	r.blockLeft = int(r.cfg.BlockSize)
	r.buf = append(r.buf[:0], data...)
	r.fc = FlowControl{Status: ContinueToSend, BlockSize: r.cfg.BlockSize, STmin: r.cfg.STmin}
	return ActionFlowControl, err
}

func (r *Receiver) consecutive(id uint32, d []byte) (Action, error) {
	if !r.busy {
		return ActionNone, fmt.Errorf("isotp: CF %X: no message in progress: %w", id, ErrIgnored)
	}
	if sn := d[0] & 0xF; sn != r.sn {
		r.Reset()
		return ActionNone, fmt.Errorf("isotp: CF %X byte 0: SN %d, want %d: %w", id, sn, r.sn, ErrWrongSN)
	}
	need := r.want - uint32(len(r.buf))
	if need > 7 {
		need = 7
	}
	if uint32(len(d)-1) < need {
		r.Reset()
		return ActionNone, fmt.Errorf("isotp: CF %X: %d data bytes, message needs %d: %w", id, len(d)-1, need, ErrShortFrame)
	}
	r.buf = append(r.buf, d[1:1+need]...)
	r.sn = (r.sn + 1) & 0xF
	if uint32(len(r.buf)) == r.want {
		r.busy = false
		return ActionComplete, nil
	}
	if r.cfg.BlockSize > 0 {
		r.blockLeft--
		if r.blockLeft == 0 {
			r.blockLeft = int(r.cfg.BlockSize)
			r.fc = FlowControl{Status: ContinueToSend, BlockSize: r.cfg.BlockSize, STmin: r.cfg.STmin}
			return ActionFlowControl, nil
		}
	}
	return ActionNone, nil
}
