//go:build kernelcan

package isotp

import (
	"bytes"
	"context"
	"github.com/plenum-engine/plenum/drivers/can/cantest"
	"os"
	"os/exec"
	"sync"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/drivers/can"
)

// needKernel skips outside the CAN VM unless PLENUM_INTEGRATION=1, where a
// missing AF_CAN is a failure.
func kctx(t *testing.T) context.Context {
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	t.Cleanup(cancel)
	return ctx
}

// Our ISO-TP (user space, over our SocketCAN bus) against the kernel's
// CAN_ISOTP socket, both directions, multi-frame, with BS and STmin on both sides.
func TestKernelISOTPInterop(t *testing.T) {
	bus, err := can.DialSocketCAN("vcan0")
	cantest.NeedKernel(t, err)
	defer bus.Close()
	// Kernel side is the "ECU": receives on 0x7E0, sends on 0x7E8; announces BS 3, STmin 1 ms.
	k, err := DialKernel("vcan0", KernelConfig{TxID: 0x7E8, RxID: 0x7E0, BlockSize: 3, STmin: time.Millisecond})
	cantest.NeedKernel(t, err)
	defer k.Close()
	// Our side announces BS 4, STmin 300 µs (0xF3).
	// FCDelay: the kernel's sender drops an FC that beats the echo of its
	// last CF, which our user-space receiver can do on vcan.
	c, err := NewConn(bus, Config{TxID: 0x7E0, RxID: 0x7E8, BlockSize: 4, STmin: 300 * time.Microsecond, FCDelay: 2 * time.Millisecond})
	if err != nil {
		t.Fatal(err)
	}
	defer c.Close()
	for _, n := range []int{5, 7, 8, 20, 100, 1000, 4095} {
		msg := payload(n)
		// Ours -> kernel.
		errc := make(chan error, 1)
		go func() { errc <- c.Send(kctx(t), msg) }()
		m, err := k.Receive(kctx(t))
		if err != nil || !bytes.Equal(m.Payload, msg) {
			t.Fatalf("%d bytes ours->kernel: %v, got %d bytes", n, err, len(m.Payload))
		}
		if err := <-errc; err != nil {
			t.Fatalf("%d bytes ours->kernel send: %v", n, err)
		}
		// Kernel -> ours.
		rev := append([]byte(nil), msg...)
		for i := range rev {
			rev[i] ^= 0x5A
		}
		go func() { errc <- k.Send(kctx(t), rev) }()
		got, err := c.Receive(kctx(t))
		if err != nil || got.ID != 0x7E8 || !bytes.Equal(got.Payload, rev) {
			t.Fatalf("%d bytes kernel->ours: %v, got %d bytes from %X", n, err, len(got.Payload), got.ID)
		}
		if err := <-errc; err != nil {
			t.Fatalf("%d bytes kernel send: %v", n, err)
		}
	}
	st := c.Stats()
	t.Logf("conn stats %+v", st)
	if st.Aborted != 0 {
		t.Errorf("aborted receptions: %+v", st)
	}
}

// The kernel's STmin is honoured by our sender: CF gaps seen on a raw
// socket are at least the kernel's announced 5 ms; BS 2 from the kernel.
func TestKernelISOTPSTminSeenOnWire(t *testing.T) {
	bus, err := can.DialSocketCAN("vcan1")
	cantest.NeedKernel(t, err)
	defer bus.Close()
	spy, err := can.DialSocketCAN("vcan1")
	cantest.NeedKernel(t, err)
	defer spy.Close()
	k, err := DialKernel("vcan1", KernelConfig{TxID: 0x18DAF110, RxID: 0x18DA10F1, Extended: true, BlockSize: 2, STmin: 5 * time.Millisecond})
	cantest.NeedKernel(t, err)
	defer k.Close()
	// Time the CFs where our sender hands them to the bus: a spy socket read
	// in user space under an emulated CPU sees them late and in bursts.
	tb := &timedBus{Bus: bus}
	c, err := NewConn(tb, Config{TxID: 0x18DA10F1, RxID: 0x18DAF110, Extended: true})
	if err != nil {
		t.Fatal(err)
	}
	defer c.Close()
	msg := payload(6 + 7*6)
	go func() { _ = c.Send(kctx(t), msg) }()
	var cfTimes []time.Time
	fcs := 0
	for len(cfTimes) < 6 {
		f, err := spy.Receive(kctx(t))
		if err != nil {
			t.Fatal(err)
		}
		switch {
		case f.ID == 0x18DA10F1 && f.Data[0]>>4 == 2:
			cfTimes = append(cfTimes, time.Time{}) // counted here, timed by tb
		case f.ID == 0x18DAF110 && f.Data[0]>>4 == 3:
			fcs++
			if f.Data[1] != 2 || f.Data[2] != 5 {
				t.Errorf("kernel FC % X, want BS 2 STmin 5", f.Data[:3])
			}
		}
	}
	cfTimes = tb.cfTimes()
	if len(cfTimes) != 6 {
		t.Fatalf("sender sent %d CFs, want 6", len(cfTimes))
	}
	for i := 1; i < len(cfTimes); i++ {
		if i%2 == 1 && cfTimes[i].Sub(cfTimes[i-1]) < 5*time.Millisecond { // within a block
			t.Errorf("CF gap %v within a block, kernel asked STmin 5 ms", cfTimes[i].Sub(cfTimes[i-1]))
		}
	}
	if fcs != 3 {
		t.Errorf("%d FC frames for 6 CFs at BS 2, want 3", fcs)
	}
	m, err := k.Receive(kctx(t))
	if err != nil || !bytes.Equal(m.Payload, msg) {
		t.Fatalf("kernel got %v %d bytes", err, len(m.Payload))
	}
}

// can-utils isotpsend/isotprecv talk to our Conn.
func TestKernelCanUtilsISOTP(t *testing.T) {
	if _, err := exec.LookPath("isotprecv"); err != nil {
		if os.Getenv("PLENUM_INTEGRATION") == "1" {
			t.Fatal("isotprecv missing")
		}
		t.Skip("can-utils not installed (kernel-can-run --with-can-utils)")
	}
	bus, err := can.DialSocketCAN("vcan0")
	cantest.NeedKernel(t, err)
	defer bus.Close()
	// isotprecv/isotpsend: -s is the ID the tool sends on, -d the ID it receives on.
	c, err := NewConn(bus, Config{TxID: 0x321, RxID: 0x123, FCDelay: 2 * time.Millisecond})
	if err != nil {
		t.Fatal(err)
	}
	defer c.Close()
	cmd := exec.Command("isotprecv", "-s", "123", "-d", "321", "vcan0") // exits after one message
	out := &bytes.Buffer{}
	cmd.Stdout = out
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	time.Sleep(200 * time.Millisecond)
	if err := c.Send(kctx(t), payload(30)); err != nil {
		_ = cmd.Process.Kill()
		t.Fatal(err)
	}
	if err := cmd.Wait(); err != nil {
		t.Fatalf("isotprecv: %v", err)
	}
	if !bytes.Contains(bytes.ToUpper(out.Bytes()), []byte("07 26 45")) {
		t.Errorf("isotprecv printed %q", out.String())
	}
	send := exec.Command("isotpsend", "-s", "123", "-d", "321", "vcan0")
	send.Stdin = bytes.NewBufferString("11 22 33 44 55 66 77 88 99 AA")
	if b, err := send.CombinedOutput(); err != nil {
		t.Fatalf("isotpsend: %v %s", err, b)
	}
	m, err := c.Receive(kctx(t))
	if err != nil || !bytes.Equal(m.Payload, []byte{0x11, 0x22, 0x33, 0x44, 0x55, 0x66, 0x77, 0x88, 0x99, 0xAA}) {
		t.Fatalf("from isotpsend: %v % X", err, m.Payload)
	}
}

// timedBus records when each consecutive frame was sent.
type timedBus struct {
	can.Bus
	mu sync.Mutex
	cf []time.Time
}

func (b *timedBus) Send(ctx context.Context, f can.Frame) error {
	if f.DLC > 0 && f.Data[0]>>4 == 2 {
		b.mu.Lock()
		b.cf = append(b.cf, time.Now())
		b.mu.Unlock()
	}
	return b.Bus.Send(ctx, f)
}

func (b *timedBus) cfTimes() []time.Time {
	b.mu.Lock()
	defer b.mu.Unlock()
	return append([]time.Time(nil), b.cf...)
}
