package obd

import (
	"context"
)

// Transport is one ISO-TP message path to an ISO 15765-4 bus, as the Poller
// needs it. The caller implements it on top of an ISO-TP stack.
//
// Send transmits req as one ISO-TP message (always a single frame: at most 7
// bytes, obtained with req.AppendPayload) on to.RequestID(): 0x7DF or
// 0x18DB33F1 when to.Functional, else the ECU's physical request ID (0x7E0+n,
// 0x18DAxxF1). Send returns once the frame is handed to the bus.
//
// Receive blocks until the next reassembled response message from any ECU
// and returns it with the sender's address (AddrFromResponseID maps the CAN ID
// 0x7E8–0x7EF / 0x18DAF1xx to an Addr). The receiver must accept multi-frame
// responses from every ECU it listens to, sending flow control on that ECU's
// physical request ID (0x7E0+n for 0x7E8+n; 0x18DAxxF1 for 0x18DAF1xx).
// The Poller takes ownership of Message.Payload; the transport must not reuse it.
// Receive must return promptly with ctx.Err() when ctx is cancelled. Errors
// are counted by the Poller and retried with backoff; a transport should
// return transient reassembly errors (wrong sequence number, timeout) rather
// than block.
//
// Concurrency: the Poller calls Receive from one goroutine and Send from
// several, serialised by its own mutex; Send and Receive run concurrently.
type Transport interface {
	Send(ctx context.Context, to Addr, req Request) error
	Receive(ctx context.Context) (Message, error)
}

// Message is one reassembled response payload and the ECU that sent it.
type Message struct {
	From    Addr
	Payload []byte
}
