package main

import (
	"bufio"
	"context"
	"io"
	"log/slog"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/record"
)

// BenchmarkIngestDemoPhysics pushes samples of the demo's channels through
// the real pipeline: validation, the store, the demo's derivation graph
// (speed-density, boost, mixture, fuel flow, compressor ratio, power,
// charge air) and detectors (turbo lag, warnings, turbo guard), and a
// recorder-sized subscription.
func BenchmarkIngestDemoPhysics(b *testing.B) {
	b.Run("sample_by_sample", func(b *testing.B) { benchIngestDemo(b, false) })
	b.Run("frames_of_15", func(b *testing.B) { benchIngestDemo(b, true) })
}

// benchIngestDemo feeds the demo's channels one sample at a time, each at
// its own time (the worst case), or as frames of one serial line.
func benchIngestDemo(b *testing.B, frames bool) {
	cfg, err := config.Parse("demo.yaml", demoConfig)
	if err != nil {
		b.Fatal(err)
	}
	reg := pipeline.NewRegistry()
	var ids []pipeline.ChannelID
	for _, in := range cfg.Serial[0].Inputs {
		ch, _ := pipeline.Standard(in.Channel)
		ch.Source = "bench"
		id, err := reg.Register(ch)
		if err != nil {
			b.Fatal(err)
		}
		ids = append(ids, id)
	}
	p, err := offlinePipeline(cfg, reg)
	if err != nil {
		b.Fatal(err)
	}
	sub := p.Subscribe("recorder", 1<<16)
	// Plausible values per channel so that every derivation computes.
	vals := make([]float64, len(ids))
	for i, id := range ids {
		c := reg.Channel(id)
		vals[i] = c.Min + (c.Max-c.Min)*0.4
	}
	t0 := time.Unix(0, 0)
	buf := make([]pipeline.Sample, 0, 1<<16)
	frame := make([]pipeline.Sample, 0, len(ids))
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		k := i % len(ids)
		s := pipeline.Sample{Channel: ids[k], Value: vals[k], Time: t0.Add(time.Duration(i) * time.Microsecond)}
		if !frames {
			p.Process(s)
		} else {
			// The readings of one serial line share its time.
			s.Time = t0.Add(time.Duration(i/len(ids)) * time.Millisecond)
			frame = append(frame, s)
			if len(frame) == len(ids) || i == b.N-1 {
				p.ProcessFrame(frame)
				frame = frame[:0]
			}
		}
		if i&0x3fff == 0 {
			buf, _ = sub.Drain(buf[:0], nil)
		}
	}
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "samples/s")
	c := p.Counters()
	b.ReportMetric(float64(c.Derived)/float64(c.Accepted), "derived/sample")
}

// BenchmarkDemoResidentMemory runs the whole demo in-process (simulator,
// pty, serial driver, pipeline, embedded broker, publisher, metrics) for a
// few seconds with a subscriber and a scraper attached, and reports the
// process's resident set size.
func BenchmarkDemoResidentMemory(b *testing.B) {
	for i := 0; i < b.N; i++ {
		ctx, cancel := context.WithCancel(context.Background())
		cfg, err := config.Parse("demo.yaml", demoConfig)
		if err != nil {
			b.Fatal(err)
		}
		cfg.HTTP.Listen, cfg.MQTT.Listen = "127.0.0.1:0", "127.0.0.1:0"
		cfg.StateDir = b.TempDir()
		cfg.Sim.TimeScale = 4
		done := make(chan error, 1)
		go func() { done <- runDaemon(ctx, cfg, io.Discard, slog.New(slog.DiscardHandler)) }()
		time.Sleep(6 * time.Second)
		rss := residentKB(b)
		cancel()
		if err := <-done; err != nil {
			b.Fatal(err)
		}
		b.ReportMetric(float64(rss)/1024, "rss_MB")
	}
}

func residentKB(b *testing.B) int {
	f, err := os.Open("/proc/self/status")
	if err != nil {
		b.Skip("no /proc/self/status:", err)
	}
	defer f.Close()
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		if rest, ok := strings.CutPrefix(sc.Text(), "VmRSS:"); ok {
			n, err := strconv.Atoi(strings.Fields(rest)[0])
			if err != nil {
				b.Fatal(err)
			}
			return n
		}
	}
	b.Fatal("VmRSS not found")
	return 0
}

// BenchmarkWarningLatency measures the wall time from handing the pipeline
// the sample that completes a rule's minimum duration (lean under boost,
// 300 ms) to the raise event arriving at a consumer goroutine.
func BenchmarkWarningLatency(b *testing.B) {
	cfg, err := config.Parse("demo.yaml", demoConfig)
	if err != nil {
		b.Fatal(err)
	}
	reg := pipeline.NewRegistry()
	ids := map[string]pipeline.ChannelID{}
	for _, n := range []string{"manifold_pressure", "baro_pressure", "wideband_voltage", "engine_speed"} {
		ch, _ := pipeline.Standard(n)
		ch.Source = "bench"
		ch.MaxAge = time.Hour
		id, err := reg.Register(ch)
		if err != nil {
			b.Fatal(err)
		}
		ids[n] = id
	}
	p, err := offlinePipeline(cfg, reg)
	if err != nil {
		b.Fatal(err)
	}
	sub := p.SubscribeEvents("latency")
	got := make(chan time.Time, 1)
	stop := make(chan struct{})
	go func() {
		var evs []pipeline.Event
		for {
			select {
			case <-stop:
				return
			case <-sub.C():
				_, evs = sub.Drain(nil, evs[:0])
				for _, e := range evs {
					if e.Kind == "warning_raised" && e.Name == "lean_under_boost" {
						got <- time.Now()
					}
				}
			}
		}
	}()
	defer close(stop)
	t := time.Unix(0, 0)
	put := func(n string, v float64) { p.Process(pipeline.Sample{Channel: ids[n], Value: v, Time: t}) }
	var total time.Duration
	var worst time.Duration
	lat := make([]time.Duration, 0, b.N)
	for i := 0; i < b.N; i++ {
		// Rich and off boost: nothing raised.
		put("baro_pressure", 100000)
		put("engine_speed", 5000)
		put("wideband_voltage", 0.9) // λ 0.80
		put("manifold_pressure", 210000)
		t = t.Add(time.Second)
		// Lean under boost from now on.
		put("wideband_voltage", 2.3) // λ 0.99
		t = t.Add(300 * time.Millisecond)
		start := time.Now()
		put("manifold_pressure", 210001) // completes the 300 ms
		select {
		case at := <-got:
			d := at.Sub(start)
			total += d
			worst = max(worst, d)
			lat = append(lat, d)
		case <-time.After(time.Second):
			b.Fatal("no raise event")
		}
		// Clear it: rich again for longer than the clear-for time.
		put("wideband_voltage", 0.9)
		t = t.Add(2 * time.Second)
		put("wideband_voltage", 0.9001)
		t = t.Add(time.Second)
	}
	b.ReportMetric(float64(total.Microseconds())/float64(b.N), "latency_us")
	b.ReportMetric(float64(worst.Microseconds()), "worst_latency_us")
	slices.Sort(lat)
	b.ReportMetric(float64(lat[len(lat)*99/100].Microseconds()), "p99_latency_us")
	b.ReportMetric(float64(lat[len(lat)*999/1000].Microseconds()), "p99.9_latency_us")
}

// writeSweepRun records a synthetic run of the demo's serial channels: rate
// input samples per second in all (frames of every channel at one time) for
// dur, with the engine sweeping from 2000 to 6500 rpm every 10 s at wide-open
// throttle, so that every derivation and detector has work.
func writeSweepRun(tb testing.TB, dir string, dur time.Duration, rate int) (string, int) {
	tb.Helper()
	cfg, err := config.Parse("demo.yaml", demoConfig)
	if err != nil {
		tb.Fatal(err)
	}
	reg := pipeline.NewRegistry()
	var ids []pipeline.ChannelID
	var names []string
	for _, in := range cfg.Serial[0].Inputs {
		ch, _ := pipeline.Standard(in.Channel)
		ch.Source = "bench_mcu"
		id, err := reg.Register(ch)
		if err != nil {
			tb.Fatal(err)
		}
		ids, names = append(ids, id), append(names, in.Channel)
	}
	rec, err := record.Open(record.Config{Dir: dir, Run: "sweep", Vehicle: cfg.Vehicle}, reg)
	if err != nil {
		tb.Fatal(err)
	}
	frames := int(dur.Seconds() * float64(rate) / float64(len(ids)))
	step := dur / time.Duration(frames)
	t0 := time.Unix(1_800_000_000, 0)
	for f := 0; f < frames; f++ {
		t := t0.Add(time.Duration(f) * step)
		x := math.Mod(t.Sub(t0).Seconds(), 10) / 10 // position in the sweep
		rpm := 2000 + 4500*x
		mapPa := 100000 + 110000*math.Min(1, 2*x)
		for i, id := range ids {
			var v float64
			switch names[i] {
			case "engine_speed":
				v = rpm
			case "throttle_position":
				v = 1
			case "manifold_pressure":
				v = mapPa
			case "compressor_outlet_pressure":
				v = mapPa + 8000
			case "baro_pressure":
				v = 100800
			case "intake_air_temp":
				v = 35 + 10*x
			case "charge_temp_pre_cooler":
				v = 60 + 60*x
			case "wideband_voltage":
				v = 1.9 + 0.2*math.Sin(float64(f)/7)
			case "dyno_torque":
				v = 250 + 150*math.Sin(math.Pi*x)
			case "coolant_temp", "oil_temp":
				v = 90
			case "oil_pressure":
				v = 400000
			case "exhaust_temp":
				v = 600 + 300*x
			case "ambient_temp":
				v = 20
			case "ambient_humidity":
				v = 0.5
			default:
				c := reg.Channel(id)
				v = c.Min + (c.Max-c.Min)*0.4
			}
			rec.Write(pipeline.Sample{Channel: id, Time: t, Value: v})
		}
	}
	if err := rec.Close(); err != nil {
		tb.Fatal(err)
	}
	return rec.Dir(), frames * len(ids)
}

// BenchmarkReplayTenMinutes2kHz replays a 10-minute run of 2000 input
// samples per second (1.2 M samples of the demo's 15 serial channels) with
// the demo's configuration: reading and decoding the line protocol, every
// derivation and detector, and encoding the output to a file. Target: under
// 2 s per run.
func BenchmarkReplayTenMinutes2kHz(b *testing.B) {
	dir := b.TempDir()
	runDir, n := writeSweepRun(b, dir, 10*time.Minute, 2000)
	cfgPath := filepath.Join(dir, "demo.yaml")
	if err := os.WriteFile(cfgPath, demoConfig, 0o644); err != nil {
		b.Fatal(err)
	}
	out := filepath.Join(dir, "out.lp")
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		var so, se strings.Builder
		if code := run([]string{"replay", "-config", cfgPath, "-in", runDir, "-out", out}, &so, &se); code != 0 {
			b.Fatalf("replay: %d %s", code, se.String())
		}
	}
	b.StopTimer()
	per := b.Elapsed().Seconds() / float64(b.N)
	b.ReportMetric(per, "s/run")
	b.ReportMetric(float64(n)/per, "input_samples/s")
	if st, err := os.Stat(out); err == nil {
		b.ReportMetric(float64(st.Size())/(1<<20), "output_MiB")
	}
}
