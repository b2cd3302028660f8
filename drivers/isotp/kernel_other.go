//go:build !linux

package isotp

import (
	"context"
	"errors"
	"fmt"
	"time"
)

// KernelConfig configures a kernel CAN_ISOTP socket (Linux only).
type KernelConfig struct {
	TxID, RxID uint32
	Extended   bool
	BlockSize  uint8
	STmin      time.Duration
	MaxWaits   uint8
	Padding    PadMode
	PadValue   byte
	BufferSize int
}

// KernelConn is the Linux kernel's CAN_ISOTP socket; unavailable here.
type KernelConn struct{}

// DialKernel always fails off Linux with an error wrapping errors.ErrUnsupported.
func DialKernel(ifname string, _ KernelConfig) (*KernelConn, error) {
	return nil, fmt.Errorf("isotp: kernel socket on %s: needs Linux: %w", ifname, errors.ErrUnsupported)
}

// Send is never reached: DialKernel fails.
func (*KernelConn) Send(context.Context, []byte) error { return errors.ErrUnsupported }

// Receive is never reached: DialKernel fails.
func (*KernelConn) Receive(context.Context) (Message, error) { return Message{}, errors.ErrUnsupported }

// Close does nothing.
func (*KernelConn) Close() error { return nil }
