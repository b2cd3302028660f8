package serial

import (
	"errors"
	"math"
	"os"
	"strconv"
	"strings"
	"testing"
	"time"
)

func TestCRC16CheckValue(t *testing.T) {
	// CRC RevEng catalogue, CRC-16/IBM-3740 (alias CRC-16/CCITT-FALSE): check = 0x29B1.
	if got := CRC16([]byte("123456789")); got != 0x29B1 {
		t.Fatalf("CRC16(123456789) = %04X, want 29B1", got)
	}
}

func frameLine(body string) string {
	return body + "*" + hex4(CRC16([]byte(body)))
}

func hex4(v uint16) string {
	const h = "0123456789ABCDEF"
	return string([]byte{h[v>>12], h[v>>8&15], h[v>>4&15], h[v&15]})
}

func TestParseFrame(t *testing.T) {
	cases := []struct {
		name string
		line string
		kind ErrKind
		n    int
	}{
		{"good", frameLine("P1,42,123456,a0=512,a1=2480m,a3=1023"), 0, 3},
		{"negative decimal", frameLine("P1,1,2,t0=-12.5m"), 0, 1},
		{"no readings", frameLine("P1,7,8"), 0, 0},
		{"bad checksum", "P1,42,123456,a0=512*0000", ErrChecksum, 0},
		{"checksum not hex", "P1,42,123456,a0=512*00G0", ErrChecksum, 0},
		{"truncated", "P1,42,123456,a0=5", ErrTruncated, 0},
		{"truncated checksum", "P1,42,123456,a0=512*3F", ErrTruncated, 0},
		{"version 2", frameLine("P2,1,2,a0=1"), ErrVersion, 0},
		{"not a frame", frameLine("hello"), ErrSyntax, 0},
		{"bad seq", frameLine("P1,x,2,a0=1"), ErrNumber, 0},
		{"missing ms", frameLine("P1,1"), ErrTruncated, 0},
		{"bad number", frameLine("P1,1,2,a0=1.2.3"), ErrNumber, 0},
		{"empty value", frameLine("P1,1,2,a0="), ErrNumber, 0},
		{"no equals", frameLine("P1,1,2,a0"), ErrSyntax, 0},
		{"bad key", frameLine("P1,1,2,0a=1"), ErrKey, 0},
		{"long key", frameLine("P1,1,2,abcdefghi=1"), ErrKey, 0},
		{"too long", "P1," + strings.Repeat("9", 600), ErrTooLong, 0},
	}
	var f Frame
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			err := ParseFrame([]byte(c.line), &f)
			if c.kind == 0 {
				if err != nil {
					t.Fatalf("%q: %v", c.line, err)
				}
				if f.N != c.n {
					t.Fatalf("N = %d, want %d", f.N, c.n)
				}
				return
			}
			var pe *ParseError
			if !errors.As(err, &pe) || pe.Kind != c.kind {
				t.Fatalf("%q: err = %v, want %v", c.line, err, c.kind)
			}
			if !strings.Contains(pe.Error(), "at byte") {
				t.Fatalf("error does not name the place: %v", pe)
			}
		})
	}
}

func TestParseFrameValues(t *testing.T) {
	var f Frame
	if err := ParseFrame([]byte(frameLine("P1,42,123456,a0=512,a1=2480m,t0=-12.25m")), &f); err != nil {
		t.Fatal(err)
	}
	if f.Seq != 42 || f.DeviceMS != 123456 || f.N != 3 {
		t.Fatalf("header %+v", f)
	}
	want := []struct {
		key string
		v   float64
		mv  bool
	}{{"a0", 512, false}, {"a1", 2480, true}, {"t0", -12.25, true}}
	for i, w := range want {
		r := f.Readings[i]
		if string(r.KeyBytes()) != w.key || r.Value != w.v || r.MilliVolts != w.mv {
			t.Errorf("reading %d = %s %v %v, want %+v", i, r.KeyBytes(), r.Value, r.MilliVolts, w)
		}
	}
}

func TestAppendFrameRoundTrip(t *testing.T) {
	rs := []Reading{NewReading("a0", 512, false), NewReading("a4", 2499.5, true)}
	line := AppendFrame(nil, 7, 99, rs)
	if line[len(line)-1] != '\n' {
		t.Fatal("no newline")
	}
	var f Frame
	if err := ParseFrame(line[:len(line)-1], &f); err != nil {
		t.Fatalf("%s: %v", line, err)
	}
	if f.Seq != 7 || f.DeviceMS != 99 || f.N != 2 || f.Readings[1].Value != 2499.5 || !f.Readings[1].MilliVolts {
		t.Fatalf("round trip: %+v", f)
	}
}

func TestParseDelimited(t *testing.T) {
	var d [4]float64
	cases := []struct {
		line string
		sep  byte
		n    int
		err  bool
	}{
		{"1,2,3", ',', 3, false},
		{" 1.5 ;  -2 ", ';', 2, false},
		{"10\t20  30\r", ' ', 3, false},
		{"1,,3", ',', 1, true},
		{"1,x,3", ',', 1, true},
		{"1,2,3,4,5", ',', 4, true},
	}
	for _, c := range cases {
		n, err := ParseDelimited([]byte(c.line), c.sep, d[:])
		if n != c.n || (err != nil) != c.err {
			t.Errorf("%q: n=%d err=%v, want n=%d err=%v", c.line, n, err, c.n, c.err)
		}
	}
}

// TestGoldenSession decodes a recorded session of lines (good ones and every
// kind of bad one) and compares the outcome with a golden file.
func TestGoldenSession(t *testing.T) {
	in, err := os.ReadFile("testdata/session.txt")
	if err != nil {
		t.Fatal(err)
	}
	var out strings.Builder
	var f Frame
	for i, line := range strings.Split(strings.TrimRight(string(in), "\n"), "\n") {
		if err := ParseFrame([]byte(line), &f); err != nil {
			out.WriteString(lineNo(i+1) + " error: " + err.Error() + "\n")
			continue
		}
		out.WriteString(lineNo(i+1) + " ok seq=" + itoa(int(f.Seq)) + " ms=" + itoa(int(f.DeviceMS)) + " n=" + itoa(f.N) + "\n")
	}
	golden := "testdata/session.golden"
	if os.Getenv("PLENUM_UPDATE_GOLDEN") == "1" {
		os.WriteFile(golden, []byte(out.String()), 0o644)
	}
	want, err := os.ReadFile(golden)
	if err != nil {
		t.Fatal(err)
	}
	if out.String() != string(want) {
		t.Fatalf("decoded session differs from %s:\n%s", golden, out.String())
	}
}

func lineNo(n int) string { return "line " + strconv.Itoa(n) + ":" }
func itoa(n int) string   { return strconv.Itoa(n) }

func FuzzParseLine(f *testing.F) {
	f.Add([]byte(frameLine("P1,42,123456,a0=512,a1=2480m,a3=1023")))
	f.Add([]byte("P1,42,123456,a0=512*0000"))
	f.Add([]byte("P1,1,2,a0=1.5m*"))
	f.Add([]byte("1,2,3"))
	var sink nullSink
	dec, _ := newTestDecoder(f, &sink)
	now := time.Unix(0, 0)
	f.Fuzz(func(t *testing.T, line []byte) {
		// The whole decode path (parse, clock, calibration) never panics, and
		// every error it returns names a place.
		now = now.Add(10 * time.Millisecond)
		if err := dec.Line(line, now); err != nil && !strings.Contains(err.Error(), "at byte") {
			t.Fatalf("error without a place: %v", err)
		}
		var fr Frame
		err := ParseFrame(line, &fr)
		if err == nil {
			if fr.N < 0 || fr.N > MaxReadings {
				t.Fatalf("N = %d", fr.N)
			}
			// A frame that parses re-encodes to a frame that parses the same.
			again := AppendFrame(nil, fr.Seq, fr.DeviceMS, fr.Readings[:fr.N])
			var fr2 Frame
			if err := ParseFrame(again[:len(again)-1], &fr2); err != nil {
				t.Fatalf("re-encoded %q does not parse: %v", again, err)
			}
			if fr2.N != fr.N || fr2.Seq != fr.Seq {
				t.Fatalf("round trip changed the frame")
			}
		} else {
			var pe *ParseError
			if !errors.As(err, &pe) || pe.Offset < 0 || pe.Offset > len(line) {
				t.Fatalf("bad error %v for %q", err, line)
			}
		}
		var d [8]float64
		ParseDelimited(line, ',', d[:])
	})
}

// parseDecimal against the standard library's correctly rounded
// strconv.ParseFloat: with at most 15 digits (exact in a float64 mantissa)
// and a power of ten up to 1e9 (exact too), one IEEE division is correctly
// rounded, so the two agree bit for bit (Clinger's fast path).
func TestParseDecimalMatchesStrconv(t *testing.T) {
	good := []string{"0", "-0", "+7", "512", "2480.5", "-12.5", ".5", "123456789012345", "0.000000001", "99999.999999999", "101.325"}
	bad := []string{"", "-", "+", ".", "1.", "1.2.3", "1e3", "12a", " 1", "1,5", "1234567890123456", "0.0000000001", "--1", "0x10", "1.5m"}
	for _, s := range good {
		got, ok := parseDecimal([]byte(s))
		want, err := strconv.ParseFloat(s, 64)
		if !ok || err != nil || math.Float64bits(got) != math.Float64bits(want) {
			t.Errorf("parseDecimal(%q) = %v %v, strconv %v %v", s, got, ok, want, err)
		}
	}
	for _, s := range bad {
		if v, ok := parseDecimal([]byte(s)); ok {
			t.Errorf("parseDecimal(%q) accepted: %v", s, v)
		}
	}
}

func FuzzParseDecimal(f *testing.F) {
	for _, s := range []string{"512", "-12.5", ".5", "123456789012345", "1.", "1e3"} {
		f.Add([]byte(s))
	}
	f.Fuzz(func(t *testing.T, b []byte) {
		got, ok := parseDecimal(b)
		if !ok {
			return
		}
		want, err := strconv.ParseFloat(string(b), 64)
		if err != nil || math.Float64bits(got) != math.Float64bits(want) {
			t.Fatalf("parseDecimal(%q) = %v, strconv %v %v", b, got, want, err)
		}
	})
}
