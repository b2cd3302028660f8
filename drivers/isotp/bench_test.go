package isotp

import (
	"testing"

	"github.com/plenum-engine/plenum/drivers/can"
)

// messageFrames returns the FF and CFs of an n-byte message on 0x7E8, padded.
func messageFrames(n int) []can.Frame {
	payload := make([]byte, n)
	for i := range payload {
		payload[i] = byte(i * 7)
	}
	var out []can.Frame
	f := can.Frame{ID: 0x7E8, DLC: 8}
	f.Data = [8]byte{0x10 | byte(n>>8), byte(n)}
	off := copy(f.Data[2:], payload)
	out = append(out, f)
	for sn := byte(1); off < n; sn++ {
		f = can.Frame{ID: 0x7E8, DLC: 8, Data: [8]byte{0x20 | sn&0xF, 0xCC, 0xCC, 0xCC, 0xCC, 0xCC, 0xCC, 0xCC}}
		off += copy(f.Data[1:], payload[off:])
		out = append(out, f)
	}
	return out
}

// BenchmarkReassembly feeds 4095-byte messages (1 FF + 585 CFs) through one
// Receiver and reports frames/s and allocations per frame.
func BenchmarkReassembly(b *testing.B) {
	frames := messageFrames(Max12BitLength)
	r := NewReceiver(ReceiverConfig{})
	for _, f := range frames { // warm the buffer
		_, _ = r.Feed(f)
	}
	b.ReportAllocs()
	b.ResetTimer()
	n := 0
	for i := 0; i < b.N; i++ {
		f := frames[i%len(frames)]
		if _, err := r.Feed(f); err != nil {
			b.Fatal(err)
		}
		n++
	}
	b.StopTimer()
	b.ReportMetric(float64(n)/b.Elapsed().Seconds(), "frames/s")
}

func TestReassemblyZeroAlloc(t *testing.T) {
	frames := messageFrames(Max12BitLength)
	r := NewReceiver(ReceiverConfig{})
	for _, f := range frames {
		_, _ = r.Feed(f)
	}
	allocs := testing.AllocsPerRun(20, func() {
		for _, f := range frames {
			if _, err := r.Feed(f); err != nil {
				t.Fatal(err)
			}
		}
	})
	if allocs != 0 {
		t.Fatalf("%v allocations per message in steady state", allocs)
	}
	if len(r.Message()) != Max12BitLength {
		t.Fatalf("message length %d", len(r.Message()))
	}
}
