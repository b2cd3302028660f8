package obdcan

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/plenum-engine/plenum/drivers/can"
	"github.com/plenum-engine/plenum/drivers/isotp"
	"github.com/plenum-engine/plenum/drivers/obd"
)

// Options tune the ISO-TP side of a Transport. The zero value is what New uses.
type Options struct {
	// BlockSize and STmin are announced in our flow control frames. The
	// defaults (0, 0) let an ECU send every consecutive frame back to back,
	// which is the fastest exchange the bus allows.
	BlockSize uint8
	STmin     time.Duration
	// NBs and NCr are the ISO-TP timeouts; defaults isotp.OBDNBs and
	// isotp.OBDNCr (ISO 15765-4 network timing).
	NBs, NCr time.Duration
	// Queue is the number of reassembled responses buffered (default 64).
	Queue int
}

// Transport implements obd.Transport over one isotp.Conn on a can.Bus. It
// listens on every ISO 15765-4 response identifier of its format and sends
// flow control to each responding ECU's physical request identifier.
// Frames are padded to 8 bytes with 0xCC (ISO 15765-4 requires DLC 8).
//
// It must be the only reader of the bus. Send and Receive may run
// concurrently; Sends are serialised.
type Transport struct {
	conn   *isotp.Conn
	format obd.Format
}

var _ obd.Transport = (*Transport)(nil)

// New starts a Transport for an ISO 15765-4 bus of identifier format format.
func New(bus can.Bus, format obd.Format) (*Transport, error) {
	return NewWithOptions(bus, format, Options{})
}

// NewWithOptions is New with ISO-TP options.
func NewWithOptions(bus can.Bus, format obd.Format, o Options) (*Transport, error) {
	if bus == nil {
		return nil, errors.New("obdcan: bus is nil")
	}
	ecu1 := obd.Addr{Format: format, ECU: 0}
	switch format {
	case obd.ID11:
	case obd.ID29:
		ecu1.ECU = 0x10 // any address works: it only names the primary link
	default:
		return nil, fmt.Errorf("obdcan: format %v unknown", format)
	}
	rx, _ := ecu1.ResponseID()
	if o.NBs == 0 {
		o.NBs = isotp.OBDNBs
	}
	if o.NCr == 0 {
		o.NCr = isotp.OBDNCr
	}
	conn, err := isotp.NewConn(bus, isotp.Config{
		TxID: ecu1.RequestID(), RxID: rx, Extended: format == obd.ID29,
		Accept:    func(id uint32) (uint32, bool) { return FlowControlID(format, id) },
		BlockSize: o.BlockSize, STmin: o.STmin, NBs: o.NBs, NCr: o.NCr, Queue: o.Queue,
	})
	if err != nil {
		return nil, fmt.Errorf("obdcan: %w", err)
	}
	return &Transport{conn: conn, format: format}, nil
}

// FlowControlID maps a response identifier of format f to the physical
// request identifier its ECU listens on (where flow control goes): 0x7E8+n →
// 0x7E0+n, 0x18DAF1xx → 0x18DAxxF1. ok is false for any other identifier.
func FlowControlID(f obd.Format, responseID uint32) (uint32, bool) {
	a, err := obd.AddrFromResponseID(f, responseID)
	if err != nil {
		return 0, false
	}
	return a.RequestID(), true
}

// Send transmits req as one single frame on to.RequestID().
func (t *Transport) Send(ctx context.Context, to obd.Addr, req obd.Request) error {
	if to.Format != t.format {
		return fmt.Errorf("obdcan: send to %v: address format %v, transport is %v", to, to.Format, t.format)
	}
	if err := to.Validate(); err != nil {
		return fmt.Errorf("obdcan: send: %w", err)
	}
	var buf [8]byte
	p, err := req.AppendPayload(buf[:0])
	if err != nil {
		return fmt.Errorf("obdcan: send to %v: %w", to, err)
	}
	if err := t.conn.SendTo(ctx, to.RequestID(), p); err != nil {
		return fmt.Errorf("obdcan: send %v to %v: %w", req, to, err)
	}
	return nil
}

// Receive returns the next reassembled response from any ECU. Reassembly
// errors (wrong sequence number, N_Cr timeout, …) are returned wrapped, and
// later responses still arrive.
func (t *Transport) Receive(ctx context.Context) (obd.Message, error) {
	m, err := t.conn.Receive(ctx)
	if err != nil {
		return obd.Message{}, fmt.Errorf("obdcan: receive: %w", err)
	}
	from, err := obd.AddrFromResponseID(t.format, m.ID)
	if err != nil { // cannot happen: Accept admits response IDs only
		return obd.Message{}, fmt.Errorf("obdcan: receive: %w", err)
	}
	return obd.Message{From: from, Payload: m.Payload}, nil
}

// Stats returns the ISO-TP counters of the underlying connection.
func (t *Transport) Stats() isotp.Stats { return t.conn.Stats() }

// Close stops the Transport's goroutines. It does not close the bus.
func (t *Transport) Close() error { return t.conn.Close() }
