package serial

import (
	"errors"
	"math"
	"os"
	"path/filepath"
	"sync"
	"testing"
	"time"

	"github.com/creack/pty"

	"github.com/plenum-engine/plenum/drivers/calib"
	"github.com/plenum-engine/plenum/pipeline"
)

type collect struct {
	mu     sync.Mutex
	s      []pipeline.Sample
	frames int // PutFrame calls
}

func (c *collect) PutFrame(ss []pipeline.Sample) bool {
	c.mu.Lock()
	c.s = append(c.s, ss...)
	c.frames++
	c.mu.Unlock()
	return true
}

func (c *collect) len() int {
	c.mu.Lock()
	defer c.mu.Unlock()
	return len(c.s)
}

func mapSensor() calib.Sensor {
	return calib.Sensor{Curve: calib.Linear{MV0: 400, Out0: 20000, MV1: 4650, Out1: 300000},
		FaultBelowMV: 100, FaultAboveMV: 4900, Min: 20000, Max: 250000, ADCMax: 1023, RefMV: 5000}
}

// testDecoder is a Decoder bound to one sink, as the driver binds it.
type testDecoder struct {
	*Decoder
	sink Sink
}

func (d testDecoder) Line(line []byte, now time.Time) error { return d.Decoder.Line(line, now, d.sink) }

func newTestDecoder(t testing.TB, sink Sink) (testDecoder, *pipeline.Health) {
	h := pipeline.NewHealth("source", "mcu")
	d, err := NewDecoder(Framed, 0, []Input{
		{Key: "a0", Channel: 0, Sensor: mapSensor()},
		{Key: "a1", Channel: 1, Sensor: calib.Sensor{Curve: calib.NTCBeta{Divider: calib.Divider{PullupOhm: 2490, RefMV: 5000}, R0Ohm: 2500, T0C: 25, Beta: 3950}, ADCMax: 1023, RefMV: 5000}},
	}, NewCounters(h))
	if err != nil {
		t.Fatal(err)
	}
	return testDecoder{d, sink}, h
}

func count(h *pipeline.Health, name string) uint64 { return h.Counter(name).Load() }

func TestDecoderBadInputIsCountedNotFatal(t *testing.T) {
	var c collect
	d, h := newTestDecoder(t, &c)
	now := time.Unix(100, 0)
	lines := []string{
		frameLine("P1,1,1000,a0=2525m,a1=512"), // good: 160 kPa; NTC at mid-scale
		"P1,2,1010,a0=2525m*0000",              // bad checksum
		"P1,3,1020,a0=25",                      // truncated
		frameLine("P1,4,1030,a0=2525m,zz=3"),   // unknown field: a0 kept
		frameLine("P1,5,1040,a0=4800m"),        // out of range (> 250 kPa)
		frameLine("P1,6,1050,a0=50m"),          // open circuit: sensor fault
		frameLine("P1,9,1060,a0=2525m"),        // sequence gap
	}
	var errs int
	for _, l := range lines {
		if err := d.Line([]byte(l), now); err != nil {
			errs++
		}
		now = now.Add(10 * time.Millisecond)
	}
	if errs != 3 {
		t.Errorf("%d lines reported errors, want 3 (checksum, truncated, unknown field)", errs)
	}
	for name, want := range map[string]uint64{"frames": 5, "bad_checksums": 1, "truncated_lines": 1, "unknown_fields": 1,
		"out_of_range_readings": 1, "sensor_faults": 1, "sequence_gaps": 2} {
		if got := count(h, name); got != want {
			t.Errorf("%s = %d, want %d", name, got, want)
		}
	}
	if len(c.s) != 6 {
		t.Fatalf("%d samples, want 6", len(c.s))
	}
	if v := c.s[0].Value; math.Abs(v-160000) > 1e-6 || c.s[0].Quality != pipeline.OK {
		t.Errorf("MAP = %v %v, want 160000 Pa ok", v, c.s[0].Quality)
	}
	// 512 of 1023 counts is 2502.4 mV: R = 2490·2502.4/2497.6 = 2494.8 Ω, just
	// under R0 = 2500 Ω, so a little above 25 °C (Beta equation, derived).
	if v := c.s[1].Value; v < 25 || v > 25.2 {
		t.Errorf("IAT = %v °C, want just above 25", v)
	}
	if c.s[3].Quality != pipeline.OutOfRange || c.s[4].Quality != pipeline.SensorFault {
		t.Errorf("qualities %v %v", c.s[3].Quality, c.s[4].Quality)
	}
	var ue *UnknownFieldError
	if err := d.Line([]byte(frameLine("P1,10,1070,qq=1")), now); !errors.As(err, &ue) || ue.Key != "qq" {
		t.Errorf("unknown field error = %v", err)
	}
}

func TestDeviceClockMapping(t *testing.T) {
	var c collect
	d, _ := newTestDecoder(t, &c)
	host := time.Unix(1000, 0)
	d.Line([]byte(frameLine("P1,1,5000,a0=2000m")), host)
	// The next frame arrives 30 ms late on the host but was taken 10 ms after
	// the first by the device: its time follows the device counter.
	d.Line([]byte(frameLine("P1,2,5010,a0=2000m")), host.Add(40*time.Millisecond))
	if got := c.s[1].Time.Sub(c.s[0].Time); got != 10*time.Millisecond {
		t.Fatalf("device spacing %v, want 10ms", got)
	}
	// A device reset (counter back to 0) re-anchors on the host clock.
	d.Line([]byte(frameLine("P1,1,0,a0=2000m")), host.Add(time.Second))
	if got := c.s[2].Time; !got.Equal(host.Add(time.Second)) {
		t.Fatalf("after reset time %v, want host time", got)
	}
}

func TestDelimitedDecoder(t *testing.T) {
	var c collect
	h := pipeline.NewHealth("source", "sketch")
	d, err := NewDecoder(Delimited, ',', []Input{{Column: 2, Channel: 5, Sensor: mapSensor()}}, NewCounters(h))
	if err != nil {
		t.Fatal(err)
	}
	if err := d.Line([]byte("17,2525,99\r"), time.Unix(1, 0), &c); err != nil {
		t.Fatal(err)
	}
	if len(c.s) != 1 || c.s[0].Channel != 5 || math.Abs(c.s[0].Value-160000) > 1e-6 {
		t.Fatalf("samples %+v", c.s)
	}
	if err := d.Line([]byte("17,abc"), time.Unix(1, 0), &c); err == nil || count(h, "malformed_lines") != 1 {
		t.Fatalf("bad delimited line: err %v, counted %d", err, count(h, "malformed_lines"))
	}
}

// TestPtyDriverSurvivesVanishingDevice runs the real driver on a real
// pseudo-terminal, pulls the "cable" (closes the pty) and plugs a new one in
// at the same path.
func TestPtyDriverSurvivesVanishingDevice(t *testing.T) {
	dir := t.TempDir()
	link := filepath.Join(dir, "mcu")
	var c collect
	dec, h := newTestDecoder(t, &c)
	plug := func() *os.File {
		master, tty, err := pty.Open()
		if err != nil {
			t.Fatal(err)
		}
		tty.Close() // the driver opens the slave by path
		os.Remove(link)
		if err := os.Symlink(tty.Name(), link); err != nil {
			t.Fatal(err)
		}
		return master
	}
	master := plug()
	drv := NewDriver(Config{Name: "mcu", Path: link, Baud: 115200, MinBackoff: 20 * time.Millisecond, MaxBackoff: 100 * time.Millisecond}, dec.Decoder, h)
	ctx, cancel := contextWithCancel()
	done := make(chan error, 1)
	go func() { done <- drv.Run(ctx, &c) }()
	defer func() { cancel(); <-done }()

	write := func(m *os.File, seq uint32) {
		m.Write(AppendFrame(nil, seq, seq*10, []Reading{NewReading("a0", 2525, true)}))
	}
	waitFor(t, "first samples", func() bool { write(master, 1); return c.len() > 0 && drv.Up() })
	// Pull the cable.
	os.Remove(link)
	master.Close()
	start := time.Now()
	waitFor(t, "source down", func() bool { return !drv.Up() })
	if d := time.Since(start); d > time.Second {
		t.Errorf("vanished device noticed after %v, want within 1 s", d)
	}
	// Plug it back in.
	n := c.len()
	master = plug()
	defer master.Close()
	waitFor(t, "samples after reopen", func() bool { write(master, 2); return c.len() > n && drv.Up() })
	st := drv.Stats()
	if st.Reopens < 1 || !st.Up {
		t.Errorf("stats after reopen %+v", st)
	}
	if count(h, "reopens") != st.Reopens {
		t.Errorf("health reopens %d, stats %d", count(h, "reopens"), st.Reopens)
	}
}

func waitFor(t *testing.T, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(5 * time.Second)
	for time.Now().Before(deadline) {
		if cond() {
			return
		}
		time.Sleep(20 * time.Millisecond)
	}
	t.Fatalf("timed out waiting for %s", what)
}

func TestMissingDeviceAtStartIsRetried(t *testing.T) {
	var c collect
	dec, h := newTestDecoder(t, &c)
	drv := NewDriver(Config{Name: "mcu", Path: filepath.Join(t.TempDir(), "absent"), MinBackoff: 10 * time.Millisecond, MaxBackoff: 20 * time.Millisecond}, dec.Decoder, h)
	ctx, cancel := contextWithTimeout(200 * time.Millisecond)
	defer cancel()
	if err := drv.Run(ctx, &c); err == nil || h.Up() {
		t.Fatalf("Run = %v, up %v: want the context's error and down", err, h.Up())
	}
}

type nullSink struct{ n int }

func (s *nullSink) PutFrame(ss []pipeline.Sample) bool { s.n += len(ss); return true }

func BenchmarkParseCalibrate(b *testing.B) {
	// The example line of PROTOCOL.md: a0 in counts (MAP), a1 in mV (MAP),
	// a3 in counts (NTC, Beta: one logarithm).
	var sink nullSink
	d, err := NewDecoder(Framed, 0, []Input{{Key: "a0", Sensor: mapSensor()}, {Key: "a1", Channel: 1, Sensor: mapSensor()},
		{Key: "a3", Channel: 2, Sensor: ntcSensor()}}, NewCounters(pipelineHealth()))
	if err != nil {
		b.Fatal(err)
	}
	line := []byte(frameLine("P1,42,123456,a0=512,a1=2480m,a3=700"))
	now := time.Unix(0, 0)
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if err := d.Line(line, now, &sink); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "lines/s")
}

func pipelineHealth() *pipeline.Health { return pipeline.NewHealth("source", "bench") }

func ntcSensor() calib.Sensor {
	return calib.Sensor{Curve: calib.NTCBeta{Divider: calib.Divider{PullupOhm: 2490, RefMV: 5000}, R0Ohm: 2500, T0C: 25, Beta: 3950},
		FaultBelowMV: 20, FaultAboveMV: 4980, Min: -40, Max: 150, ADCMax: 1023, RefMV: 5000}
}

func TestDelimitedColumnsInCounts(t *testing.T) {
	var c collect
	h := pipeline.NewHealth("source", "sketch")
	d, err := NewDecoder(Delimited, '\t', []Input{{Column: 1, Channel: 1, Sensor: mapSensor()},
		{Column: 3, Channel: 2, Counts: true, Sensor: ntcSensor()}}, NewCounters(h))
	if err != nil {
		t.Fatal(err)
	}
	if err := d.Line([]byte("2525\t9\t511.5"), time.Unix(1, 0), &c); err != nil {
		t.Fatal(err)
	}
	// 511.5 of 1023 counts is mid-scale: R = Rpu = 2490 Ω, a little under
	// R0 = 2500 Ω, so just above 25 °C (Beta equation, derived).
	if len(c.s) != 2 || math.Abs(c.s[0].Value-160000) > 1e-6 || c.s[1].Value < 25 || c.s[1].Value > 25.2 {
		t.Fatalf("samples %+v", c.s)
	}
}

// The counts table of a thermistor input gives, for every count of the
// converter, bit for bit what calibrating that count directly gives,
// faults and out-of-range flags included; a count that is not a whole
// number still goes through the curve.
func TestCountTableIsExact(t *testing.T) {
	s := ntcSensor()
	in := Input{Key: "a1", Channel: 1, Sensor: s}
	tab := countTable(in)
	if len(tab) != 1024 {
		t.Fatalf("table of %d entries, want 1024", len(tab))
	}
	if countTable(Input{Key: "a0", Sensor: mapSensor()}) != nil {
		t.Error("a linear input got a table")
	}
	var c collect
	d, err := NewDecoder(Framed, 0, []Input{in}, NewCounters(pipeline.NewHealth("source", "x")))
	if err != nil {
		t.Fatal(err)
	}
	now := time.Unix(100, 0)
	for n := 0; n <= 1023; n++ {
		d.emit(0, float64(n), false, now)
	}
	d.emit(0, 511.5, false, now)
	c.PutFrame(d.out)
	if len(c.s) != 1025 {
		t.Fatalf("%d samples", len(c.s))
	}
	for n, got := range c.s {
		counts := float64(n)
		if n == 1024 {
			counts = 511.5
		}
		v, q := s.Apply(s.CountsToMV(counts))
		if got.Quality != q || math.Float64bits(got.Value) != math.Float64bits(v) && !(math.IsNaN(v) && math.IsNaN(got.Value)) {
			t.Fatalf("count %g: %v %v, direct %v %v", counts, got.Value, got.Quality, v, q)
		}
	}
}

// Each line reaches the sink as one frame holding all its readings at one
// time, even when the line also carries a field no input maps.
func TestLineIsOneFrame(t *testing.T) {
	var c collect
	d, _ := newTestDecoder(t, &c)
	now := time.Unix(100, 0)
	d.Line([]byte(frameLine("P1,1,1000,a0=2525m,a1=512")), now)
	d.Line([]byte(frameLine("P1,2,1010,a0=2525m,zz=1,a1=512")), now.Add(10*time.Millisecond))
	if c.frames != 2 || len(c.s) != 4 {
		t.Fatalf("%d frames, %d samples; want 2 frames of 2", c.frames, len(c.s))
	}
	for i := 0; i < 4; i += 2 {
		if !c.s[i].Time.Equal(c.s[i+1].Time) {
			t.Errorf("frame %d: readings at %v and %v", i/2, c.s[i].Time, c.s[i+1].Time)
		}
	}
}

// Lines read in one burst (one Read, so one host time) are stamped at
// distinct, increasing times, for framed lines whose device clock runs ahead
// of the mapping and for delimited lines, which carry no clock.
func TestBurstLinesGetDistinctTimes(t *testing.T) {
	var c collect
	d, _ := newTestDecoder(t, &c)
	now := time.Unix(100, 0)
	d.Line([]byte(frameLine("P1,1,1000,a0=2525m")), now)
	later := now.Add(2 * time.Second) // a stall: three lines arrive in one read
	for seq, ms := range []string{"3010", "3020", "3030"} {
		d.Line([]byte(frameLine("P1,"+itoa(seq+2)+","+ms+",a0=2525m")), later)
	}
	h := pipeline.NewHealth("source", "sketch")
	dl, err := NewDecoder(Delimited, ',', []Input{{Column: 1, Channel: 5, Sensor: mapSensor()}}, NewCounters(h))
	if err != nil {
		t.Fatal(err)
	}
	for range 3 {
		dl.Line([]byte("2525"), later, &c)
	}
	if len(c.s) != 7 {
		t.Fatalf("%d samples, want 7", len(c.s))
	}
	for i := 1; i < 4; i++ {
		if !c.s[i].Time.After(c.s[i-1].Time) || c.s[i].Time.After(later.Add(time.Millisecond)) {
			t.Errorf("framed line %d at %v after %v (read at %v)", i, c.s[i].Time, c.s[i-1].Time, later)
		}
	}
	for i := 5; i < 7; i++ {
		if !c.s[i].Time.After(c.s[i-1].Time) {
			t.Errorf("delimited line %d at %v, not after %v", i, c.s[i].Time, c.s[i-1].Time)
		}
	}
}
