package serial

import (
	"fmt"
	"math"
	"os"
	"strings"
	"testing"
	"time"
)

// TestGoldenDecodedSession runs the recorded session through the decoder
// (MAP on a0, an NTC on a1, a4 unmapped) with lines arriving 10 ms apart
// plus transit jitter, and compares samples, errors and counters with a
// golden file. PLENUM_UPDATE_GOLDEN=1 rewrites it.
func TestGoldenDecodedSession(t *testing.T) {
	in, err := os.ReadFile("testdata/session.txt")
	if err != nil {
		t.Fatal(err)
	}
	var c collect
	d, _ := newTestDecoder(t, &c)
	base := time.Unix(1700000000, 0).UTC()
	var out strings.Builder
	for i, line := range strings.Split(strings.TrimRight(string(in), "\n"), "\n") {
		now := base.Add(time.Duration(i)*10*time.Millisecond + time.Duration(i%3)*2*time.Millisecond)
		before := c.len()
		err := d.Line([]byte(line), now)
		fmt.Fprintf(&out, "line %d:", i+1)
		if err != nil {
			fmt.Fprintf(&out, " error: %v", err)
		}
		out.WriteString("\n")
		for _, s := range c.s[before:] {
			fmt.Fprintf(&out, "  ch=%d q=%s t=+%v v=%.6g\n", s.Channel, s.Quality, s.Time.Sub(base), s.Value)
		}
	}
	fmt.Fprintf(&out, "stats: %+v\n", d.Counters().Snapshot())
	golden := "testdata/session_decoded.golden"
	if os.Getenv("PLENUM_UPDATE_GOLDEN") == "1" {
		if err := os.WriteFile(golden, []byte(out.String()), 0o644); err != nil {
			t.Fatal(err)
		}
	}
	want, err := os.ReadFile(golden)
	if err != nil {
		t.Fatal(err)
	}
	if out.String() != string(want) {
		t.Fatalf("decoded session differs from %s:\n%s", golden, out.String())
	}
}

// BenchmarkParseCalibrateDemo decodes a 15-reading line like the demo
// microcontroller's (11 in millivolts, 4 thermistors in counts).
func BenchmarkParseCalibrateDemo(b *testing.B) {
	var sink nullSink
	h := pipelineHealth()
	var inputs []Input
	var rs []Reading
	for i := 0; i < 15; i++ {
		key := "a" + itoa(i)
		if i%4 == 1 {
			inputs = append(inputs, Input{Key: key, Channel: 1, Sensor: ntcSensor()})
			rs = append(rs, NewReading(key, 300+float64(i), false))
		} else {
			inputs = append(inputs, Input{Key: key, Channel: 0, Sensor: mapSensor()})
			rs = append(rs, NewReading(key, 1000+float64(i*13), true))
		}
	}
	d, err := NewDecoder(Framed, 0, inputs, NewCounters(h))
	if err != nil {
		b.Fatal(err)
	}
	line := AppendFrame(nil, 123456, 987654321, rs)
	line = line[:len(line)-1]
	now := time.Unix(0, 0)
	b.SetBytes(int64(len(line)))
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if err := d.Line(line, now, &sink); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "lines/s")
	if sink.n != 15*b.N {
		b.Fatalf("%d samples for %d lines", sink.n, b.N)
	}
}

// TestProtocolDocExample keeps the example frame in PROTOCOL.md valid.
func TestProtocolDocExample(t *testing.T) {
	doc, err := os.ReadFile("PROTOCOL.md")
	if err != nil {
		t.Fatal(err)
	}
	var found int
	for _, l := range strings.Split(string(doc), "\n") {
		if !strings.HasPrefix(l, "P1,") || strings.Contains(l, "<") {
			continue
		}
		found++
		var f Frame
		if err := ParseFrame([]byte(l), &f); err != nil {
			t.Errorf("PROTOCOL.md example %q: %v", l, err)
		}
		if got := AppendFrame(nil, f.Seq, f.DeviceMS, f.Readings[:f.N]); string(got) != l+"\n" {
			t.Errorf("re-encoded %q, doc has %q", got, l)
		}
	}
	if found == 0 {
		t.Fatal("no example frame in PROTOCOL.md")
	}
}

func TestAppendFrameAwkwardValues(t *testing.T) {
	rs := []Reading{NewReading("a0", 0.1+0.2, true), NewReading("a1", 123456789012.123456, true),
		NewReading("a2", math.NaN(), true), NewReading("a3", 1e300, false), NewReading("a4", -7, true), NewReading("a5", 1023, false)}
	line := AppendFrame(nil, 1, 2, rs)
	var f Frame
	if err := ParseFrame(line[:len(line)-1], &f); err != nil {
		t.Fatalf("%s: %v", line, err)
	}
	want := []struct {
		key string
		v   float64
	}{{"a0", 0.3}, {"a1", 123456789012.123}, {"a4", -7}, {"a5", 1023}}
	if f.N != len(want) {
		t.Fatalf("%s: %d readings, want %d (NaN and 1e300 left out)", line, f.N, len(want))
	}
	for i, w := range want {
		if r := f.Readings[i]; string(r.KeyBytes()) != w.key || math.Abs(r.Value-w.v) > 1e-9*math.Max(1, math.Abs(w.v)) {
			t.Errorf("reading %d = %s=%v, want %s=%v", i, r.KeyBytes(), r.Value, w.key, w.v)
		}
	}
	if n := testing.AllocsPerRun(100, func() { line = AppendFrame(line[:0], 1, 2, rs) }); n != 0 {
		t.Errorf("AppendFrame into a big enough buffer: %v allocs", n)
	}
}
