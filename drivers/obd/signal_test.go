package obd

import (
	"errors"
	"testing"
)

func TestSignalDecode(t *testing.T) {
	rec := []byte{0x12, 0x34, 0xFF, 0xFE, 0x80, 0x00, 0x00, 0x01}
	cases := []struct {
		s    Signal
		want float64
	}{
		{Signal{Name: "a", ByteOffset: 0, Length: 2, BigEndian: true, Scale: 1}, 0x1234},
		{Signal{Name: "a", ByteOffset: 0, Length: 2, Scale: 1}, 0x3412},
		{Signal{Name: "a", ByteOffset: 2, Length: 2, BigEndian: true, Signed: true, Scale: 1}, -2},
		{Signal{Name: "a", ByteOffset: 2, Length: 1, Signed: true, Scale: 0.5, Offset: 10}, 9.5},
		{Signal{Name: "a", ByteOffset: 4, Length: 4, BigEndian: true, Signed: true, Scale: 1}, -2147483647},
		{Signal{Name: "a", ByteOffset: 4, Length: 4, BigEndian: true, Scale: 1}, 2147483649},
		{Signal{Name: "a", ByteOffset: 1, Length: 3, BigEndian: true, Signed: true, Scale: 2, Offset: -1}, float64(int32(0x34FFFE<<8)>>8)*2 - 1},
		{Signal{Name: "a", ByteOffset: 7, Length: 1, Scale: 1000, Offset: -40}, 960},
	}
	for i, c := range cases {
		if err := c.s.Validate(); err != nil {
			t.Fatalf("%d: %v", i, err)
		}
		got, err := c.s.Decode(rec)
		if err != nil || !approx(got, c.want) {
			t.Errorf("%d: %v %v, want %v", i, got, err, c.want)
		}
	}
	if _, err := (Signal{Name: "a", ByteOffset: 7, Length: 2, Scale: 1}).Decode(rec); !errors.Is(err, ErrShortData) {
		t.Errorf("short: %v", err)
	}
}

func TestSignalValidate(t *testing.T) {
	bad := []Signal{
		{Name: "Bad Name", Length: 1, Scale: 1},
		{Name: "a", Length: 0, Scale: 1},
		{Name: "a", Length: 5, Scale: 1},
		{Name: "a", Length: 1, Scale: 0},
		{Name: "a", Length: 1, ByteOffset: -1, Scale: 1},
		{Name: "a", Length: 1, Scale: 1, UsePID: true, PID: 0x20},
	}
	for i, s := range bad {
		if s.Validate() == nil {
			t.Errorf("%d: %+v accepted", i, s)
		}
	}
	if r := (Signal{Name: "a", Length: 1, Scale: 1, DID: 0x1234}).Request(); r.String() != "22 12 34" {
		t.Errorf("DID request %s", r)
	}
	if r := (Signal{Name: "a", Length: 1, Scale: 1, UsePID: true, PID: 0x0C}).Request(); r.String() != "01 0C" {
		t.Errorf("PID request %s", r)
	}
}
