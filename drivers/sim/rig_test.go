package sim

import (
	"context"
	"errors"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/drivers/can"
	"github.com/plenum-engine/plenum/drivers/isotp"
)

// TestRig: a tester on a rig node gets answers; the rig stops when its
// context ends or on Close, whichever comes first, and Close is idempotent.
func TestRig(t *testing.T) {
	for _, stop := range []string{"ctx", "close"} {
		t.Run(stop, func(t *testing.T) {
			ctx, cancel := context.WithCancel(context.Background())
			defer cancel()
			r, err := NewRig(ctx, RigConfig{Bus: can.VirtualConfig{BitRate: 500_000},
				ECU: ECUConfig{Source: func() State { return State{EngineSpeed: 1000, Running: true} }}})
			if err != nil {
				t.Fatal(err)
			}
			tester, err := isotp.NewConn(r.Node(), isotp.Config{TxID: 0x7E0, RxID: 0x7E8})
			if err != nil {
				t.Fatal(err)
			}
			defer tester.Close()
			rctx, rcancel := context.WithTimeout(ctx, 2*time.Second)
			defer rcancel()
			if err := tester.Send(rctx, []byte{0x01, 0x0C}); err != nil {
				t.Fatal(err)
			}
			m, err := tester.Receive(rctx)
			if err != nil {
				t.Fatal(err)
			}
			if want := []byte{0x41, 0x0C, 0x0F, 0xA0}; string(m.Payload) != string(want) { // 1000 rpm · 4 = 0x0FA0
				t.Errorf("answer % X, want % X", m.Payload, want)
			}
			if stop == "ctx" {
				cancel()
			} else if err := r.Close(); err != nil {
				t.Fatalf("Close: %v", err)
			}
			node := r.Node()
			deadline := time.Now().Add(2 * time.Second)
			for {
				err := node.Send(context.Background(), can.Frame{ID: 0x7E0, DLC: 2, Data: [8]byte{1, 0x3E}})
				if errors.Is(err, can.ErrClosed) {
					break
				}
				if time.Now().After(deadline) {
					t.Fatalf("bus still open after %s: %v", stop, err)
				}
				time.Sleep(time.Millisecond)
			}
			if err := r.Close(); err != nil {
				t.Errorf("second Close: %v", err)
			}
		})
	}
}

func TestRigRejects(t *testing.T) {
	for name, cfg := range map[string]RigConfig{
		"no source": {},
		"bad bus":   {Bus: can.VirtualConfig{BitRate: -1}, ECU: ECUConfig{Source: func() State { return State{} }}},
	} {
		if _, err := NewRig(context.Background(), cfg); err == nil {
			t.Errorf("%s: accepted", name)
		}
	}
}
