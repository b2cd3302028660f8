package record

import (
	"bufio"
	"bytes"
	"encoding/json"
	"fmt"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/influxdata/line-protocol/v2/lineprotocol"

	"github.com/plenum-engine/plenum/pipeline"
)

func testRegistry(t testing.TB) *pipeline.Registry {
	reg := pipeline.NewRegistry()
	for _, n := range []string{"manifold_pressure", "engine_speed"} {
		c, _ := pipeline.Standard(n)
		c.Source = "bench_mcu"
		if _, err := reg.Register(c); err != nil {
			t.Fatal(err)
		}
	}
	return reg
}

// countPoints parses every .lp file of a run with the line-protocol decoder
// and returns the number of points and the highest "value" seen.
func countPoints(t *testing.T, dir string) (int, float64) {
	t.Helper()
	files, _ := filepath.Glob(filepath.Join(dir, "*.lp"))
	n, maxV := 0, -1.0
	for _, f := range files {
		b, err := os.ReadFile(f)
		if err != nil {
			t.Fatal(err)
		}
		if len(b) > 0 && b[len(b)-1] != '\n' {
			t.Fatalf("%s ends in a torn line", f)
		}
		dec := lineprotocol.NewDecoderWithBytes(b)
		for dec.Next() {
			if _, err := dec.Measurement(); err != nil {
				t.Fatalf("%s point %d: %v", f, n, err)
			}
			for {
				k, _, err := dec.NextTag()
				if err != nil {
					t.Fatal(err)
				}
				if k == nil {
					break
				}
			}
			for {
				k, v, err := dec.NextField()
				if err != nil {
					t.Fatalf("%s point %d: %v", f, n, err)
				}
				if k == nil {
					break
				}
				if string(k) == "value" {
					maxV = max(maxV, v.FloatV())
				}
			}
			if _, err := dec.Time(lineprotocol.Nanosecond, time.Time{}); err != nil {
				t.Fatal(err)
			}
			n++
		}
	}
	return n, maxV
}

func TestLayoutAndNormalClose(t *testing.T) {
	dir := t.TempDir()
	reg := testRegistry(t)
	r, err := Open(Config{Dir: dir, Run: "run-1", Vehicle: "brackenfell-rs"}, reg)
	if err != nil {
		t.Fatal(err)
	}
	t0 := time.Unix(1764626400, 123456789)
	r.Write(pipeline.Sample{Channel: 0, Value: 101325, Time: t0})
	r.WriteEvent(pipeline.Event{Kind: "warning_raised", Name: "lean_under_boost", Start: t0, End: t0.Add(300 * time.Millisecond), Fields: map[string]float64{"active": 1}})
	if err := r.Close(); err != nil {
		t.Fatal(err)
	}
	b, _ := os.ReadFile(filepath.Join(dir, "run-1", "0001.lp"))
	want := `plenum,channel=manifold_pressure,run=run-1,source=bench_mcu,vehicle=brackenfell-rs value=101325,quality="ok" 1764626400123456789
plenum_event,kind=warning_raised,name=lean_under_boost,run=run-1,vehicle=brackenfell-rs active=1,duration_seconds=0.3 1764626400123456789
`
	if string(b) != want {
		t.Fatalf("file:\n%s\nwant:\n%s", b, want)
	}
	if !exists(filepath.Join(dir, "run-1", "ended")) {
		t.Fatal("no ended marker")
	}
	if _, err := Open(Config{Dir: dir, Run: "run-1"}, reg); err == nil {
		t.Fatal("reopened an earlier run for writing")
	}
	if rec, err := Recover(dir); err != nil || len(rec) != 0 {
		t.Fatalf("Recover touched a normally ended run: %v %v", rec, err)
	}
}

func TestCutTornTail(t *testing.T) {
	cases := []struct{ in, want string }{
		{"a 1\nb 2\nc", "a 1\nb 2\n"},
		{"a 1\n", "a 1\n"},
		{"torn", ""},
		{"", ""},
	}
	for _, c := range cases {
		p := filepath.Join(t.TempDir(), "x.lp")
		os.WriteFile(p, []byte(c.in), 0o644)
		cut, err := CutTornTail(p)
		got, _ := os.ReadFile(p)
		if err != nil || string(got) != c.want || cut != int64(len(c.in)-len(c.want)) {
			t.Errorf("%q → %q (cut %d, %v), want %q", c.in, got, cut, err, c.want)
		}
	}
}

func FuzzCutTornTail(f *testing.F) {
	for _, s := range []string{"a 1\nb", "\n\n", "x", strings.Repeat("y", 5000) + "\n" + strings.Repeat("z", 5000)} {
		f.Add([]byte(s))
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		p := filepath.Join(t.TempDir(), "x.lp")
		os.WriteFile(p, data, 0o644)
		if _, err := CutTornTail(p); err != nil {
			t.Fatal(err)
		}
		got, _ := os.ReadFile(p)
		i := bytes.LastIndexByte(data, '\n')
		if !bytes.Equal(got, data[:i+1]) {
			t.Fatalf("kept %q of %q", got, data)
		}
	})
}

// TestChildRecorder is the process that TestSIGKILL kills. It records an
// increasing value, printing after each sync how many values are durable.
func TestChildRecorder(t *testing.T) {
	dir := os.Getenv("PLENUM_RECORD_CHILD_DIR")
	if dir == "" {
		t.Skip("helper process for TestSIGKILLLosesOnlyTheSyncWindow")
	}
	r, err := Open(Config{Dir: dir, Run: "crashed", Vehicle: "v", SyncEvery: 20 * time.Millisecond}, testRegistry(t))
	if err != nil {
		t.Fatal(err)
	}
	t0 := time.Now()
	for i := 1; ; i++ {
		r.Write(pipeline.Sample{Channel: 0, Value: float64(i), Time: t0.Add(time.Duration(i) * time.Microsecond)})
		if i%500 == 0 {
			if err := r.Sync(); err != nil {
				t.Fatal(err)
			}
			fmt.Printf("synced %d\n", i)
		}
	}
}

func TestSIGKILLLosesOnlyTheSyncWindow(t *testing.T) {
	dir := t.TempDir()
	reg := testRegistry(t)
	// A previous run that ended normally: its files must stay byte-identical.
	prev, err := Open(Config{Dir: dir, Run: "previous", Vehicle: "v"}, reg)
	if err != nil {
		t.Fatal(err)
	}
	for i := 0; i < 1000; i++ {
		prev.Write(pipeline.Sample{Channel: 1, Value: float64(i), Time: time.Unix(0, int64(i))})
	}
	if err := prev.Close(); err != nil {
		t.Fatal(err)
	}
	before, _ := os.ReadFile(filepath.Join(dir, "previous", "0001.lp"))

	cmd := exec.Command(os.Args[0], "-test.run", "^TestChildRecorder$", "-test.v")
	cmd.Env = append(os.Environ(), "PLENUM_RECORD_CHILD_DIR="+dir)
	out, err := cmd.StdoutPipe()
	if err != nil {
		t.Fatal(err)
	}
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	sc := bufio.NewScanner(out)
	synced := 0
	for sc.Scan() {
		if n, ok := strings.CutPrefix(sc.Text(), "synced "); ok {
			synced, _ = strconv.Atoi(n)
			if synced >= 20000 {
				break
			}
		}
	}
	cmd.Process.Signal(syscall.SIGKILL)
	cmd.Wait()
	if synced < 20000 {
		t.Fatalf("child synced only %d values", synced)
	}
	rec, err := Recover(dir)
	if err != nil {
		t.Fatal(err)
	}
	if len(rec) != 1 || rec[0].Run != "crashed" || !rec[0].Marked {
		t.Fatalf("Recover = %+v, want the crashed run marked", rec)
	}
	n, maxV := countPoints(t, filepath.Join(dir, "crashed"))
	if n < synced || maxV < float64(synced) {
		t.Fatalf("after SIGKILL %d points (max value %v) survive, but %d were synced", n, maxV, synced)
	}
	if n != int(maxV) {
		t.Fatalf("%d points but values up to %v: a gap", n, maxV)
	}
	after, _ := os.ReadFile(filepath.Join(dir, "previous", "0001.lp"))
	if !bytes.Equal(before, after) {
		t.Fatal("the previous run's file changed")
	}
	if exists(filepath.Join(dir, "previous", "ended_abnormally")) {
		t.Fatal("the normally ended run was marked abnormal")
	}
}

func BenchmarkRecorder(b *testing.B) {
	dir := b.TempDir()
	r, err := Open(Config{Dir: dir, Run: "bench", Vehicle: "v"}, testRegistry(b))
	if err != nil {
		b.Fatal(err)
	}
	t0 := time.Unix(0, 0)
	sync := time.Now()
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		r.Write(pipeline.Sample{Channel: pipeline.ChannelID(i & 1), Value: float64(i), Time: t0.Add(time.Duration(i))})
		if i&1023 == 0 && time.Since(sync) >= 200*time.Millisecond {
			if err := r.Sync(); err != nil {
				b.Fatal(err)
			}
			sync = time.Now()
		}
	}
	if err := r.Close(); err != nil {
		b.Fatal(err)
	}
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "points/s")
}

func TestSummary(t *testing.T) {
	dir := t.TempDir()
	reg := pipeline.NewRegistry()
	ids := map[string]pipeline.ChannelID{}
	for _, n := range []string{"engine_speed", "dyno_torque", "corrected_power", "boost_pressure", "lambda", "intake_air_temp", "baro_pressure"} {
		id, _ := reg.Register(pipeline.Channel{Name: n, Quantity: n, Source: "s"})
		ids[n] = id
	}
	tc := 21.5
	r, err := Open(Config{Dir: dir, Run: "pull", Vehicle: "v", Conditions: Conditions{TemperatureC: &tc, Source: "entered"}}, reg)
	if err != nil {
		t.Fatal(err)
	}
	t0 := time.Unix(100, 0)
	put := func(n string, v float64, dt time.Duration) {
		r.Write(pipeline.Sample{Channel: ids[n], Value: v, Time: t0.Add(dt)})
	}
	put("engine_speed", 3000, 0)
	put("dyno_torque", 200, 0)
	put("corrected_power", 62832, 0) // 2π·50 rev/s·200 N·m (Heywood eq. 2.2)
	put("boost_pressure", 5000, 0)
	put("lambda", 1.0, 0) // off boost: not "under load"
	put("boost_pressure", 110000, time.Second)
	put("lambda", 0.79, time.Second)
	put("lambda", 0.86, 2*time.Second)
	put("engine_speed", 6000, 3*time.Second)
	put("dyno_torque", 150, 3*time.Second)
	put("intake_air_temp", 48, 3*time.Second)
	put("baro_pressure", 100000, 0)
	put("baro_pressure", 101000, 3*time.Second)
	r.WriteEvent(pipeline.Event{Kind: "turbo_lag", Start: t0})
	r.WriteEvent(pipeline.Event{Kind: "warning_raised", Name: "lean_under_boost", Start: t0})
	if err := r.Close(); err != nil {
		t.Fatal(err)
	}
	b, err := os.ReadFile(filepath.Join(dir, "pull", "summary.json"))
	if err != nil {
		t.Fatal(err)
	}
	var s Summary
	if err := json.Unmarshal(b, &s); err != nil {
		t.Fatal(err)
	}
	if *s.PeakTorqueNm != 200 || *s.PeakTorqueRPM != 3000 || *s.PeakCorrectedPowerW != 62832 || *s.PeakPowerRPM != 3000 ||
		*s.PeakBoostPa != 110000 || *s.MinLambdaUnderLoad != 0.79 || *s.MaxLambdaUnderLoad != 0.86 || *s.MaxIntakeAirC != 48 ||
		s.LagEvents != 1 || s.WarningsRaised != 1 || s.Samples != 13 || s.End.Sub(s.Start) != 3*time.Second {
		t.Fatalf("summary %s", b)
	}
	// The mean of the two barometer readings; no temperature sensor.
	if c := s.Conditions; c == nil || c.PressurePa == nil || *c.PressurePa != 100500 || c.TemperatureC != nil || c.Source != "mean of sensors" {
		t.Fatalf("summary conditions %s", b)
	}
	mb, _ := os.ReadFile(filepath.Join(dir, "pull", "run.json"))
	var m Meta
	if err := json.Unmarshal(mb, &m); err != nil || m.Conditions == nil || *m.Conditions.TemperatureC != 21.5 || m.Conditions.Source != "entered" {
		t.Fatalf("run.json %s (%v)", mb, err)
	}
}

// Entered conditions become derive's ambient state, NaN where absent.
func TestConditionsAmbient(t *testing.T) {
	p := 98200.0
	a := Conditions{PressurePa: &p}.Ambient()
	if a == nil || a.Pressure != p || !math.IsNaN(a.Temperature) || !math.IsNaN(a.Humidity) {
		t.Fatalf("Ambient() = %+v", a)
	}
	if (Conditions{Source: "sensors"}).Ambient() != nil {
		t.Fatal("no values gave an ambient state")
	}
}
