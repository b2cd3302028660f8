package serial

import (
	"bufio"
	"bytes"
	"context"
	"fmt"
	"io"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/drivers/calib"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/interop"
)

// The emulated end-to-end test of the reference firmware
// (deploy/firmware): the real image in simavr, driven by the harness in
// deploy/firmware/sim, read through this package's Driver from a
// pseudo-terminal.

const (
	fwAVcc       = 5000 // mV, the harness's AVcc
	fwOversample = 4    // config.h's default
)

// fwTools checks for the AVR toolchain, simavr's library and a C compiler:
// skipped without PLENUM_INTEGRATION=1, failed there if any is missing.
func fwTools(t testing.TB) {
	t.Helper()
	interop.Need(t, "gcc-avr avr-libc binutils-avr libsimavr-dev make gcc", "avr-gcc", "avr-objcopy", "avr-size", "avr-nm", "make", "cc")
	for _, f := range []string{"/usr/include/simavr/sim_avr.h", "/usr/lib/avr/include/avr/io.h"} {
		if _, err := os.Stat(f); err != nil {
			t.Fatalf("PLENUM_INTEGRATION=1 but %s is missing (apt-get install -y libsimavr-dev avr-libc): %v", f, err)
		}
	}
}

// fwBuild builds the firmware into dir with make (overriding config.h's
// settings with defs, e.g. PM_BAUD=1000000UL) and returns the ELF's path
// and avr-size's report.
func fwBuild(t testing.TB, dir string, defs ...string) (elf, size string) {
	t.Helper()
	args := append([]string{"-s", "-C", filepath.Join(firmwareDir, "atmega328p"), "OUT=" + dir}, defs...)
	out, err := exec.Command("make", args...).CombinedOutput()
	if err != nil {
		t.Fatalf("make %v: %v\n%s", args, err, out)
	}
	return filepath.Join(dir, "plenum-mcu.elf"), strings.TrimSpace(string(out))
}

// fwHarness compiles the simavr harness into dir.
func fwHarness(t testing.TB, dir string) string {
	t.Helper()
	bin := filepath.Join(dir, "harness")
	cflags := []string{"-I/usr/include/simavr"}
	if out, err := exec.Command("pkg-config", "--cflags", "simavr").Output(); err == nil {
		cflags = strings.Fields(string(out))
	}
	args := append([]string{"-std=c99", "-O2", "-Wall", "-Wextra", "-Werror"}, cflags...)
	args = append(args, "-o", bin, filepath.Join(firmwareDir, "sim", "harness.c"), "-lsimavr")
	if out, err := exec.Command("cc", args...).CombinedOutput(); err != nil {
		t.Fatalf("cc %v: %v\n%s", args, err, out)
	}
	return bin
}

// fwSymbols gives the harness's -y argument: the SRAM addresses of the
// firmware's counters, from avr-nm.
func fwSymbols(t testing.TB, elf string) string {
	t.Helper()
	out, err := exec.Command("avr-nm", elf).Output()
	if err != nil {
		t.Fatalf("avr-nm %s: %v", elf, err)
	}
	widths := map[string]int{"frames_skipped": 4, "glitches": 2, "bursts_overrun": 2}
	var parts []string
	for _, l := range strings.Split(string(out), "\n") {
		f := strings.Fields(l)
		if len(f) == 3 && widths[f[2]] != 0 {
			parts = append(parts, fmt.Sprintf("%s=%s:%d", f[2], f[0], widths[f[2]]))
			delete(widths, f[2])
		}
	}
	if len(widths) != 0 {
		t.Fatalf("avr-nm %s: no symbol for %v", elf, widths)
	}
	return strings.Join(parts, ",")
}

// harnessDone parses "harness: done k=v k=v ...".
func harnessDone(line string) (map[string]uint64, bool) {
	rest, ok := strings.CutPrefix(line, "harness: done ")
	if !ok {
		return nil, false
	}
	m := map[string]uint64{}
	for _, kv := range strings.Fields(rest) {
		k, v, _ := strings.Cut(kv, "=")
		n, err := strconv.ParseUint(v, 10, 64)
		if err == nil {
			m[k] = n
		}
	}
	return m, true
}

// adcExpectMV is what the firmware sends for an input at mv in simavr:
// simavr converts with code = floor(mv·1023/AVcc); the firmware sums
// fwOversample codes and scales by the data sheet's code = Vin·1024/Vref,
// rounding to the millivolt.
func adcExpectMV(mv int) float64 {
	code := mv * 1023 / fwAVcc
	sum := code * fwOversample
	return float64((sum*fwAVcc + 512*fwOversample) / (1024 * fwOversample))
}

// teePort copies what the driver reads, for the test to parse the frames'
// sequence numbers and device times itself.
type teePort struct {
	Port
	mu  *sync.Mutex
	buf *bytes.Buffer
}

func (p teePort) Read(b []byte) (int, error) {
	n, err := p.Port.Read(b)
	p.mu.Lock()
	p.buf.Write(b[:n])
	p.mu.Unlock()
	return n, err
}

// speedSegment is a stretch of the pulse train at one engine speed.
type speedSegment struct {
	rpm, ms int
}

// TestFirmwareEmulated runs the reference firmware in simavr for 30 s of
// emulated time (3000 frames) with known voltages on A0-A5 and a pulse
// train on ICP1 that starts, speeds up, stops and crawls, with a spike
// every 7th pulse; Plenum's serial driver reads it from the harness's
// pseudo-terminal. It checks every reading against the ADC's quantisation,
// the engine speed against the pulse train, the fault rails, zero bad
// checksums and sequence gaps, and the frame rate in emulated time.
//
// It runs twice: with config.h as it is (115 200 baud, 100 frames/s), and
// at 1 Mbaud and 250 frames/s, the highest rate the default inputs allow.
func TestFirmwareEmulated(t *testing.T) {
	fwTools(t)
	dir := t.TempDir()
	harness := fwHarness(t, dir)
	for _, c := range []struct {
		name string
		baud int
		rate float64
		defs []string
	}{
		{"default", 115200, 100, nil},
		{"1Mbaud_250fps", 1000000, 250, []string{"PM_BAUD=1000000UL", "PM_FRAME_PERIOD_MS=4"}},
	} {
		t.Run(c.name, func(t *testing.T) {
			out := filepath.Join(dir, c.name)
			elf, size := fwBuild(t, out, c.defs...)
			t.Logf("firmware (config.h %v):\n%s", c.defs, size)
			firmwareEmulated(t, harness, elf, c.baud, c.rate)
		})
	}
}

func firmwareEmulated(t *testing.T, harness, elf string, baud int, wantRate float64) {

	// A0 shorted to ground and A5 open with a pull-up to 5 V: the host's
	// fault rails (50 mV, 4950 mV) must flag both; A1-A4 are in range.
	inMV := []int{0, 1234, 2500, 3333, 4321, 5000}
	sched := []speedSegment{{0, 500}, {800, 3000}, {1800, 3000}, {3000, 3000}, {6500, 4000}, {0, 4000},
		{150, 4000}, {300, 2500}, {700, 2000}, {1500, 2000}, {3000, 2500}}
	const totalMS, glitchEvery = 30500, 7
	var spec []string
	for _, s := range sched {
		spec = append(spec, fmt.Sprintf("%d:%d", s.rpm, s.ms))
	}
	var mvArg []string
	for _, v := range inMV {
		mvArg = append(mvArg, strconv.Itoa(v))
	}

	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Minute)
	defer cancel()
	cmd := exec.CommandContext(ctx, harness, "-f", elf, "-m", strings.Join(mvArg, ","), "-s", strings.Join(spec, ","),
		"-p", "1", "-g", strconv.Itoa(glitchEvery), "-t", strconv.Itoa(totalMS), "-y", fwSymbols(t, elf))
	stdin, err := cmd.StdinPipe()
	if err != nil {
		t.Fatal(err)
	}
	stdout, err := cmd.StdoutPipe()
	if err != nil {
		t.Fatal(err)
	}
	cmd.Stderr = os.Stderr
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	// At the end of stdin the harness exits; one stuck writing to a terminal
	// nobody reads any more (a failed test) is killed by the cancel.
	defer func() { stdin.Close(); cancel(); cmd.Wait() }()
	lines := make(chan string, 16)
	go func() {
		sc := bufio.NewScanner(stdout)
		for sc.Scan() {
			if l := sc.Text(); strings.HasPrefix(l, "harness:") {
				lines <- l
			}
		}
		close(lines)
	}()
	var ptyPath string
	select {
	case l := <-lines:
		p, ok := strings.CutPrefix(l, "harness: pty ")
		if !ok {
			t.Fatalf("harness said %q, want its pseudo-terminal", l)
		}
		ptyPath = p
	case <-ctx.Done():
		t.Fatal("no pseudo-terminal from the harness")
	}

	// The driver opens the terminal; once it has, the harness starts, so
	// that no line is cut by a late open.
	var teeMu sync.Mutex
	var raw bytes.Buffer
	opened := make(chan struct{})
	var once sync.Once
	open := func(path string, baud int) (Port, error) {
		p, err := OpenSerial(path, baud)
		if err != nil {
			return nil, err
		}
		once.Do(func() { close(opened) })
		return teePort{Port: p, mu: &teeMu, buf: &raw}, nil
	}
	h := pipeline.NewHealth("source", "fw")
	rail := calib.Sensor{Curve: calib.Linear{MV0: 0, Out0: 0, MV1: 1000, Out1: 1000}, FaultBelowMV: 50, FaultAboveMV: 4950, ADCMax: 1023, RefMV: 5000}
	ident := calib.Sensor{Curve: calib.Linear{MV0: 0, Out0: 0, MV1: 1000, Out1: 1000}, ADCMax: 1023, RefMV: 5000}
	var inputs []Input
	for i := range inMV {
		inputs = append(inputs, Input{Key: "a" + strconv.Itoa(i), Channel: pipeline.ChannelID(i), Sensor: rail})
	}
	const speedCh = pipeline.ChannelID(6)
	inputs = append(inputs, Input{Key: "espd", Channel: speedCh, Sensor: ident})
	dec, err := NewDecoder(Framed, 0, inputs, NewCounters(h))
	if err != nil {
		t.Fatal(err)
	}
	drv := NewDriver(Config{Name: "fw", Path: ptyPath, Baud: baud, Open: open}, dec, h)
	var sink collect
	runCtx, stopDriver := context.WithCancel(ctx)
	driverDone := make(chan error, 1)
	go func() { driverDone <- drv.Run(runCtx, &sink) }()
	select {
	case <-opened:
	case <-ctx.Done():
		t.Fatal("the driver did not open the pseudo-terminal")
	}
	if _, err := io.WriteString(stdin, "go\n"); err != nil {
		t.Fatal(err)
	}
	var done map[string]uint64
	for l := range lines {
		if m, ok := harnessDone(l); ok {
			done = m
			break
		}
		t.Logf("%s", l)
	}
	if done == nil {
		t.Fatal("the harness ended without its counts")
	}
	t.Logf("harness: %v", done)
	// Wait until the driver has taken every complete line the firmware sent.
	for deadline := time.Now().Add(60 * time.Second); ; {
		st := drv.Stats()
		if st.Frames+st.BadChecksum+st.Truncated+st.Malformed >= done["lines"] {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("the driver took %d of %d lines: %+v", st.Frames, done["lines"], st)
		}
		select {
		case <-time.After(20 * time.Millisecond):
		case <-ctx.Done():
			t.Fatal(ctx.Err())
		}
	}
	stopDriver()
	if err := <-driverDone; err != nil && err != context.Canceled {
		t.Errorf("driver: %v", err)
	}
	st := drv.Stats()

	// Counters: every line good, none lost.
	if st.Frames != done["lines"] || st.BadChecksum != 0 || st.Truncated != 0 || st.Malformed != 0 ||
		st.SeqGaps != 0 || st.DroppedFrames != 0 || st.UnknownField != 0 || st.Overlong != 0 {
		t.Errorf("driver counters %+v for %d lines sent", st, done["lines"])
	}
	if done["frames_skipped"] != 0 || done["bursts_overrun"] != 0 {
		t.Errorf("firmware skipped %d frames, overran %d bursts", done["frames_skipped"], done["bursts_overrun"])
	}
	if done["spikes"] == 0 || done["glitches"] != done["spikes"] {
		t.Errorf("the glitch filter ignored %d of %d spikes", done["glitches"], done["spikes"])
	}

	// The frames as the firmware wrote them, in order, one per PutFrame.
	teeMu.Lock()
	text := raw.String()
	teeMu.Unlock()
	var frames []Frame
	for _, l := range strings.Split(text, "\n") {
		var f Frame
		if ParseFrame([]byte(strings.TrimSuffix(l, "\r")), &f) == nil {
			frames = append(frames, f)
		}
	}
	if len(frames) != sink.frames || uint64(len(frames)) != done["lines"] || sink.len() != len(frames)*len(inputs) {
		t.Fatalf("%d frames parsed from the line, %d delivered with %d samples, %d sent", len(frames), sink.frames, sink.len(), done["lines"])
	}
	// Every frame carries every input, so the k-th frame's samples are
	// the k-th run of len(inputs).
	delivered := make([][]pipeline.Sample, len(frames))
	for k := range delivered {
		delivered[k] = sink.s[k*len(inputs) : (k+1)*len(inputs)]
	}
	if len(frames) < int(wantRate*29) {
		t.Fatalf("only %d frames", len(frames))
	}

	// Analog readings: every sample of every frame. The bound against the
	// injected voltage is one LSB of simavr's truncating conversion, the
	// gain difference between its 1023 and the data sheet's 1024 steps
	// (mv/1024, under one LSB) and half a millivolt of rounding; with
	// simavr's noiseless input, oversampling adds nothing here.
	lsb := float64(fwAVcc) / 1024
	for i, mv := range inMV {
		want := adcExpectMV(mv)
		if bound := lsb + float64(mv)/1024 + 0.5; math.Abs(want-float64(mv)) > bound {
			t.Fatalf("a%d: the model gives %v mV for %d mV, beyond the bound %.2f", i, want, mv, bound)
		}
	}
	var faults, good int
	for k, fr := range delivered {
		for j, s := range fr {
			if s.Channel != inputs[j].Channel {
				t.Fatalf("frame %d: sample %d is channel %d, want %d", k, j, s.Channel, inputs[j].Channel)
			}
			if s.Channel == speedCh {
				continue
			}
			mv := inMV[s.Channel]
			if mv < 50 || mv > 4950 {
				if s.Quality != pipeline.SensorFault {
					t.Fatalf("frame %d: a%d at %d mV: quality %v, want a sensor fault", k, s.Channel, mv, s.Quality)
				}
				faults++
				continue
			}
			if s.Quality != pipeline.OK || s.Value != adcExpectMV(mv) {
				t.Fatalf("frame %d: a%d = %v (%v), want %v mV for %d mV injected", k, s.Channel, s.Value, s.Quality, adcExpectMV(mv), mv)
			}
			good++
		}
	}

	// Sequence and frame rate in emulated time.
	for k := 1; k < len(frames); k++ {
		if frames[k].Seq != frames[k-1].Seq+1 {
			t.Fatalf("sequence %d after %d", frames[k].Seq, frames[k-1].Seq)
		}
	}
	first, last := frames[0], frames[len(frames)-1]
	rate := float64(len(frames)-1) / (float64(last.DeviceMS-first.DeviceMS) / 1000)
	if math.Abs(rate-wantRate) > wantRate/200 {
		t.Errorf("frame rate %.3f/s in emulated time, want %v", rate, wantRate)
	}

	// Engine speed against the pulse train. Inside a segment (past the
	// last old period, two new ones and two frames after its start, and a
	// frame before its end)
	// the reading is the scheduled speed within the capture timer's
	// resolution (two 0.5 us ticks of the period) and 0.1 rpm of rounding.
	// After a stop it runs down and is 0 from the timeout (1.5 s) on.
	var checked, zero int
	for k, fr := range delivered {
		var rpm float64
		for _, s := range fr {
			if s.Channel == speedCh {
				rpm = s.Value
			}
		}
		ms := int(frames[k].DeviceMS)
		start := 0
		for i, seg := range sched {
			end := start + seg.ms
			if ms < start || ms >= end {
				start = end
				continue
			}
			if seg.rpm == 0 {
				prev := 0
				if i > 0 {
					prev = sched[i-1].rpm
				}
				if ms >= start+1500+20 || prev == 0 {
					if rpm != 0 {
						t.Errorf("t=%d ms: %v rpm, want 0 (stopped since %d ms)", ms, rpm, start)
					}
					zero++
				} else if rpm > float64(prev)+0.1 {
					t.Errorf("t=%d ms: %v rpm while stopping from %d", ms, rpm, prev)
				}
				break
			}
			// The train changes speed at its first edge after the
			// segment starts: up to one old period late.
			periodUS, prevUS := 60e6/float64(seg.rpm), 0.0
			if i > 0 && sched[i-1].rpm > 0 {
				prevUS = 60e6 / float64(sched[i-1].rpm)
			}
			if ms < start+int((prevUS+2*periodUS)/1000)+20 || ms > end-10 {
				break
			}
			if tol := float64(seg.rpm)*1.0/periodUS + 0.1; math.Abs(rpm-float64(seg.rpm)) > tol {
				t.Errorf("t=%d ms: %v rpm, want %d ± %.2f", ms, rpm, seg.rpm, tol)
			}
			checked++
			break
		}
	}
	if checked < 2000 || zero < 200 {
		t.Errorf("only %d frames checked against the pulse train, %d at standstill", checked, zero)
	}
	cpu := float64(done["cycles"]-done["asleep"]) / float64(done["cycles"])
	t.Logf("%d frames, %d readings in range exact, %d sensor faults flagged, %d speed readings checked, %d at standstill; "+
		"%.2f frames/s emulated; CPU awake %.1f%% of %d cycles; %d spikes ignored by the glitch filter",
		len(frames), good, faults, checked, zero, rate, 100*cpu, done["cycles"], done["glitches"])
}
