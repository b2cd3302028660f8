package replay

import (
	"bytes"
	"encoding/json"
	"errors"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/display"
	"github.com/plenum-engine/plenum/pipeline/record"
)

// boostDeriv computes boost_pressure = manifold_pressure − baro_pressure
// and raises a "boost_seen" event the first time boost passes 50 kPa.
type boostDeriv struct {
	calls int
	emit  func(pipeline.Event)
	seen  bool
}

func (d *boostDeriv) Name() string { return "boost" }
func (d *boostDeriv) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "manifold_pressure"}, {Name: "baro_pressure", MaxAge: time.Hour}}
}
func (d *boostDeriv) Outputs() []pipeline.Channel {
	return []pipeline.Channel{{Name: "boost_pressure", Quantity: "pressure", Unit: pipeline.Pascal, Min: -1e6, Max: 1e6}}
}
func (d *boostDeriv) SetEmitter(f func(pipeline.Event)) { d.emit = f }
func (d *boostDeriv) Derive(t time.Time, in, out []float64) uint64 {
	d.calls++
	out[0] = in[0] - in[1]
	if out[0] > 50000 && !d.seen {
		d.seen = true
		d.emit(pipeline.Event{Kind: "boost_seen", Start: t, Fields: map[string]float64{"boost_pascals": out[0]}})
	}
	return 1
}

// builder returns a Config.Pipeline that builds the boost derivation and
// hands it back through *d.
func builder(d **boostDeriv) func(*pipeline.Registry) (*pipeline.Pipeline, error) {
	return func(reg *pipeline.Registry) (*pipeline.Pipeline, error) {
		*d = &boostDeriv{}
		g, err := pipeline.BuildGraph(reg, []pipeline.Derivation{*d})
		if err != nil {
			return nil, err
		}
		p := pipeline.New(reg, g, pipeline.Options{})
		p.BindEmitters()
		return p, nil
	}
}

// writeRun records a short run with the recorder: frames of MAP and baro
// (one time each), a recorded boost value that replay must recompute, and
// an unknown channel.
func writeRun(t *testing.T, dir string) string {
	t.Helper()
	reg := pipeline.NewRegistry()
	id := func(name, source string) pipeline.ChannelID {
		ch, ok := pipeline.Standard(name)
		if !ok {
			ch = pipeline.Channel{Name: name, Quantity: name}
		}
		ch.Source = source
		x, err := reg.Register(ch)
		if err != nil {
			t.Fatal(err)
		}
		return x
	}
	mp, baro, boost, odd := id("manifold_pressure", "mcu"), id("baro_pressure", "mcu"), id("boost_pressure", "derived"), id("shift_light", "dash")
	r, err := record.Open(record.Config{Dir: dir, Run: "r1", Vehicle: "test-car"}, reg)
	if err != nil {
		t.Fatal(err)
	}
	t0 := time.Unix(1_800_000_000, 0)
	for i, m := range []float64{100000, 140000, 180000, 160000} {
		at := t0.Add(time.Duration(i) * 10 * time.Millisecond)
		r.Write(pipeline.Sample{Channel: mp, Value: m, Time: at})
		r.Write(pipeline.Sample{Channel: baro, Value: 100000, Time: at})
		r.Write(pipeline.Sample{Channel: boost, Value: -1, Time: at}) // a wrong recorded value
	}
	r.Write(pipeline.Sample{Channel: odd, Value: 1, Time: t0.Add(time.Second)})
	if err := r.Close(); err != nil {
		t.Fatal(err)
	}
	return r.Dir()
}

func TestRunRecomputes(t *testing.T) {
	dir := t.TempDir()
	runDir := writeRun(t, dir)
	in, err := Resolve("r1", dir)
	if err != nil {
		t.Fatal(err)
	}
	rec, err := in.ReadInputs()
	if err != nil {
		t.Fatal(err)
	}
	var d *boostDeriv
	sumPath := filepath.Join(dir, "summary.json")
	var out bytes.Buffer
	sum, err := Run(Config{Pipeline: builder(&d), Vehicle: "test-car", Summary: sumPath}, rec, &out)
	if err != nil {
		t.Fatal(err)
	}
	if in.RunDir != runDir {
		t.Errorf("run directory %q, want %q", in.RunDir, runDir)
	}
	// One derivation call per frame: MAP and baro of one time are one frame.
	if d.calls != 4 {
		t.Errorf("%d derivation calls, want 4 (one per frame)", d.calls)
	}
	lines := out.String()
	for _, want := range []string{
		`plenum,channel=boost_pressure,run=replay,source=derived,vehicle=test-car value=80000,quality="ok" 1800000000020000000`,
		`plenum,channel=manifold_pressure,run=replay,source=mcu,vehicle=test-car value=180000,quality="ok" 1800000000020000000`,
		`plenum,channel=shift_light,run=replay,source=dash,vehicle=test-car value=1,quality="ok" 1800000001000000000`,
		`plenum_event,kind=boost_seen,run=replay,vehicle=test-car boost_pascals=80000,duration_seconds=0 1800000000020000000`,
	} {
		if !strings.Contains(lines, want+"\n") {
			t.Errorf("output lacks %s:\n%s", want, lines)
		}
	}
	if strings.Contains(lines, "value=-1,") {
		t.Error("the recorded boost value was copied instead of recomputed")
	}
	if n := strings.Count(lines, "\n"); n != 4*3+1+1 {
		t.Errorf("%d lines, want 14 (4 frames of MAP, baro, boost; the odd channel; the event)", n)
	}
	if sum.PeakBoostPa == nil || *sum.PeakBoostPa != 80000 || sum.Samples != 13 || sum.Vehicle != "test-car" {
		t.Errorf("summary %s", sum.JSON())
	}
	b, err := os.ReadFile(sumPath)
	if err != nil || !bytes.Equal(b, sum.JSON()) {
		t.Errorf("summary file %q (%v), want %s", b, err, sum.JSON())
	}
	var back record.Summary
	if err := json.Unmarshal(b, &back); err != nil || *back.PeakBoostPa != 80000 {
		t.Errorf("summary file does not read back: %v", err)
	}

	// CSV into a file, with a channel lookup of our own.
	csvPath := filepath.Join(dir, "out.csv")
	var asked []string
	lookup := func(name string) (pipeline.Channel, bool) {
		asked = append(asked, name)
		return pipeline.Standard(name)
	}
	var unused bytes.Buffer
	if _, err := Run(Config{Pipeline: builder(&d), Channel: lookup, CSV: true, Out: csvPath}, rec, &unused); err != nil {
		t.Fatal(err)
	}
	if unused.Len() != 0 {
		t.Error("with Out set, the writer was written to")
	}
	c, err := os.ReadFile(csvPath)
	if err != nil {
		t.Fatal(err)
	}
	// The wide table: one row per frame time, one column per channel with
	// its unit; the derived boost of the third frame, the odd channel alone
	// in its row.
	for _, want := range []string{
		"time,seconds,manifold_pressure (pascals),baro_pressure (pascals),shift_light,boost_pressure (pascals)\n",
		"2027-01-15T08:00:00.02Z,0.02,180000,100000,,80000\n",
		"2027-01-15T08:00:01Z,1,,,1,\n",
	} {
		if !bytes.Contains(c, []byte(want)) {
			t.Errorf("csv lacks %q:\n%s", want, c)
		}
	}
	if strings.Join(asked, " ") != "manifold_pressure baro_pressure shift_light" {
		t.Errorf("channel lookup asked for %q", asked)
	}
}

func TestRunRefuses(t *testing.T) {
	rec := record.Recording{Keys: []record.SeriesKey{{Channel: "engine_speed", Source: "s"}}, Points: []record.Point{{Value: 1}}}
	boom := errors.New("no derivations")
	cases := []struct {
		name string
		cfg  Config
		want string
	}{
		{"no pipeline", Config{}, "no pipeline"},
		{"pipeline fails to build", Config{Pipeline: func(*pipeline.Registry) (*pipeline.Pipeline, error) { return nil, boom }}, "no derivations"},
		{"bad channel name", Config{Pipeline: builder(new(*boostDeriv)), Channel: func(string) (pipeline.Channel, bool) {
			return pipeline.Channel{Name: "Not Snake"}, true
		}}, "snake_case"},
		{"output file cannot be created", Config{Pipeline: builder(new(*boostDeriv)), Out: filepath.Join(t.TempDir(), "no", "such", "dir.lp")}, "no such file"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			_, err := Run(c.cfg, rec, new(bytes.Buffer))
			if err == nil || !strings.Contains(err.Error(), c.want) || !strings.HasPrefix(err.Error(), "replay: ") && !errors.Is(err, boom) {
				t.Fatalf("err = %v, want %q", err, c.want)
			}
		})
	}
}

func TestResolve(t *testing.T) {
	dir := t.TempDir()
	run := filepath.Join(dir, "r1")
	os.Mkdir(run, 0o755)
	// 0003 is there twice (a compression cut before it removed the .lp):
	// the .lp.gz is read; a .tmp being written is not.
	for _, f := range []string{"0002.lp", "0001.lp.gz", "0003.lp.gz", "0003.lp", "0004.lp.gz.tmp", "config.yaml"} {
		os.WriteFile(filepath.Join(run, f), nil, 0o644)
	}
	os.Mkdir(filepath.Join(dir, "empty"), 0o755)
	bare := filepath.Join(dir, "bare.lp")
	os.WriteFile(bare, nil, 0o644)
	order := []string{filepath.Join(run, "0001.lp.gz"), filepath.Join(run, "0002.lp"), filepath.Join(run, "0003.lp.gz")}
	cases := []struct {
		name, in, dir string
		want          Input
		wantErr       string
	}{
		{"run directory", run, "", Input{Files: order, RunDir: run}, ""},
		{"run id under dir", "r1", dir, Input{Files: order, RunDir: run}, ""},
		{"bare file", bare, "", Input{Files: []string{bare}}, ""},
		{"bare file, dir ignored", bare, "/nonexistent", Input{Files: []string{bare}}, ""},
		{"missing", "r9", dir, Input{}, "replay: -in " + filepath.Join(dir, "r9") + ": "},
		{"missing, no dir", "r9", "", Input{}, "replay: -in r9: "},
		{"no data files", "empty", dir, Input{}, "holds no .lp or .lp.gz files"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			got, err := Resolve(c.in, c.dir)
			if c.wantErr != "" {
				if err == nil || !strings.Contains(err.Error(), c.wantErr) {
					t.Fatalf("err = %v, want %q", err, c.wantErr)
				}
				return
			}
			if err != nil {
				t.Fatal(err)
			}
			if got.RunDir != c.want.RunDir || strings.Join(got.Files, ",") != strings.Join(c.want.Files, ",") {
				t.Fatalf("got %+v, want %+v", got, c.want)
			}
		})
	}
}

// A bad line is named by file and line through the replay's reading, with
// the command's prefix.
func TestReadNamesBadLine(t *testing.T) {
	path := filepath.Join(t.TempDir(), "bad.lp")
	os.WriteFile(path, []byte("plenum,channel=a,source=s value=1 1\nplenum,channel=a value=oops 2\n"), 0o644)
	for name, read := range map[string]func(Input) (record.Recording, error){"inputs": Input.ReadInputs, "all": Input.ReadAll} {
		_, err := read(Input{Files: []string{path}})
		if err == nil || !strings.HasPrefix(err.Error(), "replay: "+path+":2:") {
			t.Errorf("%s: err = %v, want it to name %s:2", name, err, path)
		}
	}
}

type failWriter struct{ n int }

func (f *failWriter) Write(p []byte) (int, error) {
	f.n++
	if f.n > 1 {
		return 0, errors.New("disk full")
	}
	return len(p), nil
}

func TestAsyncWriter(t *testing.T) {
	var out bytes.Buffer
	a := newAsyncWriter(&out, 64)
	var want bytes.Buffer
	for i := range 1000 {
		p := bytes.Repeat([]byte{byte('a' + i%26)}, i%97)
		want.Write(p)
		if n, err := a.Write(p); n != len(p) || err != nil {
			t.Fatalf("Write: %d %v", n, err)
		}
	}
	if err := a.Close(); err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(out.Bytes(), want.Bytes()) {
		t.Fatal("the writer changed the bytes or their order")
	}

	// A failing write is reported at Close; later writes are dropped.
	fw := &failWriter{}
	a = newAsyncWriter(fw, 16)
	for range 100 {
		a.Write([]byte("0123456789"))
	}
	if err := a.Close(); err == nil || err.Error() != "disk full" {
		t.Fatalf("Close = %v, want the write's error", err)
	}
	if fw.n != 2 {
		t.Fatalf("%d writes reached the failing writer, want 2 (none after the failure)", fw.n)
	}
}

// The default channel lookup is the catalogue's, an OBD channel labelled by
// its name.
func TestCataloguedChannel(t *testing.T) {
	for _, tc := range []struct {
		name, sensor string
		unit         pipeline.Unit
		ok           bool
	}{
		{"manifold_pressure", "manifold", pipeline.Pascal, true},
		{"ecu_engine_speed", "ecu_engine_speed", pipeline.RPM, true},
		{"boost_pressure", "boost", pipeline.Pascal, true},
		{"no_such_channel", "", "", false},
	} {
		c, ok := CataloguedChannel(tc.name)
		if ok != tc.ok || ok && (c.Sensor != tc.sensor || c.Unit != tc.unit) {
			t.Errorf("CataloguedChannel(%q) = %+v, %v", tc.name, c, ok)
		}
	}
}

// A replay is tagged with a run id derived from the recorded run, its
// summary says what it replays and with which configuration, its events go
// to a CSV of their own, and the wide table converts to display units on
// request.
func TestRunTagsEventsAndUnits(t *testing.T) {
	dir := t.TempDir()
	writeRun(t, dir)
	in, err := Resolve("r1", dir)
	if err != nil {
		t.Fatal(err)
	}
	if id := RunID(in); id != "r1-replay" {
		t.Errorf("RunID(run dir) = %q, want r1-replay", id)
	}
	for file, want := range map[string]string{"/x/short-run.lp": "short-run-replay", "a/0001.lp.gz": "0001-replay"} {
		if id := RunID(Input{Files: []string{file}}); id != want {
			t.Errorf("RunID(%s) = %q, want %q", file, id, want)
		}
	}
	rec, err := in.ReadInputs()
	if err != nil {
		t.Fatal(err)
	}
	var d *boostDeriv
	evPath := filepath.Join(dir, "events.csv")
	var out bytes.Buffer
	sum, err := Run(Config{Pipeline: builder(&d), Vehicle: "test-car", Run: RunID(in), Of: "r1", ConfigUsed: "the run's own", Events: evPath}, rec, &out)
	if err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(out.String(), "plenum,channel=boost_pressure,run=r1-replay,source=derived,vehicle=test-car value=80000,") || strings.Contains(out.String(), "run=replay,") {
		t.Errorf("output not tagged run=r1-replay:\n%s", out.String())
	}
	if sum.Run != "r1-replay" || sum.ReplayOf != "r1" || sum.ReplayConfig != "the run's own" ||
		!strings.Contains(string(sum.JSON()), `"replay_config": "the run's own"`) {
		t.Errorf("summary %s", sum.JSON())
	}
	ev, err := os.ReadFile(evPath)
	if err != nil {
		t.Fatal(err)
	}
	if want := "time,kind,name,duration_seconds,boost_pascals\n2027-01-15T08:00:00.02Z,boost_seen,,,80000\n"; string(ev) != want {
		t.Errorf("events csv:\n%s\nwant:\n%s", ev, want)
	}

	f, err := display.New(display.Config{Units: display.Units{Pressure: display.Bar}})
	if err != nil {
		t.Fatal(err)
	}
	out.Reset()
	if _, err := Run(Config{Pipeline: builder(&d), CSV: true, Display: &f}, rec, &out); err != nil {
		t.Fatal(err)
	}
	for _, want := range []string{"manifold_pressure (bar),baro_pressure (bar),shift_light,boost_pressure (bar gauge)\n", "2027-01-15T08:00:00.02Z,0.02,1.80,1.00,,0.80\n"} {
		if !strings.Contains(out.String(), want) {
			t.Errorf("csv in display units lacks %q:\n%s", want, out.String())
		}
	}
}
