package record

import (
	"bytes"
	"cmp"
	"compress/gzip"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
)

// written is what a round-trip case hands the encoder: a sample of a named
// channel and source, or (when kind is set) an event.
type written struct {
	channel, source string
	value           float64
	quality         pipeline.Quality
	ns              int64
	kind            string // an event of this kind instead of a sample
}

// encodeAll encodes ws with the recorder's encoder (NewEncoder) and returns
// the lines.
func encodeAll(t *testing.T, ws []written) []byte {
	t.Helper()
	reg := pipeline.NewRegistry()
	enc := NewEncoder("rt", "test-car", reg)
	var out []byte
	for _, w := range ws {
		if w.kind != "" {
			enc.WriteEvent(pipeline.Event{Kind: w.kind, Name: w.channel, Start: time.Unix(0, w.ns), Fields: map[string]float64{"x": w.value}})
			continue
		}
		id, err := reg.Register(pipeline.Channel{Name: w.channel, Quantity: w.channel, Source: w.source})
		if err != nil {
			t.Fatal(err)
		}
		enc.Write(pipeline.Sample{Channel: id, Value: w.value, Quality: w.quality, Time: time.Unix(0, w.ns)})
		out = append(out, enc.TakeBytes()...)
	}
	return append(out, enc.TakeBytes()...)
}

// checkRoundTrip checks that rec holds the samples of ws (with or without
// the derived ones) stably sorted by time: names, values bit for bit,
// qualities and times.
func checkRoundTrip(t *testing.T, ws []written, rec Recording, derived bool) {
	t.Helper()
	var keep []written
	for _, w := range ws {
		if w.kind == "" && (derived || w.source != "derived") {
			keep = append(keep, w)
		}
	}
	slices.SortStableFunc(keep, func(a, b written) int { return cmp.Compare(a.ns, b.ns) })
	if len(rec.Points) != len(keep) {
		t.Fatalf("read %d points, wrote %d samples", len(rec.Points), len(keep))
	}
	for i, p := range rec.Points {
		w := keep[i]
		if int(p.Key) >= len(rec.Keys) {
			t.Fatalf("point %d: key %d of %d", i, p.Key, len(rec.Keys))
		}
		if got, want := rec.Keys[p.Key], (SeriesKey{w.channel, w.source}); got != want || rec.Channel(p) != w.channel {
			t.Fatalf("point %d: series %+v, want %+v", i, got, want)
		}
		if math.Float64bits(p.Value) != math.Float64bits(w.value) || p.Quality != w.quality || p.NS != w.ns {
			t.Fatalf("point %d: %+v, want value %v quality %v time %d", i, p, w.value, w.quality, w.ns)
		}
	}
	// Each key names a distinct series.
	seen := map[SeriesKey]bool{}
	for _, k := range rec.Keys {
		if seen[k] {
			t.Fatalf("series %+v has two keys", k)
		}
		seen[k] = true
	}
}

// sweep returns n samples of a few channels, frames of equal time, some
// derived, with an event every so often: a recording as the daemon writes
// it.
func sweep(n int) []written {
	chans := []struct{ name, source string }{
		{"engine_speed", "bench_mcu"}, {"manifold_pressure", "bench_mcu"}, {"boost_pressure", "derived"}, {"vehicle_speed", "obd"},
	}
	ws := make([]written, 0, n+n/100)
	for i := 0; i < n; i++ {
		c := chans[i%len(chans)]
		ws = append(ws, written{channel: c.name, source: c.source, value: float64(i) * 1.25, quality: pipeline.Quality(i % 4), ns: 1_800_000_000_000_000_000 + int64(i/len(chans))*1_000_000})
		if i%100 == 99 {
			ws = append(ws, written{kind: "turbo_lag", value: 0.8, ns: ws[len(ws)-1].ns})
		}
	}
	return ws
}

// Reading back what the recorder's encoder wrote gives the same samples:
// names, values bit for bit, qualities and times; derived samples only
// when asked for; events never.
func TestReadRoundTrip(t *testing.T) {
	cases := []struct {
		name string
		ws   []written
	}{
		{"every quality", []written{
			{channel: "engine_speed", source: "mcu", value: 3000, quality: pipeline.OK, ns: 1},
			{channel: "engine_speed", source: "mcu", value: 3001, quality: pipeline.Stale, ns: 2},
			{channel: "engine_speed", source: "mcu", value: 25000, quality: pipeline.OutOfRange, ns: 3},
			{channel: "engine_speed", source: "mcu", value: 0, quality: pipeline.SensorFault, ns: 4},
		}},
		{"extreme values and times", []written{
			{channel: "a", source: "s", value: math.Copysign(0, -1), ns: -1_000_000_000},
			{channel: "a", source: "s", value: math.SmallestNonzeroFloat64, ns: 0},
			{channel: "a", source: "s", value: math.MaxFloat64, ns: math.MaxInt64},
			{channel: "a", source: "s", value: -123.456e-7, ns: math.MinInt64 + 1},
		}},
		{"sources that need escaping", []written{
			{channel: "oil_temp", source: "bench mcu,port=1", value: 90, ns: 10},
			{channel: "lambda", source: `back\slash"quote`, value: 0.98, ns: 10},
		}},
		{"derived samples and events", []written{
			{channel: "manifold_pressure", source: "mcu", value: 150000, ns: 5},
			{channel: "boost_pressure", source: "derived", value: 50000, ns: 5},
			{kind: "warning_raised", channel: "lean_under_boost", value: 1, ns: 5},
			{channel: "manifold_pressure", source: "mcu", value: 151000, ns: 6},
		}},
		{"out of time order, equal times keep their order", []written{
			{channel: "a", source: "s", value: 1, ns: 20},
			{channel: "b", source: "s", value: 2, ns: 10},
			{channel: "c", source: "s", value: 3, ns: 20},
			{channel: "d", source: "s", value: 4, ns: 10},
			{channel: "e", source: "s", value: 5, ns: 15},
		}},
		{"large enough to decode in parallel parts", sweep(40000)},
		{"empty", nil},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			b := encodeAll(t, c.ws)
			dir := t.TempDir()
			plain := filepath.Join(dir, "0001.lp")
			if err := os.WriteFile(plain, b, 0o644); err != nil {
				t.Fatal(err)
			}
			var z bytes.Buffer
			zw := gzip.NewWriter(&z)
			zw.Write(b)
			zw.Close()
			gz := filepath.Join(dir, "0001.lp.gz")
			if err := os.WriteFile(gz, z.Bytes(), 0o644); err != nil {
				t.Fatal(err)
			}
			for _, f := range []string{plain, gz} {
				all, err := ReadAll([]string{f})
				if err != nil {
					t.Fatalf("%s: %v", f, err)
				}
				checkRoundTrip(t, c.ws, all, true)
				in, err := ReadInputs([]string{f})
				if err != nil {
					t.Fatalf("%s: %v", f, err)
				}
				checkRoundTrip(t, c.ws, in, false)
			}
		})
	}
}

// A run recorded by the Recorder into rotated files reads back whole, in
// order, across the files.
func TestReadRecordedRun(t *testing.T) {
	dir := t.TempDir()
	ws := sweep(20000)
	reg := pipeline.NewRegistry()
	r, err := Open(Config{Dir: dir, Run: "run", Vehicle: "v", RotateBytes: 256 << 10}, reg)
	if err != nil {
		t.Fatal(err)
	}
	for i, w := range ws {
		if w.kind != "" {
			r.WriteEvent(pipeline.Event{Kind: w.kind, Start: time.Unix(0, w.ns)})
			continue
		}
		id, err := reg.Register(pipeline.Channel{Name: w.channel, Quantity: w.channel, Source: w.source})
		if err != nil {
			t.Fatal(err)
		}
		r.Write(pipeline.Sample{Channel: id, Value: w.value, Quality: w.quality, Time: time.Unix(0, w.ns)})
		if i%1000 == 999 {
			if err := r.Sync(); err != nil {
				t.Fatal(err)
			}
		}
	}
	if err := r.Close(); err != nil {
		t.Fatal(err)
	}
	files, _ := filepath.Glob(filepath.Join(r.Dir(), "*.lp"))
	if len(files) < 3 {
		t.Fatalf("%d files; the test wants a rotated run", len(files))
	}
	rec, err := ReadAll(files)
	if err != nil {
		t.Fatal(err)
	}
	checkRoundTrip(t, ws, rec, true)
}

// A malformed line in a recording is named by file and line, also when it
// lies in the second of the parts decoded in parallel.
func TestReadNamesBadLine(t *testing.T) {
	good, err := os.ReadFile("testdata/short-run.lp")
	if err != nil {
		t.Fatal(err)
	}
	var b bytes.Buffer
	lines := 0
	for b.Len() < 3<<20 {
		b.Write(good)
		lines += bytes.Count(good, []byte{'\n'})
	}
	b.WriteString("plenum,channel=engine_speed value=oops 12\n")
	path := filepath.Join(t.TempDir(), "bad.lp")
	os.WriteFile(path, b.Bytes(), 0o644)
	_, err = ReadInputs([]string{path})
	want := path + ":" + strconv.Itoa(lines+1) + ":"
	if err == nil || !strings.Contains(err.Error(), want) {
		t.Fatalf("err = %v, want it to name %s", err, want)
	}
}

func TestSplitLines(t *testing.T) {
	line := []byte(strings.Repeat("x", 99) + "\n")
	many := bytes.Repeat(line, 100) // 10 000 bytes
	cases := []struct {
		name      string
		b         []byte
		n, min    int
		wantParts int
	}{
		{"one part wanted", many, 1, 10, 1},
		{"too small to cut", many, 4, 6000, 1},
		{"cut in two", many, 2, 1000, 2},
		{"cut in four", many, 4, 1000, 4},
		{"no newline after the cut", bytes.Repeat([]byte("x"), 5000), 2, 100, 1},
		{"empty", nil, 4, 1, 1},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			parts := splitLines(c.b, c.n, c.min)
			if len(parts) != c.wantParts {
				t.Fatalf("%d parts, want %d", len(parts), c.wantParts)
			}
			if got := bytes.Join(parts, nil); !bytes.Equal(got, c.b) {
				t.Fatal("the parts do not add up to the input")
			}
			for i, p := range parts[:len(parts)-1] {
				if len(p) == 0 || p[len(p)-1] != '\n' {
					t.Fatalf("part %d does not end at a newline", i)
				}
			}
		})
	}
}

// FuzzReadSamples: any recording gives samples in time order with valid
// keys, or an error naming the file; never a panic.
func FuzzReadSamples(f *testing.F) {
	good, err := os.ReadFile("testdata/short-run.lp")
	if err != nil {
		f.Fatal(err)
	}
	f.Add(good)
	f.Add([]byte("plenum,channel=engine_speed,source=m value=3000,quality=\"ok\" 5\nplenum,channel=engine_speed,source=m value=2000 4\n"))
	f.Add([]byte("plenum_event,kind=turbo_lag,run=r t90_seconds=0.8 1\n"))
	f.Add([]byte("plenum,channel=x value=1i 1\nplenum,channel=\\ x\\,y value=\"s\" 2\n"))
	dir := f.TempDir()
	f.Fuzz(func(t *testing.T, data []byte) {
		path := filepath.Join(dir, "in.lp")
		if err := os.WriteFile(path, data, 0o644); err != nil {
			t.Fatal(err)
		}
		rec, err := readSamples([]string{path}, true, nil)
		if err != nil {
			if !strings.Contains(err.Error(), path) {
				t.Fatalf("error does not name the file: %v", err)
			}
			return
		}
		for i, s := range rec.Points {
			if int(s.Key) >= len(rec.Keys) {
				t.Fatalf("sample %d has key %d of %d", i, s.Key, len(rec.Keys))
			}
			if i > 0 && s.NS < rec.Points[i-1].NS {
				t.Fatalf("samples out of time order at %d", i)
			}
		}
	})
}

// ReadEvents reads events back with their kind, name, time, duration and
// fields, in time order, and skips samples.
func TestReadEvents(t *testing.T) {
	path := filepath.Join(t.TempDir(), "0001.lp")
	os.WriteFile(path, []byte(
		"plenum_event,kind=warning_cleared,name=hot,run=r,vehicle=v active=0,duration_seconds=1.5 1800000002000000000\n"+
			"plenum,channel=engine_speed,run=r,source=mcu,vehicle=v value=3000,quality=\"ok\" 1800000000000000000\n"+
			"plenum_event,kind=run_started,name=r,run=r,vehicle=v duration_seconds=0 1800000000000000000\n"), 0o644)
	evs, err := ReadEvents([]string{path})
	if err != nil {
		t.Fatal(err)
	}
	if len(evs) != 2 {
		t.Fatalf("%d events, want 2: %+v", len(evs), evs)
	}
	a, b := evs[0], evs[1]
	if a.Kind != "run_started" || a.Name != "r" || !a.End.IsZero() || a.Start.UnixNano() != 1800000000000000000 || len(a.Fields) != 0 {
		t.Errorf("first event %+v", a)
	}
	if b.Kind != "warning_cleared" || b.Name != "hot" || b.End.Sub(b.Start) != 1500*time.Millisecond || b.Fields["active"] != 0 || len(b.Fields) != 1 {
		t.Errorf("second event %+v", b)
	}
	os.WriteFile(path, []byte("plenum_event,kind=x value=\n"), 0o644)
	if _, err := ReadEvents([]string{path}); err == nil || !strings.HasPrefix(err.Error(), path+":") {
		t.Errorf("a bad line: %v", err)
	}
}

// ReadChannels gives what ReadAll gives for the channels asked for, tags in
// any order, and names a bad line in the whole file.
func TestReadChannels(t *testing.T) {
	path := filepath.Join(t.TempDir(), "0001.lp")
	os.WriteFile(path, []byte(
		"plenum,channel=engine_speed,run=r,source=mcu,vehicle=v value=3000,quality=\"ok\" 1800000000000000000\n"+
			"plenum,channel=engine_speed_limit,run=r,source=mcu,vehicle=v value=7000,quality=\"ok\" 1800000000000000000\n"+
			"plenum_event,kind=run_started,name=r,run=r,vehicle=v duration_seconds=0 1800000000000000000\n"+
			"plenum,run=r,source=derived,channel=corrected_power,vehicle=v value=100000,quality=\"ok\" 1800000001000000000\n"+
			"plenum,source=mcu,channel=oil_temp,vehicle=v value=90,quality=\"ok\" 1800000001000000000\n"+
			"plenum,channel=lambda,run=r,source=derived,vehicle=v value=0.9,quality=\"ok\" 1800000002000000000\n"), 0o644)
	rec, err := ReadChannels([]string{path}, "engine_speed", "corrected_power")
	if err != nil {
		t.Fatal(err)
	}
	var got []string
	for _, p := range rec.Points {
		got = append(got, rec.Channel(p)+"="+strconv.FormatFloat(p.Value, 'g', -1, 64))
	}
	if want := "engine_speed=3000 corrected_power=100000"; strings.Join(got, " ") != want {
		t.Errorf("read %q, want %q", got, want)
	}
	os.WriteFile(path, []byte("plenum,channel=x value=1 1\nplenum,channel=engine_speed,run=r value=\n"), 0o644)
	if _, err := ReadChannels([]string{path}, "engine_speed"); err == nil || !strings.HasPrefix(err.Error(), path+":2:") {
		t.Errorf("a bad line: %v, want it named as %s:2:", err, path)
	}
}
