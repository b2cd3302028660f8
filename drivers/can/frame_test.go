package can

import (
	"errors"
	"testing"
)

func TestFrameValidate(t *testing.T) {
	tests := []struct {
		name string
		f    Frame
		ok   bool
	}{
		{"zero", Frame{}, true},
		{"max 11-bit", Frame{ID: 0x7FF, DLC: 8}, true},
		{"11-bit too big", Frame{ID: 0x800}, false},
		{"max 29-bit", Frame{ID: 0x1FFFFFFF, Extended: true}, true},
		{"29-bit too big", Frame{ID: 0x20000000, Extended: true}, false},
		{"dlc 9", Frame{ID: 1, DLC: 9}, false},
		{"data beyond dlc", Frame{ID: 1, DLC: 2, Data: [8]byte{1, 2, 3}}, false},
		{"remote with data", Frame{ID: 1, Remote: true, DLC: 2, Data: [8]byte{1}}, false},
		{"remote dlc 8", Frame{ID: 1, Remote: true, DLC: 8}, true},
	}
	for _, tt := range tests {
		err := tt.f.Validate()
		if (err == nil) != tt.ok {
			t.Errorf("%s: Validate() = %v, want ok=%v", tt.name, err, tt.ok)
		}
		if err != nil && !errors.Is(err, ErrInvalidFrame) {
			t.Errorf("%s: error %v does not wrap ErrInvalidFrame", tt.name, err)
		}
	}
}

func TestFrameStringParse(t *testing.T) {
	tests := []struct {
		f    Frame
		text string
	}{
		{Frame{ID: 0x7E8, DLC: 8, Data: [8]byte{0x06, 0x41, 0x00, 0xBE, 0x3F, 0xA8, 0x13, 0x00}}, "7E8#064100BE3FA81300"},
		{Frame{ID: 0x7DF, DLC: 3, Data: [8]byte{0x02, 0x01, 0x0C}}, "7DF#02010C"},
		{Frame{ID: 0x18DAF110, Extended: true, DLC: 1, Data: [8]byte{0xAA}}, "18DAF110#AA"},
		{Frame{ID: 0x001}, "001#"},
		{Frame{ID: 0x123, Remote: true}, "123#R"},
		{Frame{ID: 0x123, Remote: true, DLC: 8}, "123#R8"},
	}
	for _, tt := range tests {
		if got := tt.f.String(); got != tt.text {
			t.Errorf("String(%+v) = %q, want %q", tt.f, got, tt.text)
		}
		got, err := ParseFrame(tt.text)
		if err != nil || got != tt.f {
			t.Errorf("ParseFrame(%q) = %+v, %v; want %+v", tt.text, got, err, tt.f)
		}
	}
	if f, err := ParseFrame("7e8#06.41.00"); err != nil || f.DLC != 3 || f.Data[1] != 0x41 {
		t.Errorf("dotted lower-case: %+v %v", f, err)
	}
}

func TestParseFrameErrors(t *testing.T) {
	for _, s := range []string{"", "7E8", "7E#00", "7G8#00", "7E8#0", "7E8#0G", "7E8#000000000000000000", "800#", "20000000#", "123#R9", "123#R88"} {
		if _, err := ParseFrame(s); err == nil || !errors.Is(err, ErrInvalidFrame) {
			t.Errorf("ParseFrame(%q) error = %v, want ErrInvalidFrame", s, err)
		}
	}
}

func FuzzParseFrame(f *testing.F) {
	f.Add("7E8#064100BE3FA81300")
	f.Fuzz(func(t *testing.T, s string) {
		fr, err := ParseFrame(s)
		if err != nil {
			return
		}
		if err := fr.Validate(); err != nil {
			t.Fatalf("ParseFrame(%q) returned invalid frame: %v", s, err)
		}
		back, err := ParseFrame(fr.String())
		if err != nil || back != fr {
			t.Fatalf("round trip of %q via %q: %+v, %v", s, fr.String(), back, err)
		}
	})
}
