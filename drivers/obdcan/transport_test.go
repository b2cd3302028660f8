package obdcan

import (
	"bytes"
	"context"
	"errors"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/drivers/can"
	"github.com/plenum-engine/plenum/drivers/obd"
)

func vbus(t *testing.T) *can.VirtualBus {
	t.Helper()
	b, err := can.NewVirtualBus(can.VirtualConfig{BitRate: 500_000})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = b.Close() })
	return b
}

func ctxT(t *testing.T) context.Context {
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Second)
	t.Cleanup(cancel)
	return ctx
}

func newT(t *testing.T, bus can.Bus, f obd.Format) *Transport {
	t.Helper()
	tr, err := New(bus, f)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = tr.Close() })
	return tr
}

func TestFlowControlID(t *testing.T) {
	for _, c := range []struct {
		f    obd.Format
		in   uint32
		want uint32
		ok   bool
	}{
		{obd.ID11, 0x7E8, 0x7E0, true},
		{obd.ID11, 0x7EF, 0x7E7, true},
		{obd.ID11, 0x7E7, 0, false},
		{obd.ID11, 0x7DF, 0, false},
		{obd.ID29, 0x18DAF110, 0x18DA10F1, true},
		{obd.ID29, 0x18DAF1C7, 0x18DAC7F1, true},
		{obd.ID29, 0x18DB33F1, 0, false},
		{obd.ID29, 0x18DA10F1, 0, false},
	} {
		got, ok := FlowControlID(c.f, c.in)
		if got != c.want || ok != c.ok {
			t.Errorf("FlowControlID(%v, %X) = %X, %v; want %X, %v", c.f, c.in, got, ok, c.want, c.ok)
		}
	}
}

func TestNewRejects(t *testing.T) {
	if _, err := New(nil, obd.ID11); err == nil {
		t.Error("nil bus accepted")
	}
	b := vbus(t)
	if _, err := New(b.NewNode(), obd.Format(7)); err == nil {
		t.Error("unknown format accepted")
	}
}

// TestSendFrames checks the single frame each request becomes, on the right ID.
func TestSendFrames(t *testing.T) {
	for _, c := range []struct {
		name string
		f    obd.Format
		to   obd.Addr
		req  obd.Request
		want string
	}{
		{"functional11", obd.ID11, obd.FunctionalAddr(obd.ID11), must(obd.CurrentData(0x00)), "7DF#020100CCCCCCCCCC"},
		{"physical11", obd.ID11, obd.Addr{Format: obd.ID11, ECU: 1}, must(obd.CurrentData(0x0C, 0x0B, 0x11)), "7E1#04010C0B11CCCCCC"},
		{"vin29", obd.ID29, obd.FunctionalAddr(obd.ID29), obd.VehicleInfo(0x02), "18DB33F1#020902CCCCCCCCCC"},
		{"physical29", obd.ID29, obd.Addr{Format: obd.ID29, ECU: 0x10}, obd.StoredDTCs(), "18DA10F1#0103CCCCCCCCCCCC"},
	} {
		t.Run(c.name, func(t *testing.T) {
			b := vbus(t)
			tr := newT(t, b.NewNode(), c.f)
			peer := b.NewNode()
			if err := tr.Send(ctxT(t), c.to, c.req); err != nil {
				t.Fatal(err)
			}
			f, err := peer.Receive(ctxT(t))
			if err != nil || f.String() != c.want {
				t.Fatalf("frame %v (%v), want %s", f, err, c.want)
			}
		})
	}
}

func TestSendRejects(t *testing.T) {
	b := vbus(t)
	tr := newT(t, b.NewNode(), obd.ID11)
	if err := tr.Send(ctxT(t), obd.FunctionalAddr(obd.ID29), obd.StoredDTCs()); err == nil {
		t.Error("29-bit address accepted on an 11-bit transport")
	}
	if err := tr.Send(ctxT(t), obd.Addr{Format: obd.ID11, ECU: 9}, obd.StoredDTCs()); err == nil {
		t.Error("ECU index 9 accepted")
	}
	if err := tr.Send(ctxT(t), obd.FunctionalAddr(obd.ID11), obd.Request{}); !errors.Is(err, obd.ErrZeroRequest) {
		t.Errorf("zero request: %v", err)
	}
}

// TestReceiveMultiFrame has a raw peer answer as ECU #2 (0x7E9) with a
// multi-frame response and checks that flow control goes to 0x7E1 and the
// message arrives from the right address; frames from IDs outside the
// response range are ignored.
func TestReceiveMultiFrame(t *testing.T) {
	for _, c := range []struct {
		name       string
		f          obd.Format
		ext        bool
		resp, fcID uint32
		from       obd.Addr
	}{
		{"11bit", obd.ID11, false, 0x7E9, 0x7E1, obd.Addr{Format: obd.ID11, ECU: 1}},
		{"29bit", obd.ID29, true, 0x18DAF117, 0x18DA17F1, obd.Addr{Format: obd.ID29, ECU: 0x17}},
	} {
		t.Run(c.name, func(t *testing.T) {
			b := vbus(t)
			tr := newT(t, b.NewNode(), c.f)
			peer := b.NewNode()
			ctx := ctxT(t)
			send := func(id uint32, d ...byte) {
				f := can.Frame{ID: id, Extended: c.ext, DLC: 8}
				copy(f.Data[:], d)
				if err := peer.Send(ctx, f); err != nil {
					t.Fatal(err)
				}
			}
			send(0x123, 0x02, 0x41, 0x0D) // not a response ID: ignored
			vin := []byte("PLNBRKF20RS000001")
			msg := append([]byte{0x49, 0x02, 0x01}, vin...)
			send(c.resp, append([]byte{0x10, byte(len(msg))}, msg[:6]...)...)
			fc, err := peer.Receive(ctx)
			if err != nil {
				t.Fatal(err)
			}
			if fc.ID != c.fcID || fc.Data[0] != 0x30 || fc.Data[1] != 0 || fc.Data[2] != 0 {
				t.Fatalf("flow control %v, want CTS BS 0 STmin 0 on %X", fc, c.fcID)
			}
			send(c.resp, append([]byte{0x21}, msg[6:13]...)...)
			send(c.resp, append([]byte{0x22}, msg[13:]...)...)
			m, err := tr.Receive(ctx)
			if err != nil {
				t.Fatal(err)
			}
			if m.From != c.from || !bytes.Equal(m.Payload, msg) {
				t.Fatalf("got %v % X, want %v % X", m.From, m.Payload, c.from, msg)
			}
			r, err := obd.ParseResponse(m.Payload)
			if err != nil {
				t.Fatal(err)
			}
			if v, err := obd.DecodeVIN(r.Data); err != nil || v != string(vin) {
				t.Fatalf("VIN %q %v", v, err)
			}
		})
	}
}

// TestReceiveError surfaces a reassembly error (wrong sequence number)
// wrapped, and the next message still arrives.
func TestReceiveError(t *testing.T) {
	b := vbus(t)
	tr := newT(t, b.NewNode(), obd.ID11)
	peer := b.NewNode()
	ctx := ctxT(t)
	send := func(d ...byte) {
		f := can.Frame{ID: 0x7E8, DLC: 8}
		copy(f.Data[:], d)
		if err := peer.Send(ctx, f); err != nil {
			t.Fatal(err)
		}
	}
	send(0x10, 0x0A, 0x41, 0x0C, 0x1A, 0xF8, 0x0D, 0x32)
	if _, err := peer.Receive(ctx); err != nil { // FC
		t.Fatal(err)
	}
	send(0x23, 1, 2, 3, 4)
	if _, err := tr.Receive(ctx); err == nil {
		t.Fatal("wrong sequence number not reported")
	}
	send(0x03, 0x41, 0x0D, 0x32)
	m, err := tr.Receive(ctx)
	if err != nil || !bytes.Equal(m.Payload, []byte{0x41, 0x0D, 0x32}) {
		t.Fatalf("after the error: % X %v", m.Payload, err)
	}
	cctx, cancel := context.WithTimeout(context.Background(), 20*time.Millisecond)
	defer cancel()
	if _, err := tr.Receive(cctx); !errors.Is(err, context.DeadlineExceeded) {
		t.Fatalf("cancelled receive: %v", err)
	}
}

func must(r obd.Request, err error) obd.Request {
	if err != nil {
		panic(err)
	}
	return r
}
