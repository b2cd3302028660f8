package obd

import (
	"errors"
	"strings"
	"testing"
)

func TestParseResponse(t *testing.T) {
	cases := []struct {
		in      []byte
		want    Response
		wantErr string
	}{
		{[]byte{0x41, 0x0C, 0x1A, 0xF8}, Response{Service: 0x01, Data: []byte{0x0C, 0x1A, 0xF8}}, ""},
		{[]byte{0x43, 0x00}, Response{Service: 0x03, Data: []byte{0x00}}, ""},
		{[]byte{0x62, 0xF1, 0x90}, Response{Service: 0x22, Data: []byte{0xF1, 0x90}}, ""},
		{[]byte{0x7F, 0x01, 0x12}, Response{Service: 0x01, Negative: true, NRC: 0x12}, ""},
		{[]byte{0x7F, 0x01}, Response{}, "negative response: 2 bytes"},
		{[]byte{}, Response{}, "empty"},
		{[]byte{0x44}, Response{}, "byte 0: response SID 0x44"}, // clear-DTC reply is not a read service
		{[]byte{0x01, 0x0C}, Response{}, "byte 0"},
		{[]byte{0x50, 0x03}, Response{}, "byte 0"},
	}
	for _, c := range cases {
		got, err := ParseResponse(c.in)
		if c.wantErr != "" {
			if err == nil || !strings.Contains(err.Error(), c.wantErr) {
				t.Errorf("% X: err %v, want %q", c.in, err, c.wantErr)
			}
			continue
		}
		if err != nil || got.Service != c.want.Service || got.Negative != c.want.Negative || got.NRC != c.want.NRC || string(got.Data) != string(c.want.Data) {
			t.Errorf("% X: got %+v %v, want %+v", c.in, got, err, c.want)
		}
	}
}

func TestNegativeResponses(t *testing.T) {
	names := map[NRC]string{0x10: "generalReject", 0x11: "serviceNotSupported", 0x12: "subFunctionNotSupported",
		0x13: "incorrectMessageLengthOrInvalidFormat", 0x21: "busyRepeatRequest", 0x22: "conditionsNotCorrect",
		0x31: "requestOutOfRange", 0x78: "requestCorrectlyReceived-ResponsePending", 0x99: "nrc(0x99)"}
	for n, w := range names {
		if n.String() != w {
			t.Errorf("NRC 0x%02X: %q, want %q", uint8(n), n.String(), w)
		}
	}
	for _, n := range []NRC{0x11, 0x12, 0x31} {
		r, _ := ParseResponse([]byte{0x7F, 0x01, byte(n)})
		if !errors.Is(r.Err(), ErrUnsupported) {
			t.Errorf("NRC 0x%02X should mark unsupported", uint8(n))
		}
	}
	r, _ := ParseResponse([]byte{0x7F, 0x22, 0x22})
	var ne *NegativeError
	if err := r.Err(); !errors.As(err, &ne) || errors.Is(err, ErrUnsupported) || ne.Service != 0x22 ||
		!strings.Contains(err.Error(), "conditionsNotCorrect") {
		t.Errorf("0x22: %v", err)
	}
}

func TestDecodeMultiPID(t *testing.T) {
	// 41 | 0D 32 | 0C 1A F8 | 05 5A | 0B 65 : any order, lengths from the table.
	data := []byte{0x0D, 0x32, 0x0C, 0x1A, 0xF8, 0x05, 0x5A, 0x0B, 0x65}
	got := map[PID]float64{}
	if err := DecodeCurrentData(data, func(p PID, _ ChannelIndex, v float64) { got[p] = v }); err != nil {
		t.Fatal(err)
	}
	want := map[PID]float64{0x0D: 50 / 3.6, 0x0C: 1726, 0x05: 50, 0x0B: 101000}
	for p, w := range want {
		if !approx(got[p], w) {
			t.Errorf("PID 0x%02X = %v, want %v", p, got[p], w)
		}
	}
	// Unknown PID 0x02 at payload offset 3 stops the walk.
	err := DecodeCurrentData([]byte{0x0D, 0x32, 0x02, 0x00}, func(PID, ChannelIndex, float64) {})
	if err == nil || !strings.Contains(err.Error(), "unknown PID 0x02 at offset 3") {
		t.Errorf("unknown PID: %v", err)
	}
	err = DecodeCurrentData([]byte{0x0D, 0x32, 0x0C, 0x1A}, func(PID, ChannelIndex, float64) {})
	if err == nil || !strings.Contains(err.Error(), "PID 0x0C at offset 3 needs 2 bytes, 1 left") {
		t.Errorf("truncated: %v", err)
	}
}

func TestSupportedBitmapChain(t *testing.T) {
	var s PIDSet
	// BE 1F A8 13: a common example bitmap (A7 = PID 01 … D0 = PID 20).
	next, err := s.AddBitmap(0x00, []byte{0xBE, 0x1F, 0xA8, 0x13})
	if err != nil || !next {
		t.Fatalf("next %v err %v", next, err)
	}
	for _, p := range []PID{0x01, 0x03, 0x04, 0x05, 0x06, 0x07, 0x0C, 0x0D, 0x0E, 0x0F, 0x10, 0x11, 0x13, 0x15, 0x1C, 0x1F, 0x20} {
		if !s.Has(p) {
			t.Errorf("PID 0x%02X missing", p)
		}
	}
	for _, p := range []PID{0x02, 0x08, 0x0A, 0x0B, 0x12, 0x14, 0x1D, 0x1E, 0x21} {
		if s.Has(p) {
			t.Errorf("PID 0x%02X present", p)
		}
	}
	next, _ = s.AddBitmap(0x20, []byte{0x80, 0, 0, 0})
	if next || !s.Has(0x21) {
		t.Errorf("0x20 block: next %v has21 %v", next, s.Has(0x21))
	}
	if next, _ := s.AddBitmap(0xE0, []byte{0, 0, 0, 0xFF}); next || !s.Has(0xFF) {
		t.Error("0xE0 block must end the chain and hold 0xFF")
	}
	if _, err := s.AddBitmap(0x10, []byte{0, 0, 0, 0}); err == nil {
		t.Error("0x10 accepted as bitmap")
	}
	if _, err := s.AddBitmap(0x00, []byte{0, 0, 0}); err == nil {
		t.Error("3-byte bitmap accepted")
	}
}

func TestDTCs(t *testing.T) {
	// SAE J2012 letters from bits A7–A6 (reference-facts §1.4).
	for d, w := range map[DTC]string{0x0133: "P0133", 0x4123: "C0123", 0x8ABC: "B0ABC", 0xC158: "U0158", 0x3FFF: "P3FFF", 0xFFFF: "U3FFF"} {
		if d.String() != w {
			t.Errorf("%04X: %s, want %s", uint16(d), d, w)
		}
	}
	var got []string
	err := DecodeDTCs([]byte{0x03, 0x01, 0x33, 0x00, 0x00, 0xC1, 0x58}, func(d DTC) { got = append(got, d.String()) })
	if err != nil || strings.Join(got, ",") != "P0133,U0158" {
		t.Errorf("got %v %v", got, err)
	}
	if err := DecodeDTCs([]byte{0x02, 0x01, 0x33}, func(DTC) {}); err == nil || !strings.Contains(err.Error(), "count 2") {
		t.Errorf("short: %v", err)
	}
	if err := DecodeDTCs(nil, func(DTC) {}); err == nil {
		t.Error("empty accepted")
	}
}

func TestVIN(t *testing.T) {
	// SAE J1979 service 09 InfoType 02: 49 02 01 + 17 ASCII characters.
	p := append([]byte{0x49, 0x02, 0x01}, "1HGCM82633A004352"...)
	r, err := ParseResponse(p)
	if err != nil {
		t.Fatal(err)
	}
	v, err := DecodeVIN(r.Data)
	if err != nil || v != "1HGCM82633A004352" {
		t.Errorf("VIN %q %v", v, err)
	}
	bad := append([]byte{0x02, 0x01}, "1HGCM82633A00435O"...)
	if _, err := DecodeVIN(bad); err == nil || !strings.Contains(err.Error(), "byte 19") {
		t.Errorf("letter O: %v", err)
	}
	if _, err := DecodeVIN([]byte{0x02, 0x01, 'A'}); err == nil {
		t.Error("short VIN accepted")
	}
}

func TestDecodeDID(t *testing.T) {
	rec, err := DecodeDID([]byte{0xF1, 0x90, 1, 2}, 0xF190)
	if err != nil || string(rec) != "\x01\x02" {
		t.Errorf("%v %v", rec, err)
	}
	if _, err := DecodeDID([]byte{0xF1, 0x91}, 0xF190); err == nil {
		t.Error("wrong DID accepted")
	}
}

func TestFreezeFrame(t *testing.T) {
	var got float64
	var fr uint8
	err := DecodeFreezeFrame([]byte{0x0C, 0x00, 0x1A, 0xF8}, func(f uint8, p PID, _ ChannelIndex, v float64) { fr, got = f, v })
	if err != nil || got != 1726 || fr != 0 {
		t.Errorf("%v %v %v", got, fr, err)
	}
	if err := DecodeFreezeFrame([]byte{0x0C}, func(uint8, PID, ChannelIndex, float64) {}); err == nil {
		t.Error("truncated accepted")
	}
}

func TestAddressing(t *testing.T) {
	// ISO 15765-4 identifiers, reference-facts §2.5.
	if id := FunctionalAddr(ID11).RequestID(); id != 0x7DF {
		t.Errorf("11-bit functional %X", id)
	}
	if id := FunctionalAddr(ID29).RequestID(); id != 0x18DB33F1 {
		t.Errorf("29-bit functional %X", id)
	}
	for n := uint8(0); n < 8; n++ {
		a, err := PhysicalAddr(ID11, n)
		rid, _ := a.ResponseID()
		if err != nil || a.RequestID() != 0x7E0+uint32(n) || rid != a.RequestID()+8 {
			t.Errorf("ECU %d: %X/%X %v", n, a.RequestID(), rid, err)
		}
		b, err := AddrFromResponseID(ID11, rid)
		if err != nil || b != a {
			t.Errorf("round trip %X: %v %v", rid, b, err)
		}
	}
	a, _ := PhysicalAddr(ID29, 0x10)
	rid, _ := a.ResponseID()
	if a.RequestID() != 0x18DA10F1 || rid != 0x18DAF110 || a.String() != "18DAF110" {
		t.Errorf("29-bit %X %X %s", a.RequestID(), rid, a)
	}
	if b, err := AddrFromResponseID(ID29, 0x18DAF110); err != nil || b != a {
		t.Errorf("29-bit round trip %v %v", b, err)
	}
	if _, err := PhysicalAddr(ID11, 8); err == nil {
		t.Error("ECU 8 accepted")
	}
	if _, err := AddrFromResponseID(ID11, 0x7DF); err == nil {
		t.Error("0x7DF accepted as response")
	}
	if _, err := AddrFromResponseID(ID29, 0x18DA10F1); err == nil {
		t.Error("request ID accepted as response")
	}
	if BitRate500k.Validate() != nil || BitRate250k.Validate() != nil || BitRate(125000).Validate() == nil {
		t.Error("bit rate validation")
	}
}

func TestRequestEncoding(t *testing.T) {
	cases := []struct {
		r    Request
		want string
	}{
		{must(CurrentData(0x0C, 0x0D)), "01 0C 0D"},
		{FreezeFrame(0x0C, 0), "02 0C 00"},
		{StoredDTCs(), "03"},
		{PendingDTCs(), "07"},
		{VehicleInfo(0x02), "09 02"}, // SAE J1979: request 09 02
		{ReadDID(0xF190), "22 F1 90"},
	}
	for _, c := range cases {
		if c.r.String() != c.want {
			t.Errorf("%s, want %s", c.r, c.want)
		}
	}
	if _, err := CurrentData(); err == nil {
		t.Error("0 PIDs accepted")
	}
	if _, err := CurrentData(1, 2, 3, 4, 5, 6, 7); err == nil {
		t.Error("7 PIDs accepted")
	}
	if _, err := CurrentData(0x0C, 0x0C); err == nil {
		t.Error("repeated PID accepted")
	}
}

func must(r Request, err error) Request {
	if err != nil {
		panic(err)
	}
	return r
}
