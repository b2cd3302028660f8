package isotp

import (
	"errors"
	"testing"
	"time"
)

// ISO 15765-2 Table 20 and §9.6.5.5 (reference-facts §2.2).
func TestDecodeSTmin(t *testing.T) {
	tests := []struct {
		b    byte
		want time.Duration
	}{
		{0x00, 0}, {0x01, time.Millisecond}, {0x14, 20 * time.Millisecond}, {0x7F, 127 * time.Millisecond},
		{0xF1, 100 * time.Microsecond}, {0xF3, 300 * time.Microsecond}, {0xF9, 900 * time.Microsecond},
		// Reserved values: the sender uses 0x7F = 127 ms.
		{0x80, 127 * time.Millisecond}, {0xF0, 127 * time.Millisecond}, {0xFA, 127 * time.Millisecond}, {0xFF, 127 * time.Millisecond},
	}
	for _, tt := range tests {
		if got := DecodeSTmin(tt.b); got != tt.want {
			t.Errorf("DecodeSTmin(%#02x) = %v, want %v", tt.b, got, tt.want)
		}
	}
}

func TestEncodeSTmin(t *testing.T) {
	tests := []struct {
		d    time.Duration
		want byte
	}{
		{0, 0x00}, {time.Microsecond, 0xF1}, {100 * time.Microsecond, 0xF1}, {101 * time.Microsecond, 0xF2},
		{900 * time.Microsecond, 0xF9}, {901 * time.Microsecond, 0x01}, {20 * time.Millisecond, 0x14}, {127 * time.Millisecond, 0x7F},
	}
	for _, tt := range tests {
		got, err := EncodeSTmin(tt.d)
		if err != nil || got != tt.want {
			t.Errorf("EncodeSTmin(%v) = %#02x, %v; want %#02x", tt.d, got, err, tt.want)
		}
		if DecodeSTmin(got) < tt.d {
			t.Errorf("EncodeSTmin(%v) = %#02x decodes shorter", tt.d, got)
		}
	}
	for _, d := range []time.Duration{-1, 128 * time.Millisecond} {
		if _, err := EncodeSTmin(d); err == nil {
			t.Errorf("EncodeSTmin(%v) accepted", d)
		}
	}
}

func TestParseFlowControl(t *testing.T) {
	tests := []struct {
		data []byte
		want FlowControl
		err  error
	}{
		{[]byte{0x30, 0x00, 0x00}, FlowControl{ContinueToSend, 0, 0}, nil},
		{[]byte{0x30, 0x08, 0x14, 0xCC, 0xCC}, FlowControl{ContinueToSend, 8, 0x14}, nil},
		{[]byte{0x31, 0x00, 0x00}, FlowControl{Wait, 0, 0}, nil},
		{[]byte{0x32, 0x00, 0x00}, FlowControl{Overflow, 0, 0}, nil},
		{[]byte{0x33, 0x00, 0x00}, FlowControl{3, 0, 0}, ErrInvalidFS},
		{[]byte{0x3F, 0x00, 0x00}, FlowControl{15, 0, 0}, ErrInvalidFS},
		{[]byte{0x30, 0x00}, FlowControl{}, ErrIgnored},
		{[]byte{0x20, 0x00, 0x00}, FlowControl{}, ErrIgnored},
	}
	for _, tt := range tests {
		got, err := parseFlowControl(tt.data)
		if !errors.Is(err, tt.err) || (tt.err == nil && err != nil) || (tt.err != ErrIgnored && got != tt.want) {
			t.Errorf("parseFlowControl(% X) = %+v, %v; want %+v, %v", tt.data, got, err, tt.want, tt.err)
		}
	}
}
