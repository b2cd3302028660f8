package can

import (
	"context"
	"errors"
)

// ErrClosed is returned by a Bus (or node) that has been closed.
var ErrClosed = errors.New("can: bus closed")

// Bus is a frame transport, shaped like net.Conn.
//
// Concurrency: Send and Receive may be called concurrently from any number of
// goroutines; each received frame is returned to exactly one Receive call.
// Cancelling ctx makes a blocked call return promptly with ctx.Err(); Close
// makes every blocked and later call return ErrClosed (possibly wrapped).
type Bus interface {
	// Send transmits f. It validates f first and returns an error wrapping
	// ErrInvalidFrame for a frame that cannot be sent.
	Send(ctx context.Context, f Frame) error
	// Receive blocks until a frame arrives, ctx is done or the bus is closed.
	Receive(ctx context.Context) (Frame, error)
	// Close releases the bus; it is safe to call more than once.
	Close() error
}
