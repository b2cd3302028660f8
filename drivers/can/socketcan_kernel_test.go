//go:build kernelcan

package can

import (
	"bytes"
	"context"
	"github.com/plenum-engine/plenum/drivers/can/cantest"
	"os/exec"
	"strings"
	"testing"
	"time"
)

func TestKernelSocketCANSendReceive(t *testing.T) {
	a, err := DialSocketCAN("vcan0")
	cantest.NeedKernel(t, err)
	defer a.Close()
	b, err := DialSocketCAN("vcan0")
	cantest.NeedKernel(t, err)
	defer b.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	frames := []Frame{
		{ID: 0x7DF, DLC: 8, Data: [8]byte{0x02, 0x01, 0x0C, 0xCC, 0xCC, 0xCC, 0xCC, 0xCC}},
		{ID: 0x18DAF110, Extended: true, DLC: 3, Data: [8]byte{1, 2, 3}},
		{ID: 0x123, Remote: true, DLC: 2},
		{ID: 0x7FF},
	}
	for _, f := range frames {
		if err := a.Send(ctx, f); err != nil {
			t.Fatal(err)
		}
		got, err := b.Receive(ctx)
		if err != nil || got != f {
			t.Fatalf("sent %v, received %v (%v)", f, got, err)
		}
	}
	// Cancelling unblocks Receive; Close unblocks it too.
	c2, cancel2 := context.WithTimeout(context.Background(), 50*time.Millisecond)
	defer cancel2()
	if _, err := b.Receive(c2); err != context.DeadlineExceeded {
		t.Fatalf("cancel: %v", err)
	}
	errc := make(chan error, 1)
	go func() { _, err := b.Receive(context.Background()); errc <- err }()
	time.Sleep(20 * time.Millisecond)
	_ = b.Close()
	select {
	case err := <-errc:
		if err != ErrClosed {
			t.Fatalf("after close: %v", err)
		}
	case <-time.After(2 * time.Second):
		t.Fatal("Close did not unblock Receive")
	}
}

func TestKernelSocketCANWithCanUtils(t *testing.T) {
	if _, err := exec.LookPath("cansend"); err != nil {
		t.Skip("can-utils not installed (kernel-can-run --with-can-utils)")
	}
	s, err := DialSocketCAN("vcan1")
	cantest.NeedKernel(t, err)
	defer s.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	if out, err := exec.Command("cansend", "vcan1", "7E8#064100BE3FA81300").CombinedOutput(); err != nil {
		t.Fatalf("cansend: %v %s", err, out)
	}
	f, err := s.Receive(ctx)
	if err != nil || f.String() != "7E8#064100BE3FA81300" {
		t.Fatalf("from cansend: %v %v", f, err)
	}
	dump := exec.Command("candump", "-L", "-n", "1", "vcan1")
	var out bytes.Buffer
	dump.Stdout = &out
	if err := dump.Start(); err != nil {
		t.Fatal(err)
	}
	time.Sleep(200 * time.Millisecond)
	want := Frame{ID: 0x18DB33F1, Extended: true, DLC: 3, Data: [8]byte{0x02, 0x09, 0x02}}
	if err := s.Send(ctx, want); err != nil {
		t.Fatal(err)
	}
	_ = dump.Wait()
	if !strings.Contains(out.String(), "18DB33F1#020902") {
		t.Fatalf("candump printed %q, want %v", out.String(), want)
	}
}
