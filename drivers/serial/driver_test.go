package serial

import (
	"context"
	"errors"
	"log/slog"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/creack/pty"

	"github.com/plenum-engine/plenum/drivers/calib"
	"github.com/plenum-engine/plenum/pipeline"
)

func TestCRC16Table(t *testing.T) {
	for i := 0; i < 256; i++ {
		c := uint16(i) << 8
		for j := 0; j < 8; j++ {
			if c&0x8000 != 0 {
				c = c<<1 ^ 0x1021
			} else {
				c <<= 1
			}
		}
		if crc16Tables[0][i] != c {
			t.Fatalf("table[%d] = %04X, want %04X", i, crc16Tables[0][i], c)
		}
	}
	// The sliced path agrees with the bit-wise definition on every length
	// and alignment.
	bitwise := func(b []byte) uint16 {
		crc := uint16(0xFFFF)
		for _, c := range b {
			crc ^= uint16(c) << 8
			for i := 0; i < 8; i++ {
				if crc&0x8000 != 0 {
					crc = crc<<1 ^ 0x1021
				} else {
					crc <<= 1
				}
			}
		}
		return crc
	}
	msg := []byte(frameLine("P1,42,123456,a0=512,a1=2480m,a3=1023,a4=-12.5m,a5=99999"))
	for i := 0; i < len(msg); i++ {
		for j := i; j <= len(msg); j++ {
			if got, want := CRC16(msg[i:j]), bitwise(msg[i:j]); got != want {
				t.Fatalf("CRC16(%q) = %04X, want %04X", msg[i:j], got, want)
			}
		}
	}
	// CRC RevEng catalogue, CRC-16/IBM-3740 (alias CRC-16/CCITT-FALSE):
	// check 0x29B1; the CRC of the empty string is the initial value 0xFFFF.
	if CRC16(nil) != 0xFFFF || CRC16([]byte("123456789")) != 0x29B1 {
		t.Fatal("check values")
	}
}

func TestErrorsAreTyped(t *testing.T) {
	cases := []struct {
		line string
		kind ErrKind
		off  int
	}{
		{"P1,42,123456,a0=512*0000", ErrChecksum, 19},
		{"P1,42,123456,a0=5", ErrTruncated, 17},
		{frameLine("P3,1,2,a0=1"), ErrVersion, 1},
		{frameLine("P1,1,2,a0=1x"), ErrNumber, 10},
		{frameLine("#!garbage"), ErrSyntax, 0},
	}
	var f Frame
	for _, c := range cases {
		err := ParseFrame([]byte(c.line), &f)
		if !errors.Is(err, c.kind) {
			t.Errorf("%q: %v is not %v", c.line, err, c.kind)
			continue
		}
		var pe *ParseError
		errors.As(err, &pe)
		if pe.Offset != c.off {
			t.Errorf("%q: offset %d, want %d", c.line, pe.Offset, c.off)
		}
		for _, other := range []ErrKind{ErrChecksum, ErrTruncated, ErrVersion, ErrNumber, ErrSyntax} {
			if other != c.kind && errors.Is(err, other) {
				t.Errorf("%q: also matches %v", c.line, other)
			}
		}
	}
	var c collect
	d, _ := newTestDecoder(t, &c)
	line := frameLine("P1,1,2,a0=2000m,zz9=1")
	err := d.Line([]byte(line), time.Unix(1, 0))
	var ue *UnknownFieldError
	if !errors.Is(err, ErrUnknown) || !errors.As(err, &ue) || ue.Offset != strings.Index(line, "zz9") || ue.Field != 4 {
		t.Fatalf("unknown channel: %v (%+v)", err, ue)
	}
	if len(c.s) != 1 {
		t.Fatalf("known reading of the frame not kept: %d samples", len(c.s))
	}
}

func TestSequenceGapsCountDroppedFrames(t *testing.T) {
	var c collect
	d, h := newTestDecoder(t, &c)
	now := time.Unix(10, 0)
	for _, seq := range []uint32{4294967294, 4294967295, 0, 1, 5, 6, 1, 2} { // wrap, 3 lost, reset
		if err := d.Line([]byte(frameLine("P1,"+itoa(int(seq))+",100,a0=2000m")), now); err != nil {
			t.Fatal(err)
		}
	}
	st := d.Counters().Snapshot()
	if st.Frames != 8 || st.SeqGaps != 2 || st.DroppedFrames != 3 {
		t.Fatalf("frames %d gaps %d dropped %d, want 8 2 3", st.Frames, st.SeqGaps, st.DroppedFrames)
	}
	if h.Counter("dropped_frames").Load() != 3 {
		t.Fatal("dropped frames not shared with the health counters")
	}
}

func TestDeviceClockNeverAheadOfHost(t *testing.T) {
	var c collect
	d, _ := newTestDecoder(t, &c)
	host := time.Unix(1000, 0)
	// The first frame was delayed 30 ms in transit; the second only 5 ms.
	d.Line([]byte(frameLine("P1,1,1000,a0=2000m")), host.Add(30*time.Millisecond))
	d.Line([]byte(frameLine("P1,2,1010,a0=2000m")), host.Add(15*time.Millisecond))
	d.Line([]byte(frameLine("P1,3,1020,a0=2000m")), host.Add(40*time.Millisecond))
	want := []time.Time{host.Add(30 * time.Millisecond), host.Add(15 * time.Millisecond), host.Add(25 * time.Millisecond)}
	for i, w := range want {
		if !c.s[i].Time.Equal(w) {
			t.Errorf("sample %d at %v, want %v", i, c.s[i].Time.Sub(host), w.Sub(host))
		}
	}
	if n := d.Counters().Snapshot().Reanchors; n != 0 {
		t.Fatalf("%d re-anchors for jitter", n)
	}
	// A stall longer than MaxClockLag re-anchors and is counted.
	d.Line([]byte(frameLine("P1,4,1030,a0=2000m")), host.Add(2*time.Second))
	if !c.s[3].Time.Equal(host.Add(2*time.Second)) || d.Counters().Snapshot().Reanchors != 1 {
		t.Fatalf("after stall: %v, reanchors %d", c.s[3].Time.Sub(host), d.Counters().Snapshot().Reanchors)
	}
}

// recordHandler keeps log records for assertions.
type recordHandler struct {
	mu   sync.Mutex
	recs []slog.Record
}

func (h *recordHandler) Enabled(context.Context, slog.Level) bool { return true }
func (h *recordHandler) Handle(_ context.Context, r slog.Record) error {
	h.mu.Lock()
	h.recs = append(h.recs, r.Clone())
	h.mu.Unlock()
	return nil
}
func (h *recordHandler) WithAttrs([]slog.Attr) slog.Handler { return h }
func (h *recordHandler) WithGroup(string) slog.Handler      { return h }
func (h *recordHandler) messages() []string {
	h.mu.Lock()
	defer h.mu.Unlock()
	var out []string
	for _, r := range h.recs {
		s := r.Message
		r.Attrs(func(a slog.Attr) bool {
			if a.Key == "repeats" || a.Key == "kind" {
				s += " " + a.Key + "=" + a.Value.String()
			}
			return true
		})
		out = append(out, s)
	}
	return out
}

func TestBurstLogOncePerBurst(t *testing.T) {
	var h recordHandler
	b := burstLog{log: slog.New(&h), every: 10 * time.Second}
	t0 := time.Unix(0, 0)
	for i := 0; i < 5; i++ {
		b.warn(t0.Add(time.Duration(i)*time.Second), "bad checksum", "bad line", errors.New("x"))
	}
	b.warn(t0, "truncated line", "bad line", nil)
	b.flush(t0.Add(9 * time.Second))
	if got := h.messages(); len(got) != 2 {
		t.Fatalf("within the burst: %q", got)
	}
	b.flush(t0.Add(10 * time.Second))
	b.warn(t0.Add(12*time.Second), "bad checksum", "bad line", nil)
	want := []string{"bad line kind=bad checksum", "bad line kind=truncated line",
		"bad line (repeated) kind=bad checksum repeats=4", "bad line kind=bad checksum"}
	if got := h.messages(); strings.Join(got, "|") != strings.Join(want, "|") {
		t.Fatalf("log:\n%q\nwant\n%q", got, want)
	}
}

// fakePort feeds chunks and times out like go.bug.st/serial when idle.
type fakePort struct {
	mu     sync.Mutex
	chunks [][]byte
	closed bool
	fail   bool
}

func (p *fakePort) Read(b []byte) (int, error) {
	p.mu.Lock()
	if p.closed || p.fail {
		p.mu.Unlock()
		return 0, errors.New("port closed")
	}
	if len(p.chunks) > 0 {
		n := copy(b, p.chunks[0])
		p.chunks = p.chunks[1:]
		p.mu.Unlock()
		return n, nil
	}
	p.mu.Unlock()
	time.Sleep(5 * time.Millisecond)
	return 0, nil
}

func (p *fakePort) Close() error {
	p.mu.Lock()
	p.closed = true
	p.mu.Unlock()
	return nil
}

func (p *fakePort) push(s string) {
	p.mu.Lock()
	p.chunks = append(p.chunks, []byte(s))
	p.mu.Unlock()
}

func TestDriverOverlongAndSplitLines(t *testing.T) {
	var c collect
	dec, h := newTestDecoder(t, &c)
	port := &fakePort{}
	var logs recordHandler
	drv := NewDriver(Config{Name: "mcu", Path: filepath.Join(t.TempDir(), "none"), Logger: slog.New(&logs),
		Open: func(string, int) (Port, error) { return port, nil }}, dec.Decoder, h)
	good := frameLine("P1,1,10,a0=2525m") + "\n"
	port.push(good[:7]) // a line split across reads
	port.push(good[7:])
	port.push(strings.Repeat("x", MaxLine+10) + "\n")
	port.push(strings.Repeat("y", 3*MaxLine))
	port.push("\r\n" + frameLine("P1,2,20,a0=2525m") + "\r\n")
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- drv.Run(ctx, &c) }()
	waitFor(t, "two frames", func() bool { return drv.Stats().Frames == 2 })
	st := drv.Stats()
	if st.Overlong != 2 || !st.Up || c.len() != 2 {
		t.Errorf("stats %+v, %d samples", st, c.len())
	}
	cancel()
	if err := <-done; !errors.Is(err, context.Canceled) {
		t.Fatalf("Run = %v", err)
	}
	if drv.Up() {
		t.Fatal("up after Run returned")
	}
	if !port.closed {
		t.Fatal("port left open")
	}
}

func TestDriverDownWhenSilent(t *testing.T) {
	var c collect
	dec, h := newTestDecoder(t, &c)
	port := &fakePort{}
	drv := NewDriver(Config{Name: "mcu", Path: filepath.Join(t.TempDir(), "none"), UpTimeout: 200 * time.Millisecond,
		Open: func(string, int) (Port, error) { return port, nil }}, dec.Decoder, h)
	port.push(frameLine("P1,1,10,a0=2525m") + "\n")
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	go drv.Run(ctx, &c)
	waitFor(t, "up", drv.Up)
	// Garbage keeps bytes flowing but is not a good frame.
	for i := 0; i < 30 && drv.Up(); i++ {
		port.push("garbage\n")
		time.Sleep(20 * time.Millisecond)
	}
	if drv.Up() {
		t.Fatal("still up after 600 ms of garbage")
	}
	if drv.Stats().Malformed == 0 {
		t.Fatal("garbage not counted")
	}
}

// plugPty makes a new pseudo-terminal and points link at its slave.
func plugPty(t *testing.T, link string) *os.File {
	t.Helper()
	master, tty, err := pty.Open()
	if err != nil {
		t.Fatal(err)
	}
	tty.Close()
	tmp := link + ".new"
	os.Remove(tmp)
	if err := os.Symlink(tty.Name(), tmp); err != nil {
		t.Fatal(err)
	}
	if err := os.Rename(tmp, link); err != nil { // atomic repoint
		t.Fatal(err)
	}
	return master
}

// TestPtyDeviceNodeReplaced repoints the path at a new pty while the old one
// stays open but silent (an adapter re-enumerated under the same by-id name).
func TestPtyDeviceNodeReplaced(t *testing.T) {
	link := filepath.Join(t.TempDir(), "mcu")
	var c collect
	dec, h := newTestDecoder(t, &c)
	m1 := plugPty(t, link)
	defer m1.Close()
	drv := NewDriver(Config{Name: "mcu", Path: link, Baud: 115200, MinBackoff: 20 * time.Millisecond, MaxBackoff: 100 * time.Millisecond}, dec.Decoder, h)
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- drv.Run(ctx, &c) }()
	defer func() { cancel(); <-done }()
	seq := uint32(0)
	send := func(m *os.File) {
		seq++
		m.Write(AppendFrame(nil, seq, seq*10, []Reading{NewReading("a0", 2525, true), NewReading("a1", 512, false)}))
	}
	waitFor(t, "samples on the first pty", func() bool { send(m1); return drv.Up() })
	m2 := plugPty(t, link)
	defer m2.Close()
	n := c.len()
	waitFor(t, "samples on the second pty", func() bool { send(m2); return c.len() > n && drv.Stats().Reopens == 1 })
}

// TestPtySamplesAreCalibrated checks values and times end to end through a pty.
func TestPtySamplesAreCalibrated(t *testing.T) {
	link := filepath.Join(t.TempDir(), "mcu")
	var c collect
	h := pipeline.NewHealth("source", "mcu")
	dec, err := NewDecoder(Framed, 0, []Input{{Key: "a0", Channel: 7, Sensor: mapSensor()}, {Key: "a3", Channel: 9,
		Sensor: calib.Sensor{Curve: calib.Linear{MV0: 0, Out0: 0, MV1: 5000, Out1: 1}, ADCMax: 1023, RefMV: 5000}}}, NewCounters(h))
	if err != nil {
		t.Fatal(err)
	}
	m := plugPty(t, link)
	defer m.Close()
	base := time.Unix(5000, 0)
	var mu sync.Mutex
	clock := base
	now := func() time.Time { mu.Lock(); defer mu.Unlock(); return clock }
	drv := NewDriver(Config{Name: "mcu", Path: link, Baud: 57600, Now: now}, dec, h)
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- drv.Run(ctx, &c) }()
	defer func() { cancel(); <-done }()
	m.Write(AppendFrame(nil, 1, 100, []Reading{NewReading("a0", 2525, true), NewReading("a3", 1023, false)}))
	waitFor(t, "two samples", func() bool { return c.len() >= 2 })
	mu.Lock()
	clock = base.Add(50 * time.Millisecond)
	mu.Unlock()
	m.Write(AppendFrame(nil, 2, 120, []Reading{NewReading("a0", 2525, true)}))
	waitFor(t, "third sample", func() bool { return c.len() >= 3 })
	c.mu.Lock()
	defer c.mu.Unlock()
	s := c.s
	if s[0].Channel != 7 || s[0].Value != 160000 || s[1].Channel != 9 || s[1].Value != 1 {
		t.Fatalf("samples %+v", s)
	}
	// Device ms 120 is 20 ms after 100: the third sample is stamped by the
	// device counter, not by the (later) host arrival.
	if !s[0].Time.Equal(base) || !s[2].Time.Equal(base.Add(20*time.Millisecond)) {
		t.Fatalf("times %v %v", s[0].Time.Sub(base), s[2].Time.Sub(base))
	}
}
