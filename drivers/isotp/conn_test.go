package isotp

import (
	"bytes"
	"context"
	"errors"
	"sync"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/drivers/can"
)

func vbus(t *testing.T, cfg can.VirtualConfig) *can.VirtualBus {
	t.Helper()
	b, err := can.NewVirtualBus(cfg)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = b.Close() })
	return b
}

func newConn(t *testing.T, bus can.Bus, cfg Config) *Conn {
	t.Helper()
	c, err := NewConn(bus, cfg)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = c.Close() })
	return c
}

func ctxT(t *testing.T, d time.Duration) context.Context {
	ctx, cancel := context.WithTimeout(context.Background(), d)
	t.Cleanup(cancel)
	return ctx
}

func rawRecv(t *testing.T, n can.Bus) can.Frame {
	t.Helper()
	f, err := n.Receive(ctxT(t, 2*time.Second))
	if err != nil {
		t.Fatalf("raw receive: %v", err)
	}
	return f
}

func rawSend(t *testing.T, n can.Bus, id uint32, data ...byte) {
	t.Helper()
	f := can.Frame{ID: id, DLC: 8, Data: [8]byte{0xAA, 0xAA, 0xAA, 0xAA, 0xAA, 0xAA, 0xAA, 0xAA}}
	copy(f.Data[:], data)
	if err := n.Send(context.Background(), f); err != nil {
		t.Fatal(err)
	}
}

func payload(n int) []byte {
	p := make([]byte, n)
	for i := range p {
		p[i] = byte(i*31 + 7)
	}
	return p
}

// The sender honours BS: after a block it stops until the next FC; padding 0xCC.
func TestSendHonoursBlockSizeAndPads(t *testing.T) {
	b := vbus(t, can.VirtualConfig{BitRate: 500_000})
	c := newConn(t, b.NewNode(), Config{TxID: 0x7E0, RxID: 0x7E8})
	peer := b.NewNode()
	msg := payload(40) // FF 6 + 5 CFs
	errc := make(chan error, 1)
	go func() { errc <- c.Send(context.Background(), msg) }()
	ff := rawRecv(t, peer)
	if ff.ID != 0x7E0 || ff.Data[0] != 0x10 || ff.Data[1] != 40 || !bytes.Equal(ff.Data[2:], msg[:6]) {
		t.Fatalf("FF %v", ff)
	}
	rawSend(t, peer, 0x7E8, 0x30, 2, 0) // CTS, BS 2
	got := append([]byte(nil), ff.Data[2:]...)
	for block := 0; len(got) < 40; block++ {
		for i := 0; i < 2 && len(got) < 40; i++ {
			cf := rawRecv(t, peer)
			if cf.Data[0] != 0x20|byte((len(got)-6)/7+1)&0xF {
				t.Fatalf("CF SN byte %#02x", cf.Data[0])
			}
			k := min(7, 40-len(got))
			got = append(got, cf.Data[1:1+k]...)
			for _, p := range cf.Data[1+k:] {
				if p != DefaultPadding {
					t.Fatalf("padding %v", cf)
				}
			}
		}
		if len(got) < 40 {
			ctx, cancel := context.WithTimeout(context.Background(), 30*time.Millisecond)
			if f, err := peer.Receive(ctx); err == nil {
				t.Fatalf("CF %v sent without FC after a block of 2", f)
			}
			cancel()
			rawSend(t, peer, 0x7E8, 0x30, 2, 0)
		}
	}
	if err := <-errc; err != nil || !bytes.Equal(got, msg) {
		t.Fatalf("send %v, data % X", err, got)
	}
}

// STmin from the FC spaces the CFs by at least that much: the sender waits
// STmin of real time between them. (The gap is read from the sender's own
// waits: a receiver's timestamps shrink a gap whenever the receiver is late
// for the frame before it, as on a loaded machine.)
func TestSendHonoursSTmin(t *testing.T) {
	b := vbus(t, can.VirtualConfig{BitRate: 500_000})
	clk := &waitingClock{}
	c := newConn(t, b.NewNode(), Config{TxID: 0x7E0, RxID: 0x7E8, Clock: clk})
	peer := b.NewNode()
	errc := make(chan error, 1)
	go func() { errc <- c.Send(context.Background(), payload(6+7*5)) }()
	rawRecv(t, peer)
	rawSend(t, peer, 0x7E8, 0x30, 0, 0x05) // 5 ms
	start := time.Now()
	for i := 0; i < 5; i++ {
		rawRecv(t, peer)
	}
	if err := <-errc; err != nil {
		t.Fatal(err)
	}
	clk.mu.Lock()
	defer clk.mu.Unlock()
	if len(clk.waits) != 4 {
		t.Fatalf("%d waits between 5 CFs (%v), want 4", len(clk.waits), clk.waits)
	}
	for _, w := range clk.waits {
		if w < 5*time.Millisecond {
			t.Fatalf("waited %v between CFs, STmin is 5 ms", w)
		}
	}
	if d := time.Since(start); d < 20*time.Millisecond {
		t.Fatalf("5 CFs in %v, 4 gaps of STmin 5 ms take 20 ms", d)
	}
}

// waitingClock is the wall clock, recording the short waits it is asked for
// (STmin gaps; the long protocol timeouts are left out).
type waitingClock struct {
	mu    sync.Mutex
	waits []time.Duration
}

func (c *waitingClock) Now() time.Time { return time.Now() }
func (c *waitingClock) After(d time.Duration) <-chan time.Time {
	if d <= 127*time.Millisecond {
		c.mu.Lock()
		c.waits = append(c.waits, d)
		c.mu.Unlock()
	}
	return time.After(d)
}

type recordingClock struct {
	mu    sync.Mutex
	waits []time.Duration
}

func (c *recordingClock) Now() time.Time { return time.Now() }
func (c *recordingClock) After(d time.Duration) <-chan time.Time {
	if d > 127*time.Millisecond {
		return time.After(d)
	}
	c.mu.Lock()
	c.waits = append(c.waits, d)
	c.mu.Unlock()
	ch := make(chan time.Time, 1)
	ch <- time.Now()
	return ch
}

func TestSendSTminCodes(t *testing.T) {
	for _, tc := range []struct {
		code byte
		want time.Duration
	}{{0xF1, 100 * time.Microsecond}, {0xF9, 900 * time.Microsecond}, {0x14, 20 * time.Millisecond}, {0x80, 127 * time.Millisecond}, {0xFA, 127 * time.Millisecond}} {
		b := vbus(t, can.VirtualConfig{})
		clk := &recordingClock{}
		c := newConn(t, b.NewNode(), Config{TxID: 0x7E0, RxID: 0x7E8, Clock: clk, NBs: time.Second})
		peer := b.NewNode()
		errc := make(chan error, 1)
		go func() { errc <- c.Send(context.Background(), payload(6+7*3)) }()
		rawRecv(t, peer)
		rawSend(t, peer, 0x7E8, 0x30, 0, tc.code)
		for i := 0; i < 3; i++ {
			rawRecv(t, peer)
		}
		if err := <-errc; err != nil {
			t.Fatal(err)
		}
		clk.mu.Lock()
		if len(clk.waits) != 2 || clk.waits[0] != tc.want || clk.waits[1] != tc.want {
			t.Errorf("STmin %#02x: waits %v, want 2 × %v", tc.code, clk.waits, tc.want)
		}
		clk.mu.Unlock()
	}
}

func TestSendFlowControlErrors(t *testing.T) {
	tests := []struct {
		name string
		fcs  [][]byte
		want error
	}{
		{"overflow", [][]byte{{0x32, 0, 0}}, ErrOverflow},
		{"invalid FS", [][]byte{{0x37, 0, 0}}, ErrInvalidFS},
		{"too many waits", [][]byte{{0x31, 0, 0}, {0x31, 0, 0}, {0x31, 0, 0}}, ErrWaitLimit},
		{"N_Bs timeout", nil, ErrTimeout},
	}
	for _, tt := range tests {
		b := vbus(t, can.VirtualConfig{BitRate: 500_000})
		c := newConn(t, b.NewNode(), Config{TxID: 0x7E0, RxID: 0x7E8, MaxWaits: 2, NBs: 50 * time.Millisecond})
		peer := b.NewNode()
		errc := make(chan error, 1)
		go func() { errc <- c.Send(context.Background(), payload(20)) }()
		rawRecv(t, peer)
		for _, fc := range tt.fcs {
			rawSend(t, peer, 0x7E8, fc...)
		}
		if err := <-errc; !errors.Is(err, tt.want) {
			t.Errorf("%s: err %v, want %v", tt.name, err, tt.want)
		}
	}
	// WAIT within the limit, then CTS: the message goes through.
	b := vbus(t, can.VirtualConfig{BitRate: 500_000})
	c := newConn(t, b.NewNode(), Config{TxID: 0x7E0, RxID: 0x7E8, MaxWaits: 2})
	peer := b.NewNode()
	errc := make(chan error, 1)
	go func() { errc <- c.Send(context.Background(), payload(13)) }()
	rawRecv(t, peer)
	rawSend(t, peer, 0x7E8, 0x31, 0, 0)
	rawSend(t, peer, 0x7E8, 0x31, 0, 0)
	rawSend(t, peer, 0x7E8, 0x30, 0, 0)
	if cf := rawRecv(t, peer); cf.Data[0] != 0x21 {
		t.Fatalf("CF after waits: %v", cf)
	}
	if err := <-errc; err != nil {
		t.Fatal(err)
	}
}

// Receiving: our FC announces BS and STmin; after BS CFs we send FC again.
func TestReceiveAnnouncesBSAndSTmin(t *testing.T) {
	b := vbus(t, can.VirtualConfig{BitRate: 500_000})
	c := newConn(t, b.NewNode(), Config{TxID: 0x7E0, RxID: 0x7E8, BlockSize: 2, STmin: 300 * time.Microsecond})
	peer := b.NewNode()
	msg := payload(6 + 7*4)
	rawSend(t, peer, 0x7E8, append([]byte{0x10, byte(len(msg))}, msg[:6]...)...)
	wantFC := can.Frame{ID: 0x7E0, DLC: 8, Data: [8]byte{0x30, 2, 0xF3, 0xCC, 0xCC, 0xCC, 0xCC, 0xCC}}
	if fc := rawRecv(t, peer); fc != wantFC {
		t.Fatalf("FC %v, want %v", fc, wantFC)
	}
	for i := 0; i < 4; i++ {
		rawSend(t, peer, 0x7E8, append([]byte{0x20 | byte(i+1)}, msg[6+7*i:13+7*i]...)...)
		if i == 1 {
			if fc := rawRecv(t, peer); fc != wantFC {
				t.Fatalf("FC after block %v", fc)
			}
		}
	}
	m, err := c.Receive(ctxT(t, time.Second))
	if err != nil || m.ID != 0x7E8 || !bytes.Equal(m.Payload, msg) {
		t.Fatalf("Receive %v % X, want % X", err, m.Payload, msg)
	}
}

func TestReceiveErrors(t *testing.T) {
	b := vbus(t, can.VirtualConfig{BitRate: 500_000})
	c := newConn(t, b.NewNode(), Config{TxID: 0x7E0, RxID: 0x7E8, NCr: 40 * time.Millisecond, MaxLength: 64})
	peer := b.NewNode()
	// Wrong SN aborts; the next message arrives intact.
	rawSend(t, peer, 0x7E8, 0x10, 0x0A, 1, 2, 3, 4, 5, 6)
	rawRecv(t, peer)
	rawSend(t, peer, 0x7E8, 0x23, 7, 8, 9, 10)
	if _, err := c.Receive(ctxT(t, time.Second)); !errors.Is(err, ErrWrongSN) {
		t.Fatalf("wrong SN: %v", err)
	}
	rawSend(t, peer, 0x7E8, 0x02, 0x41, 0x0D)
	if m, err := c.Receive(ctxT(t, time.Second)); err != nil || !bytes.Equal(m.Payload, []byte{0x41, 0x0D}) {
		t.Fatalf("after wrong SN: %v %v", m, err)
	}
	// N_Cr: FF and nothing more.
	start := time.Now()
	rawSend(t, peer, 0x7E8, 0x10, 0x0A, 1, 2, 3, 4, 5, 6)
	rawRecv(t, peer)
	if _, err := c.Receive(ctxT(t, time.Second)); !errors.Is(err, ErrTimeout) || time.Since(start) < 40*time.Millisecond {
		t.Fatalf("N_Cr: %v after %v", err, time.Since(start))
	}
	// Too long: FC overflow goes out.
	rawSend(t, peer, 0x7E8, 0x10, 0x41, 1, 2, 3, 4, 5, 6)
	if fc := rawRecv(t, peer); fc.Data[0] != 0x32 {
		t.Fatalf("overflow FC %v", fc)
	}
	if _, err := c.Receive(ctxT(t, time.Second)); !errors.Is(err, ErrTooLong) {
		t.Fatalf("too long: %v", err)
	}
	// Frames from other IDs are not ours.
	rawSend(t, peer, 0x7E9, 0x02, 0x41, 0x0D)
	rawSend(t, peer, 0x7E8, 0x01, 0x55)
	if m, err := c.Receive(ctxT(t, time.Second)); err != nil || m.Payload[0] != 0x55 {
		t.Fatalf("foreign ID leaked: %v %v", m, err)
	}
	st := c.Stats()
	if st.Aborted != 3 || st.MessagesIn != 2 {
		t.Errorf("stats %+v", st)
	}
}

// A functional request answered by several ECUs at once, multi-frame and
// interleaved: each reassembles on its own and gets FC on its own ID.
func TestFunctionalMultiResponder(t *testing.T) {
	b := vbus(t, can.VirtualConfig{BitRate: 500_000})
	accept := func(id uint32) (uint32, bool) {
		if id >= 0x7E8 && id <= 0x7EF {
			return id - 8, true
		}
		return 0, false
	}
	// Primary link ECU #1 (0x7E0/0x7E8); the request goes to the functional ID with SendTo.
	tester := newConn(t, b.NewNode(), Config{TxID: 0x7E0, RxID: 0x7E8, Accept: accept, NBs: OBDNBs, NCr: OBDNCr})
	const ecus = 3
	want := map[uint32][]byte{}
	var wg sync.WaitGroup
	for i := 0; i < ecus; i++ {
		node := b.NewNode()
		ecu := newConn(t, node, Config{TxID: 0x7E8 + uint32(i), RxID: 0x7E0 + uint32(i), STmin: time.Millisecond})
		resp := append([]byte{0x49, 0x02, 0x01}, []byte("VIN-OF-ECU-NUMBER")...)
		resp[len(resp)-1] = byte('0' + i)
		want[0x7E8+uint32(i)] = resp
		// Every ECU also listens to the functional ID with a raw reader.
		fn := b.NewNode()
		wg.Add(1)
		go func() {
			defer wg.Done()
			f, err := fn.Receive(ctxT(t, 2*time.Second))
			if err != nil || f.ID != 0x7DF || f.Data[0] != 0x02 || f.Data[1] != 0x09 || f.Data[2] != 0x02 {
				t.Errorf("functional request %v %v", f, err)
				return
			}
			if err := ecu.Send(context.Background(), resp); err != nil {
				t.Errorf("ECU %d: %v", i, err)
			}
		}()
	}
	if err := tester.SendTo(context.Background(), 0x7DF, []byte{0x09, 0x02}); err != nil {
		t.Fatal(err)
	}
	if err := tester.SendTo(context.Background(), 0x7DF, payload(8)); err == nil {
		// 0x7DF has no responder mapped to it: a multi-frame functional send times out.
		t.Fatal("multi-frame functional send succeeded")
	}
	for i := 0; i < ecus; i++ {
		m, err := tester.Receive(ctxT(t, 2*time.Second))
		if err != nil {
			t.Fatal(err)
		}
		if !bytes.Equal(m.Payload, want[m.ID]) {
			t.Errorf("from %X: % X, want % X", m.ID, m.Payload, want[m.ID])
		}
		delete(want, m.ID)
	}
	wg.Wait()
}

func TestConnClose(t *testing.T) {
	b := vbus(t, can.VirtualConfig{})
	c := newConn(t, b.NewNode(), Config{TxID: 1, RxID: 2})
	errc := make(chan error, 1)
	go func() { _, err := c.Receive(context.Background()); errc <- err }()
	time.Sleep(5 * time.Millisecond)
	_ = c.Close()
	if err := <-errc; !errors.Is(err, ErrClosed) {
		t.Fatalf("Receive after Close: %v", err)
	}
	if err := c.Send(context.Background(), []byte{1}); !errors.Is(err, ErrClosed) {
		t.Fatalf("Send after Close: %v", err)
	}
	for _, cfg := range []Config{{TxID: 1, RxID: 1}, {TxID: 0x800, RxID: 1}, {TxID: 1, RxID: 2, STmin: time.Second}} {
		if _, err := NewConn(b.NewNode(), cfg); err == nil {
			t.Errorf("config %+v accepted", cfg)
		}
	}
}

// 32-bit escaped FF lengths end to end.
func TestEscapedLengthEndToEnd(t *testing.T) {
	b := vbus(t, can.VirtualConfig{})
	a := newConn(t, b.NewNode(), Config{TxID: 0x18DA10F1, RxID: 0x18DAF110, Extended: true})
	z := newConn(t, b.NewNode(), Config{TxID: 0x18DAF110, RxID: 0x18DA10F1, Extended: true, MaxLength: 6000})
	msg := payload(5000)
	errc := make(chan error, 1)
	go func() { errc <- a.Send(context.Background(), msg) }()
	m, err := z.Receive(ctxT(t, 5*time.Second))
	if err != nil || !bytes.Equal(m.Payload, msg) || m.ID != 0x18DA10F1 {
		t.Fatalf("escaped: %v, %d bytes from %X", err, len(m.Payload), m.ID)
	}
	if err := <-errc; err != nil {
		t.Fatal(err)
	}
}
