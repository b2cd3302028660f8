//go:build !linux

package can

import (
	"context"
	"errors"
	"fmt"
)

// SocketCAN is a Bus over a Linux raw CAN socket; on this platform it cannot be opened.
type SocketCAN struct{}

// DialSocketCAN always fails off Linux with an error wrapping errors.ErrUnsupported.
func DialSocketCAN(ifname string) (*SocketCAN, error) {
	return nil, fmt.Errorf("can: socketcan %s: SocketCAN needs Linux: %w", ifname, errors.ErrUnsupported)
}

// Send is never reached: DialSocketCAN fails.
func (*SocketCAN) Send(context.Context, Frame) error { return errors.ErrUnsupported }

// Receive is never reached: DialSocketCAN fails.
func (*SocketCAN) Receive(context.Context) (Frame, error) { return Frame{}, errors.ErrUnsupported }

// Close does nothing.
func (*SocketCAN) Close() error { return nil }
