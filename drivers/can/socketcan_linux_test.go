//go:build linux

package can

import (
	"encoding/binary"
	"errors"
	"testing"
)

// On a kernel without AF_CAN (the build machines) DialSocketCAN must say so
// clearly; with AF_CAN but no such interface it must name the interface.
func TestDialSocketCANClearError(t *testing.T) {
	s, err := DialSocketCAN("plenum-nonexistent0")
	if err == nil {
		_ = s.Close()
		t.Fatal("dial of a nonexistent interface succeeded")
	}
	if errors.Is(err, errors.ErrUnsupported) {
		t.Logf("no AF_CAN here: %v", err)
		return
	}
	t.Logf("AF_CAN present: %v", err)
}

func TestLinuxFrameCodec(t *testing.T) {
	for _, f := range []Frame{
		{ID: 0x7E8, DLC: 8, Data: [8]byte{1, 2, 3, 4, 5, 6, 7, 8}},
		{ID: 0x18DAF110, Extended: true, DLC: 3, Data: [8]byte{9, 8, 7}},
		{ID: 0x123, Remote: true, DLC: 4},
	} {
		var buf [canFrameSize]byte
		encodeLinuxFrame(&buf, &f)
		got, ok := decodeLinuxFrame(&buf)
		if !ok || got != f {
			t.Errorf("round trip %v -> %v", f, got)
		}
	}
	var errFrame [canFrameSize]byte
	binary.NativeEndian.PutUint32(errFrame[:4], canERRFlag|1)
	if _, ok := decodeLinuxFrame(&errFrame); ok {
		t.Error("error frame accepted")
	}
}
