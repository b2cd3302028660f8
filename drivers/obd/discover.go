package obd

import (
	"context"
	"errors"
	"sort"
	"time"

	"github.com/plenum-engine/plenum/drivers/clock"
)

// Responder is what Discover learned of one ECU.
type Responder struct {
	Addr     Addr
	VIN      string          // from service 09 InfoType 02; "" when not given
	PIDs     PIDSet          // supported service 01 PIDs, from the bitmaps
	Times    []time.Duration // the response times measured, in order
	MultiPID bool            // answered a request for two PIDs with both
}

// MedianResponseTime returns the median of Times, 0 when none was measured.
func (r *Responder) MedianResponseTime() time.Duration {
	if len(r.Times) == 0 {
		return 0
	}
	s := append([]time.Duration(nil), r.Times...)
	sort.Slice(s, func(i, j int) bool { return s[i] < s[j] })
	return s[len(s)/2]
}

// DataPIDs returns the supported service 01 PIDs that carry data (not the
// supported-PID bitmaps), in ascending order.
func (r *Responder) DataPIDs() []PID {
	var out []PID
	for p := 1; p < 256; p++ {
		if r.PIDs.Has(PID(p)) && !IsBitmapPID(PID(p)) {
			out = append(out, PID(p))
		}
	}
	return out
}

// DiscoverConfig configures Discover. Zero durations take the defaults shown.
type DiscoverConfig struct {
	Format Format      // identifier format of the bus
	Clock  clock.Clock // times the windows and the responses; default clock.System
	// FunctionalWindow is how long answers to the functional PID 00 request
	// are collected. Default 300 ms.
	FunctionalWindow time.Duration
	// PhysicalWindow is how long one ECU's answer to a physical request is
	// awaited. Default 500 ms.
	PhysicalWindow time.Duration
}

// Discover asks the bus which ECUs answer and what they support: the
// functional PID 00 request, then, of each responder, its supported-PID
// bitmaps, its VIN and whether it answers a two-PID request. It sends read
// requests only (services 01 and 09). No answer is not an error: the result
// is then empty.
func Discover(ctx context.Context, tr Transport, cfg DiscoverConfig) ([]*Responder, error) {
	if tr == nil {
		return nil, errors.New("obd: Discover: transport is nil")
	}
	if cfg.FunctionalWindow <= 0 {
		cfg.FunctionalWindow = 300 * time.Millisecond
	}
	if cfg.PhysicalWindow <= 0 {
		cfg.PhysicalWindow = 500 * time.Millisecond
	}
	clk := clock.Or(cfg.Clock)
	req, _ := CurrentData(0x00)
	msgs, _, err := Exchange(ctx, tr, clk, FunctionalAddr(cfg.Format), req, cfg.FunctionalWindow)
	if err != nil {
		return nil, err
	}
	var ecus []*Responder
	for _, m := range msgs {
		e := &Responder{Addr: m.From}
		ecus = append(ecus, e)
		for base := 0; base < 256; base += 0x20 {
			r, _ := CurrentData(PID(base))
			ms, rt, err := Exchange(ctx, tr, clk, e.Addr, r, cfg.PhysicalWindow)
			if err != nil || len(ms) == 0 {
				break
			}
			e.Times = append(e.Times, rt)
			resp, err := ParseResponse(ms[0].Payload)
			if err != nil || resp.Negative || len(resp.Data) < 5 {
				break
			}
			next, err := e.PIDs.AddBitmap(PID(base), resp.Data[1:5])
			if err != nil || !next {
				break
			}
		}
		if ms, _, err := Exchange(ctx, tr, clk, e.Addr, VehicleInfo(0x02), cfg.PhysicalWindow); err == nil && len(ms) > 0 {
			if resp, err := ParseResponse(ms[0].Payload); err == nil && !resp.Negative {
				e.VIN, _ = DecodeVIN(resp.Data)
			}
		}
		// Multi-PID: ask for two supported PIDs at once.
		if two := e.DataPIDs(); len(two) >= 2 {
			r, _ := CurrentData(two[:2]...)
			if ms, rt, err := Exchange(ctx, tr, clk, e.Addr, r, cfg.PhysicalWindow); err == nil && len(ms) > 0 {
				e.Times = append(e.Times, rt)
				if resp, err := ParseResponse(ms[0].Payload); err == nil && !resp.Negative {
					n := 0
					WalkCurrentData(resp.Data, func(PID, []byte) { n++ })
					e.MultiPID = n == 2
				}
			}
		}
	}
	return ecus, ctx.Err()
}

// Exchange sends req to an address and collects the answers for window by
// clk (nil: clock.System): the first answer of a physical address, every
// answer of a functional one. Response-pending answers (NRC 0x78) are
// skipped. It returns the messages and the time to the first of them; a
// window that closes without answers is not an error.
func Exchange(ctx context.Context, tr Transport, clk clock.Clock, to Addr, req Request, window time.Duration) ([]Message, time.Duration, error) {
	clk = clock.Or(clk)
	start := clk.Now()
	if err := tr.Send(ctx, to, req); err != nil {
		return nil, 0, err
	}
	wctx, cancel := context.WithCancel(ctx)
	defer cancel()
	closed := clk.After(window)
	go func() {
		select {
		case <-closed:
			cancel()
		case <-wctx.Done():
		}
	}()
	var out []Message
	var first time.Duration
	for {
		m, err := tr.Receive(wctx)
		if err != nil {
			if ctx.Err() != nil {
				return out, first, ctx.Err()
			}
			if wctx.Err() != nil {
				return out, first, nil
			}
			return out, first, err
		}
		r, err := ParseResponse(m.Payload)
		if err == nil && r.Negative && r.NRC == NRCRequestCorrectlyReceivedResponsePending {
			continue
		}
		if len(out) == 0 {
			first = clk.Now().Sub(start)
		}
		out = append(out, m)
		if !to.Functional {
			return out, first, nil
		}
	}
}
