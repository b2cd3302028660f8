package isotp

import (
	"errors"
	"testing"

	"github.com/plenum-engine/plenum/drivers/can"
)

// FuzzReceiver feeds arbitrary frame sequences: each frame is a DLC byte
// (low nibble, 0–15) followed by up to 8 data bytes. The Receiver must never
// panic, never return a message longer than its limit, and keep its
// announced state consistent. FC frames also go through parseFlowControl.
func FuzzReceiver(f *testing.F) {
	f.Add([]byte{8, 0x10, 0x14, 0x49, 0x02, 0x01, 'W', 'B', 'A', 8, 0x21, 1, 2, 3, 4, 5, 6, 7})
	f.Fuzz(func(t *testing.T, in []byte) {
		const limit = 300
		r := NewReceiver(ReceiverConfig{MaxLength: limit, BlockSize: 2})
		for len(in) > 0 {
			dlc := int(in[0] & 0xF)
			in = in[1:]
			fr := can.Frame{ID: 0x7E8}
			n := min(dlc, 8, len(in))
			copy(fr.Data[:], in[:n])
			in = in[n:]
			fr.DLC = uint8(n)
			if n > 0 && fr.Data[0]>>4 == pciFC {
				fc, err := parseFlowControl(fr.Data[:n])
				if err == nil && fc.Status > Overflow {
					t.Fatalf("FC status %d accepted", fc.Status)
				}
			}
			act, err := r.Feed(fr)
			if err != nil && errors.Is(err, ErrIgnored) && act != ActionNone {
				t.Fatalf("ignored frame %v produced action %d", fr, act)
			}
			switch act {
			case ActionComplete:
				if m := r.Message(); len(m) == 0 || len(m) > limit {
					t.Fatalf("message of %d bytes", len(m))
				}
				if r.Busy() {
					t.Fatal("busy after completion")
				}
			case ActionFlowControl:
				if fc := r.FlowControl(); fc.Status == Overflow && r.Busy() {
					t.Fatal("busy after overflow")
				}
			}
		}
	})
}
