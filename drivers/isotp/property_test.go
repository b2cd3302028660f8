package isotp

import (
	"bytes"
	"context"
	"flag"
	"testing"
	"time"

	"pgregory.net/rapid"

	"github.com/plenum-engine/plenum/drivers/can"
)

// Any message of 1–4095 bytes survives the virtual bus with the wire-time
// model and a delivery delay, whatever BS and STmin the receiver announces.
//
// Each check runs the real wire model (about 0.3 s under -race for a long
// message), so unless -rapid.checks is given the test runs 20 checks.
func TestPropertyMessageSurvivesVirtualBus(t *testing.T) {
	explicit := false
	flag.Visit(func(f *flag.Flag) { explicit = explicit || f.Name == "rapid.checks" })
	if !explicit {
		if err := flag.Set("rapid.checks", "20"); err != nil {
			t.Fatal(err)
		}
	}
	rapid.Check(t, func(rt *rapid.T) {
		n := rapid.IntRange(1, Max12BitLength).Draw(rt, "len")
		msg := rapid.SliceOfN(rapid.Byte(), n, n).Draw(rt, "payload")
		bs := rapid.Uint8Range(0, 16).Draw(rt, "bs")
		stminUS := rapid.SampledFrom([]int{0, 100, 500}).Draw(rt, "stmin_us")
		delay := time.Duration(rapid.IntRange(0, 300).Draw(rt, "delay_us")) * time.Microsecond
		stuff := rapid.SampledFrom([]can.Stuffing{can.StuffActual, can.StuffWorstCase}).Draw(rt, "stuffing")
		b, err := can.NewVirtualBus(can.VirtualConfig{BitRate: 1_000_000, Stuffing: stuff})
		if err != nil {
			rt.Fatal(err)
		}
		defer b.Close()
		b.SetFaults(func(can.Frame) can.Fault { return can.Fault{Delay: delay} })
		tx, err := NewConn(b.NewNode(), Config{TxID: 0x7E8, RxID: 0x7E0})
		if err != nil {
			rt.Fatal(err)
		}
		defer tx.Close()
		rx, err := NewConn(b.NewNode(), Config{TxID: 0x7E0, RxID: 0x7E8, BlockSize: bs, STmin: time.Duration(stminUS) * time.Microsecond})
		if err != nil {
			rt.Fatal(err)
		}
		defer rx.Close()
		ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
		defer cancel()
		errc := make(chan error, 1)
		go func() { errc <- tx.Send(ctx, msg) }()
		m, err := rx.Receive(ctx)
		if err != nil {
			rt.Fatalf("receive: %v", err)
		}
		if !bytes.Equal(m.Payload, msg) || m.ID != 0x7E8 {
			rt.Fatalf("got %d bytes from %X, want %d", len(m.Payload), m.ID, len(msg))
		}
		if err := <-errc; err != nil {
			rt.Fatalf("send: %v", err)
		}
		frames := 1
		if n > 7 {
			frames = 1 + (n-6+6)/7
		}
		if st := b.Stats(); st.Frames < uint64(frames) {
			rt.Fatalf("%d frames on the wire, need at least %d", st.Frames, frames)
		}
	})
}
