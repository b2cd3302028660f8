package isotp

import (
	"bytes"
	"errors"
	"testing"

	"github.com/plenum-engine/plenum/drivers/can"
)

func fr(data ...byte) can.Frame {
	f := can.Frame{ID: 0x7E8, DLC: uint8(len(data))}
	copy(f.Data[:], data)
	return f
}

type step struct {
	f    can.Frame
	act  Action
	err  error  // nil: no error
	msg  []byte // on ActionComplete
	fc   *FlowControl
	busy bool
	also error // a second error err must also wrap
}

func runSteps(t *testing.T, name string, cfg ReceiverConfig, steps []step) {
	t.Helper()
	r := NewReceiver(cfg)
	for i, s := range steps {
		act, err := r.Feed(s.f)
		if act != s.act || (s.err == nil) != (err == nil) || (s.err != nil && !errors.Is(err, s.err)) {
			t.Fatalf("%s step %d (%v): Feed = %d, %v; want %d, %v", name, i, s.f, act, err, s.act, s.err)
		}
		if s.also != nil && !errors.Is(err, s.also) {
			t.Fatalf("%s step %d (%v): Feed error %v does not report %v", name, i, s.f, err, s.also)
		}
		if act == ActionComplete && !bytes.Equal(r.Message(), s.msg) {
			t.Fatalf("%s step %d: message % X, want % X", name, i, r.Message(), s.msg)
		}
		if s.fc != nil && r.FlowControl() != *s.fc {
			t.Fatalf("%s step %d: FC %+v, want %+v", name, i, r.FlowControl(), *s.fc)
		}
		if r.Busy() != s.busy {
			t.Fatalf("%s step %d: Busy = %v, want %v", name, i, r.Busy(), s.busy)
		}
	}
}

func TestReceiverFrames(t *testing.T) {
	cts := &FlowControl{Status: ContinueToSend}
	vin := []byte("\x49\x02\x01WBA00000000000000")[:20]
	tests := []struct {
		name  string
		cfg   ReceiverConfig
		steps []step
	}{
		{"SF padded, pad not checked", ReceiverConfig{}, []step{
			{f: fr(0x03, 0x41, 0x0C, 0x1A, 0x55, 0xAA, 0x00, 0x12), act: ActionComplete, msg: []byte{0x41, 0x0C, 0x1A}},
		}},
		{"SF DLC-optimised", ReceiverConfig{}, []step{{f: fr(0x02, 0x41, 0x05), act: ActionComplete, msg: []byte{0x41, 0x05}}}},
		{"SF 7 bytes", ReceiverConfig{}, []step{{f: fr(0x07, 1, 2, 3, 4, 5, 6, 7), act: ActionComplete, msg: []byte{1, 2, 3, 4, 5, 6, 7}}}},
		{"SF_DL 0 ignored", ReceiverConfig{}, []step{{f: fr(0x00, 1, 2), err: ErrIgnored}}},
		{"SF_DL beyond DLC ignored", ReceiverConfig{}, []step{{f: fr(0x05, 1, 2), err: ErrIgnored}}},
		{"strict DLC ignores short frame", ReceiverConfig{StrictDLC: true}, []step{{f: fr(0x02, 0x41, 0x05), err: ErrIgnored}}},
		{"empty frame ignored", ReceiverConfig{}, []step{{f: fr(), err: ErrIgnored}}},
		{"reserved PCI ignored", ReceiverConfig{}, []step{{f: fr(0x40, 0, 0, 0, 0, 0, 0, 0), err: ErrIgnored}}},
		{"FC ignored by receiver", ReceiverConfig{}, []step{{f: fr(0x30, 0, 0), err: ErrIgnored}}},
		{"CF without FF ignored", ReceiverConfig{}, []step{{f: fr(0x21, 1, 2, 3, 4, 5, 6, 7), err: ErrIgnored}}},
		// VIN response of reference-facts §1.3: FF_DL 0x014 = 20.
		{"FF + 2 CF (VIN)", ReceiverConfig{BlockSize: 0, STmin: 0}, []step{
			{f: fr(0x10, 0x14, 0x49, 0x02, 0x01, 'W', 'B', 'A'), act: ActionFlowControl, fc: cts, busy: true},
			{f: fr(0x21, '0', '0', '0', '0', '0', '0', '0'), busy: true},
			{f: fr(0x22, '0', '0', '0', '0', '0', '0', '0'), act: ActionComplete, msg: vin},
		}},
		{"block size 1 asks FC after each CF, STmin announced", ReceiverConfig{BlockSize: 1, STmin: 0xF3}, []step{
			{f: fr(0x10, 0x14, 0x49, 0x02, 0x01, 'W', 'B', 'A'), act: ActionFlowControl, fc: &FlowControl{ContinueToSend, 1, 0xF3}, busy: true},
			{f: fr(0x21, '0', '0', '0', '0', '0', '0', '0'), act: ActionFlowControl, fc: &FlowControl{ContinueToSend, 1, 0xF3}, busy: true},
			{f: fr(0x22, '0', '0', '0', '0', '0', '0', '0'), act: ActionComplete, msg: vin},
		}},
		{"last CF DLC-optimised", ReceiverConfig{}, []step{
			{f: fr(0x10, 0x08, 1, 2, 3, 4, 5, 6), act: ActionFlowControl, busy: true},
			{f: fr(0x21, 7, 8), act: ActionComplete, msg: []byte{1, 2, 3, 4, 5, 6, 7, 8}},
		}},
		{"CF too short aborts", ReceiverConfig{}, []step{
			{f: fr(0x10, 0x0A, 1, 2, 3, 4, 5, 6), act: ActionFlowControl, busy: true},
			{f: fr(0x21, 7, 8), err: ErrShortFrame},
		}},
		{"wrong SN aborts cleanly, next message fine", ReceiverConfig{}, []step{
			{f: fr(0x10, 0x0A, 1, 2, 3, 4, 5, 6), act: ActionFlowControl, busy: true},
			{f: fr(0x22, 7, 8, 9, 10, 0, 0, 0), err: ErrWrongSN},
			{f: fr(0x21, 7, 8, 9, 10, 0, 0, 0), err: ErrIgnored},
			{f: fr(0x02, 0xAB, 0xCD), act: ActionComplete, msg: []byte{0xAB, 0xCD}},
		}},
		{"FF_DL below 8 ignored", ReceiverConfig{}, []step{{f: fr(0x10, 0x07, 1, 2, 3, 4, 5, 6), err: ErrIgnored}}},
		{"FF with short DLC ignored", ReceiverConfig{}, []step{{f: fr(0x10, 0x10, 1, 2, 3), err: ErrIgnored}}},
		{"FF too long: overflow", ReceiverConfig{MaxLength: 100}, []step{
			{f: fr(0x10, 0x65, 1, 2, 3, 4, 5, 6), act: ActionFlowControl, err: ErrTooLong, fc: &FlowControl{Status: Overflow}},
		}},
		{"escaped FF 32-bit length", ReceiverConfig{MaxLength: 5000}, []step{
			{f: fr(0x10, 0x00, 0x00, 0x00, 0x10, 0x00, 0xAA, 0xBB), act: ActionFlowControl, busy: true},
		}},
		{"escaped FF with length ≤ 4095 ignored", ReceiverConfig{MaxLength: 5000}, []step{
			{f: fr(0x10, 0x00, 0x00, 0x00, 0x0F, 0xFF, 0xAA, 0xBB), err: ErrIgnored},
		}},
		{"SF interrupts a message", ReceiverConfig{}, []step{
			{f: fr(0x10, 0x0A, 1, 2, 3, 4, 5, 6), act: ActionFlowControl, busy: true},
			{f: fr(0x01, 0x99), act: ActionComplete, err: ErrInterrupted, msg: []byte{0x99}},
		}},
		{"FF interrupts a message", ReceiverConfig{}, []step{
			{f: fr(0x10, 0x0A, 1, 2, 3, 4, 5, 6), act: ActionFlowControl, busy: true},
			{f: fr(0x10, 0x08, 9, 9, 9, 9, 9, 9), act: ActionFlowControl, err: ErrInterrupted, busy: true},
			{f: fr(0x21, 8, 7, 0xCC, 0xCC, 0xCC, 0xCC, 0xCC), act: ActionComplete, msg: []byte{9, 9, 9, 9, 9, 9, 8, 7}},
		}},
		{"too-long FF interrupts a message: both reported", ReceiverConfig{MaxLength: 100}, []step{
			{f: fr(0x10, 0x0A, 1, 2, 3, 4, 5, 6), act: ActionFlowControl, busy: true},
			{f: fr(0x10, 0x65, 1, 2, 3, 4, 5, 6), act: ActionFlowControl, err: ErrTooLong, also: ErrInterrupted, fc: &FlowControl{Status: Overflow}},
			{f: fr(0x21, 7, 8, 9, 10, 0, 0, 0), err: ErrIgnored},
		}},
		{"remote frame ignored", ReceiverConfig{}, []step{{f: can.Frame{ID: 0x7E8, Remote: true, DLC: 8}, err: ErrIgnored}}},
	}
	for _, tt := range tests {
		runSteps(t, tt.name, tt.cfg, tt.steps)
	}
}

// SN wraps from 15 to 0 (ISO 15765-2 Table 9 / reference-facts §2.1).
func TestReceiverSNWrap(t *testing.T) {
	r := NewReceiver(ReceiverConfig{})
	want := make([]byte, 6+7*20)
	for i := range want {
		want[i] = byte(i)
	}
	var f can.Frame
	f = fr(0x10, byte(len(want)), want[0], want[1], want[2], want[3], want[4], want[5])
	if act, err := r.Feed(f); act != ActionFlowControl || err != nil {
		t.Fatal(act, err)
	}
	off := 6
	for i := 1; off < len(want); i++ {
		d := []byte{0x20 | byte(i&0xF)}
		d = append(d, want[off:off+7]...)
		act, err := r.Feed(fr(d...))
		if err != nil {
			t.Fatalf("CF %d: %v", i, err)
		}
		off += 7
		if off == len(want) && (act != ActionComplete || !bytes.Equal(r.Message(), want)) {
			t.Fatalf("not complete: %d", act)
		}
	}
}
