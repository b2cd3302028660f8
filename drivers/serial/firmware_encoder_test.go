package serial

import (
	"bufio"
	"bytes"
	"flag"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
)

var update = flag.Bool("update", false, "rewrite the shared golden file of the firmware's encoder test")

// firmwareDir is the reference firmware's source (deploy/firmware).
const firmwareDir = "../../deploy/firmware"

// encoderGolden is shared by this test (which writes it with -update, from
// AppendFrame) and the C encoder's host test (which reproduces it).
var encoderGolden = filepath.Join(firmwareDir, "encoder", "testdata", "lines.golden")

// encCase is a frame as the C encoder takes it: integer values scaled by
// 10^-decimals, in millivolts or counts.
type encCase struct {
	seq, ms uint32
	r       []encReading
}

type encReading struct {
	key      string
	value    int32
	decimals int
	mv       bool
}

func (c encCase) spec() string {
	var b strings.Builder
	fmt.Fprintf(&b, "in %d %d", c.seq, c.ms)
	for _, r := range c.r {
		u := 'c'
		if r.mv {
			u = 'm'
		}
		fmt.Fprintf(&b, " %s:%d:%d:%c", r.key, r.value, r.decimals, u)
	}
	return b.String()
}

func (r encReading) float() float64 { return float64(r.value) / math.Pow10(r.decimals) }

func (c encCase) readings() []Reading {
	rs := make([]Reading, len(c.r))
	for i, r := range c.r {
		rs[i] = NewReading(r.key, r.float(), r.mv)
	}
	return rs
}

func parseSpec(s string) (encCase, error) {
	f := strings.Fields(s)
	if len(f) < 3 || f[0] != "in" {
		return encCase{}, fmt.Errorf("not an in line: %q", s)
	}
	seq, err1 := strconv.ParseUint(f[1], 10, 32)
	ms, err2 := strconv.ParseUint(f[2], 10, 32)
	if err1 != nil || err2 != nil {
		return encCase{}, fmt.Errorf("%q: bad seq or ms", s)
	}
	c := encCase{seq: uint32(seq), ms: uint32(ms)}
	for _, t := range f[3:] {
		p := strings.Split(t, ":")
		if len(p) != 4 {
			return encCase{}, fmt.Errorf("%q: bad reading %q", s, t)
		}
		v, err1 := strconv.ParseInt(p[1], 10, 32)
		d, err2 := strconv.Atoi(p[2])
		if err1 != nil || err2 != nil || (p[3] != "m" && p[3] != "c") {
			return encCase{}, fmt.Errorf("%q: bad reading %q", s, t)
		}
		c.r = append(c.r, encReading{key: p[0], value: int32(v), decimals: d, mv: p[3] == "m"})
	}
	return c, nil
}

// goldenCases are the frames of the shared golden file: the firmware's
// own shape, the protocol's edges and a fixed pseudo-random set.
func goldenCases() []encCase {
	cs := []encCase{
		{seq: 42, ms: 123456, r: []encReading{{"a0", 512, 0, false}, {"a1", 2480, 0, true}, {"a4", 24995, 1, true}}},
		{seq: 0, ms: 0},
		{seq: math.MaxUint32, ms: math.MaxUint32, r: []encReading{{"a", 0, 0, false}}},
		{seq: 7, ms: 70, r: []encReading{{"a0", 0, 3, true}, {"a1", 5, 2, false}, {"a2", -5, 2, true}, {"a3", -120, 1, true}}},
		{seq: 8, ms: 80, r: []encReading{{"abcdefgh", math.MaxInt32, 0, false}, {"z_9", math.MinInt32, 0, true}, {"_", math.MinInt32, 9, false}}},
		{seq: 9, ms: 90, r: []encReading{{"t", 1, 9, true}, {"u", 1230, 3, false}, {"v", 1000000, 6, true}, {"w", 123456789, 9, true}}},
		{seq: 1000, ms: 10000, r: []encReading{{"a0", 1234, 0, true}, {"a1", 4012, 0, true}, {"a2", 812, 0, true},
			{"a3", 2500, 0, true}, {"a4", 0, 0, true}, {"a5", 5000, 0, true}, {"espd", 30000, 1, true}, {"espd", 30005, 1, true}}},
	}
	full := encCase{seq: 1, ms: 2}
	for i := 0; i < MaxReadings; i++ {
		full.r = append(full.r, encReading{key: "k" + strconv.Itoa(i), value: int32(i * 37), decimals: i % 3, mv: i%2 == 0})
	}
	cs = append(cs, full)
	rng := rand.New(rand.NewPCG(14, 328))
	const keyChars = "abcdefghijklmnopqrstuvwxyz_0123456789"
	for len(cs) < 200 {
		c := encCase{seq: rng.Uint32(), ms: rng.Uint32()}
		for n := rng.IntN(12); n > 0; n-- {
			k := []byte{keyChars[rng.IntN(27)]}
			for l := rng.IntN(MaxKeyLen); l > 0; l-- {
				k = append(k, keyChars[rng.IntN(len(keyChars))])
			}
			r := encReading{key: string(k), value: int32(rng.Uint32()), mv: rng.IntN(2) == 0}
			if rng.IntN(2) == 0 {
				r.value %= 5001
			}
			if rng.IntN(3) == 0 {
				r.decimals = rng.IntN(10)
			}
			c.r = append(c.r, r)
		}
		cs = append(cs, c)
	}
	return cs
}

func goldenText(t *testing.T) []byte {
	var b bytes.Buffer
	b.WriteString("# Written by drivers/serial TestFirmwareEncoder -update from serial.AppendFrame;\n")
	b.WriteString("# the C encoder (deploy/firmware/encoder) must reproduce every out line byte for byte.\n")
	b.WriteString("# in <seq> <ms> <key>:<value>:<decimals>:<m|c> ...   (value x 10^-decimals, millivolts or counts)\n")
	for _, c := range goldenCases() {
		line := AppendFrame(nil, c.seq, c.ms, c.readings())
		if len(line)-1 > MaxLine {
			t.Fatalf("golden case %s is %d bytes", c.spec(), len(line)-1)
		}
		b.WriteString(c.spec())
		b.WriteString("\nout ")
		b.Write(line)
	}
	return b.Bytes()
}

// needCC finds the system's C compiler: a skip without it, a failure under
// PLENUM_INTEGRATION=1 (CI), where the firmware's tests must run.
func needCC(t *testing.T) string {
	t.Helper()
	for _, name := range []string{"cc", "gcc"} {
		if p, err := exec.LookPath(name); err == nil {
			return p
		}
	}
	if os.Getenv("PLENUM_INTEGRATION") == "1" {
		t.Fatal("PLENUM_INTEGRATION=1 but no C compiler (cc) is installed: apt-get install -y gcc")
	}
	t.Skip("no C compiler (cc): the firmware encoder's host tests need one")
	return ""
}

// TestFirmwareEncoder checks the firmware's C encoder against Plenum's own
// encoder and decoder: it compiles the C host tests with the system's
// compiler (strict C99), which reproduce every line of the shared golden
// file (written here from AppendFrame) byte for byte and write lines of
// their own, which ParseFrame must accept with the same values and which
// AppendFrame must write the same way again.
func TestFirmwareEncoder(t *testing.T) {
	want := goldenText(t)
	if *update {
		if err := os.WriteFile(encoderGolden, want, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	have, err := os.ReadFile(encoderGolden)
	if err != nil {
		t.Fatalf("%v (write it with go test ./drivers/serial -run TestFirmwareEncoder -update)", err)
	}
	if !bytes.Equal(have, want) {
		t.Fatalf("%s is not what AppendFrame writes now; rewrite it with -update and check the C encoder still agrees", encoderGolden)
	}
	cc := needCC(t)
	dir := t.TempDir()
	bin := filepath.Join(dir, "test_plenum_line")
	src := filepath.Join(firmwareDir, "encoder")
	build := exec.Command(cc, "-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic", "-O2", "-o", bin,
		filepath.Join(src, "test_plenum_line.c"), filepath.Join(src, "plenum_line.c"))
	if out, err := build.CombinedOutput(); err != nil {
		t.Fatalf("%v: %v\n%s", build.Args, err, out)
	}
	cLines := filepath.Join(dir, "c_lines.txt")
	run := exec.Command(bin, encoderGolden, cLines)
	out, err := run.CombinedOutput()
	t.Logf("C host tests:\n%s", out)
	if err != nil {
		t.Fatalf("C encoder tests: %v", err)
	}

	f, err := os.Open(cLines)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	sc := bufio.NewScanner(f)
	sc.Buffer(make([]byte, 4096), 4096)
	var n int
	var spec string
	for sc.Scan() {
		l := sc.Text()
		switch {
		case strings.HasPrefix(l, "#"):
		case strings.HasPrefix(l, "in "):
			spec = l
		case strings.HasPrefix(l, "out "):
			n++
			c, err := parseSpec(spec)
			if err != nil {
				t.Fatal(err)
			}
			line := []byte(strings.TrimPrefix(l, "out "))
			var fr Frame
			if err := ParseFrame(line, &fr); err != nil {
				t.Errorf("C line %s: %v", line, err)
				continue
			}
			if fr.Seq != c.seq || fr.DeviceMS != c.ms || fr.N != len(c.r) {
				t.Errorf("C line %s: seq %d ms %d, %d readings; want %s", line, fr.Seq, fr.DeviceMS, fr.N, spec)
				continue
			}
			for i, r := range c.r {
				got := fr.Readings[i]
				if string(got.KeyBytes()) != r.key || got.MilliVolts != r.mv || got.Value != r.float() {
					t.Errorf("C line %s: reading %d = %s=%v (mV %v), want %s=%v (mV %v)", line, i, got.KeyBytes(), got.Value, got.MilliVolts, r.key, r.float(), r.mv)
				}
			}
			if again := AppendFrame(nil, c.seq, c.ms, c.readings()); string(again) != string(line)+"\n" {
				t.Errorf("Go writes %q, C wrote %q", again, line)
			}
		default:
			t.Fatalf("unexpected line in the C output: %q", l)
		}
	}
	if err := sc.Err(); err != nil {
		t.Fatal(err)
	}
	if n < 100 {
		t.Fatalf("only %d C-encoded lines checked", n)
	}
	t.Logf("%d Go-encoded lines reproduced by C, %d C-encoded lines decoded", len(goldenCases()), n)
}

// TestFirmwareReadmeExample keeps the example frame in the firmware's
// README valid: Plenum's decoder takes it, and the C encoder's Go twin
// (AppendFrame) writes it the same way.
func TestFirmwareReadmeExample(t *testing.T) {
	doc, err := os.ReadFile(filepath.Join(firmwareDir, "README.md"))
	if err != nil {
		t.Fatal(err)
	}
	var found int
	for _, l := range strings.Split(string(doc), "\n") {
		if !strings.HasPrefix(l, "P1,") {
			continue
		}
		found++
		var f Frame
		if err := ParseFrame([]byte(l), &f); err != nil {
			t.Errorf("README example %q: %v", l, err)
			continue
		}
		if got := AppendFrame(nil, f.Seq, f.DeviceMS, f.Readings[:f.N]); string(got) != l+"\n" {
			t.Errorf("re-encoded %q, README has %q", got, l)
		}
	}
	if found == 0 {
		t.Fatal("no example frame in the firmware README")
	}
}
