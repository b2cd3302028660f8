package can

import (
	"context"
	"errors"
	"sync"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/drivers/clock"
)

func waitFor(t *testing.T, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(2 * time.Second)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting for %s", what)
		}
		time.Sleep(100 * time.Microsecond)
	}
}

func newBus(t *testing.T, cfg VirtualConfig) *VirtualBus {
	t.Helper()
	b, err := NewVirtualBus(cfg)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = b.Close() })
	return b
}

func recv(t *testing.T, n Bus) Frame {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Second)
	defer cancel()
	f, err := n.Receive(ctx)
	if err != nil {
		t.Fatalf("Receive: %v", err)
	}
	return f
}

func TestVirtualBusBroadcastToAllOtherNodes(t *testing.T) {
	b := newBus(t, VirtualConfig{BitRate: 500_000})
	nodes := make([]*VirtualNode, 5)
	for i := range nodes {
		nodes[i] = b.NewNode()
	}
	want := Frame{ID: 0x7E8, DLC: 2, Data: [8]byte{0x41, 0x0C}}
	if err := nodes[0].Send(context.Background(), want); err != nil {
		t.Fatal(err)
	}
	for i, n := range nodes[1:] {
		if got := recv(t, n); got != want {
			t.Errorf("node %d got %v, want %v", i+1, got, want)
		}
	}
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Millisecond)
	defer cancel()
	if _, err := nodes[0].Receive(ctx); !errors.Is(err, context.DeadlineExceeded) {
		t.Errorf("sender received its own frame: err = %v", err)
	}
	if err := nodes[0].Send(context.Background(), Frame{ID: 0x800}); !errors.Is(err, ErrInvalidFrame) {
		t.Errorf("invalid frame: err = %v", err)
	}
}

func TestVirtualBusArbitrationLowestIDWins(t *testing.T) {
	clk := clock.NewManual(time.Unix(1000, 0))
	b := newBus(t, VirtualConfig{BitRate: 500_000, Clock: clk})
	first, rx := b.NewNode(), b.NewNode()
	senders := []*VirtualNode{b.NewNode(), b.NewNode(), b.NewNode(), b.NewNode()}
	ids := []uint32{0x300, 0x100, 0x18DAF110, 0x200}
	var wg sync.WaitGroup
	wg.Add(1)
	go func() { defer wg.Done(); _ = first.Send(context.Background(), Frame{ID: 0x7FF, DLC: 8}) }()
	waitFor(t, "first frame on the wire", func() bool { return clk.Pending() == 1 })
	for i, n := range senders {
		f := Frame{ID: ids[i], DLC: 1, Data: [8]byte{byte(i)}}
		if f.ID > MaxStandardID {
			f.Extended = true // base ID 0x18DAF110>>18 = 0x636: after 0x300
		}
		wg.Add(1)
		go func() { defer wg.Done(); _ = n.Send(context.Background(), f) }()
	}
	waitFor(t, "all frames queued", func() bool {
		b.mu.Lock()
		defer b.mu.Unlock()
		q := 0
		for _, n := range senders {
			q += len(n.txq)
		}
		return q == len(senders)
	})
	go func() {
		for i := 0; i < 50; i++ {
			clk.Advance(time.Millisecond)
			time.Sleep(time.Millisecond)
		}
	}()
	want := []uint32{0x7FF, 0x100, 0x200, 0x300, 0x18DAF110}
	for i, id := range want {
		if got := recv(t, rx); got.ID != id {
			t.Fatalf("frame %d: ID %X, want %X", i, got.ID, id)
		}
	}
	wg.Wait()
	// 111 bits (8 bytes) + four 1-byte frames, actual stuffing: wire time is their exact sum.
	st := b.Stats()
	var bits int
	bits += FrameBits(Frame{ID: 0x7FF, DLC: 8}, StuffActual)
	for i, id := range ids {
		bits += FrameBits(Frame{ID: id, Extended: id > MaxStandardID, DLC: 1, Data: [8]byte{byte(i)}}, StuffActual)
	}
	if st.Frames != 5 || st.Bits != uint64(bits) || st.WireTime != time.Duration(bits)*2*time.Microsecond {
		t.Errorf("stats %+v, want 5 frames, %d bits, %v", st, bits, time.Duration(bits)*2*time.Microsecond)
	}
}

func TestVirtualBusWireTimeBoundsThroughput(t *testing.T) {
	b := newBus(t, VirtualConfig{BitRate: 500_000, Stuffing: StuffWorstCase})
	tx, rx := b.NewNode(), b.NewNode()
	const n = 200
	start := time.Now()
	go func() {
		for i := 0; i < n; i++ {
			_ = tx.Send(context.Background(), Frame{ID: 0x7E0, DLC: 8})
		}
	}()
	for i := 0; i < n; i++ {
		recv(t, rx)
	}
	// 135 bits at 500 kbit/s = 270 µs per frame (reference-facts §3).
	if el, min := time.Since(start), n*270*time.Microsecond; el < min {
		t.Fatalf("%d frames took %v, less than the wire time %v", n, el, min)
	}
	if st := b.Stats(); st.WireTime != n*270*time.Microsecond {
		t.Fatalf("WireTime %v", st.WireTime)
	}
}

func TestVirtualBusFaults(t *testing.T) {
	b := newBus(t, VirtualConfig{BitRate: 1_000_000})
	tx, rx := b.NewNode(), b.NewNode()
	ctx := context.Background()
	b.SetFaults(func(f Frame) Fault {
		switch f.ID {
		case 0x101:
			return Fault{Drop: true}
		case 0x102:
			return Fault{Corrupt: true, CorruptBit: 9}
		case 0x103:
			return Fault{Reorder: true}
		case 0x105:
			return Fault{Delay: 30 * time.Millisecond}
		}
		return Fault{}
	})
	for _, id := range []uint32{0x100, 0x101, 0x102, 0x103, 0x104} {
		if err := tx.Send(ctx, Frame{ID: id, DLC: 2, Data: [8]byte{0x10, 0x20}}); err != nil {
			t.Fatal(err)
		}
	}
	got := []Frame{recv(t, rx), recv(t, rx), recv(t, rx), recv(t, rx)}
	if got[0].ID != 0x100 || got[1].ID != 0x102 || got[2].ID != 0x104 || got[3].ID != 0x103 {
		t.Fatalf("order %v %v %v %v, want 100, 102, 104, 103 (101 dropped, 103 reordered)", got[0], got[1], got[2], got[3])
	}
	if got[1].Data[1] != 0x20^0x40 {
		t.Errorf("corrupt bit 9: data %X, want byte 1 = %X", got[1].Data[:2], 0x20^0x40)
	}
	start := time.Now()
	_ = tx.Send(ctx, Frame{ID: 0x105})
	_ = tx.Send(ctx, Frame{ID: 0x106})
	if f := recv(t, rx); f.ID != 0x106 {
		t.Errorf("undelayed 0x106 should overtake delayed 0x105, got %v", f)
	}
	if f := recv(t, rx); f.ID != 0x105 || time.Since(start) < 30*time.Millisecond {
		t.Errorf("delayed frame %v after %v", f, time.Since(start))
	}
	st := b.Stats()
	if st.Dropped != 1 || st.Corrupted != 1 || st.Reordered != 1 || st.Delayed != 1 {
		t.Errorf("stats %+v", st)
	}
}

func TestVirtualBusBabblerStarvesHigherIDs(t *testing.T) {
	b := newBus(t, VirtualConfig{BitRate: 500_000})
	tx, rx := b.NewNode(), b.NewNode()
	stop, err := b.StartBabbler(Frame{ID: 0x000, DLC: 8, Data: [8]byte{0xFF}})
	if err != nil {
		t.Fatal(err)
	}
	if f := recv(t, rx); f.ID != 0 {
		t.Fatalf("expected babble, got %v", f)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Millisecond)
	err = tx.Send(ctx, Frame{ID: 0x7E0})
	cancel()
	if !errors.Is(err, context.DeadlineExceeded) {
		t.Fatalf("send during babbling: %v, want deadline exceeded", err)
	}
	stop()
	if err := tx.Send(context.Background(), Frame{ID: 0x7E0}); err != nil {
		t.Fatalf("send after babbler stopped: %v", err)
	}
	for {
		if f := recv(t, rx); f.ID == 0x7E0 {
			break
		}
	}
}

func TestVirtualBusRandomFaultsReproducible(t *testing.T) {
	cfg := RandomFaults{Seed: 7, Drop: 0.3, Corrupt: 0.2, DelayMax: time.Millisecond}
	a, b := RandomFaultFunc(cfg), RandomFaultFunc(cfg)
	drops := 0
	for i := 0; i < 1000; i++ {
		fa, fb := a(Frame{ID: 1}), b(Frame{ID: 1})
		if fa != fb {
			t.Fatalf("decision %d differs: %+v vs %+v", i, fa, fb)
		}
		if fa.Delay < 0 || fa.Delay > time.Millisecond {
			t.Fatalf("delay %v out of range", fa.Delay)
		}
		if fa.Drop {
			drops++
		}
	}
	if drops < 240 || drops > 360 {
		t.Errorf("%d drops in 1000 at p=0.3", drops)
	}
	only := RandomFaultFunc(RandomFaults{Drop: 1, IDs: []uint32{5}})
	if only(Frame{ID: 4}).Drop || !only(Frame{ID: 5}).Drop {
		t.Error("IDs filter not applied")
	}
}

func TestVirtualNodeCancelAndClose(t *testing.T) {
	b := newBus(t, VirtualConfig{})
	n := b.NewNode()
	ctx, cancel := context.WithCancel(context.Background())
	errc := make(chan error, 1)
	go func() { _, err := n.Receive(ctx); errc <- err }()
	cancel()
	if err := <-errc; !errors.Is(err, context.Canceled) {
		t.Fatalf("cancel: %v", err)
	}
	go func() { _, err := n.Receive(context.Background()); errc <- err }()
	time.Sleep(5 * time.Millisecond)
	_ = n.Close()
	if err := <-errc; !errors.Is(err, ErrClosed) {
		t.Fatalf("close: %v", err)
	}
	if err := n.Send(context.Background(), Frame{}); !errors.Is(err, ErrClosed) {
		t.Fatalf("send after close: %v", err)
	}
	_ = b.Close()
	if _, err := b.NewNode().Receive(context.Background()); !errors.Is(err, ErrClosed) {
		t.Fatalf("node of closed bus: %v", err)
	}
}
