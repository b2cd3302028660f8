package main

import (
	"bufio"
	"context"
	"io"
	"log/slog"
	"os"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline"
)

// BenchmarkIngestDemoPhysics pushes samples of the demo's channels through
// the real pipeline: validation, the store, the demo's derivation graph
// (speed-density, boost, mixture, fuel flow, compressor ratio) and a
// recorder-sized subscription.
func BenchmarkIngestDemoPhysics(b *testing.B) {
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
	ds, err := buildDerivations(cfg, reg)
	if err != nil {
		b.Fatal(err)
	}
	g, err := pipeline.BuildGraph(reg, ds)
	if err != nil {
		b.Fatal(err)
	}
	p := pipeline.New(reg, g, pipeline.Options{})
	sub := p.Subscribe("recorder", 1<<16)
	// Plausible values per channel so that every derivation computes.
	vals := make([]float64, len(ids))
	for i, id := range ids {
		c := reg.Channel(id)
		vals[i] = c.Min + (c.Max-c.Min)*0.4
	}
	t0 := time.Unix(0, 0)
	buf := make([]pipeline.Sample, 0, 1<<16)
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		k := i % len(ids)
		p.Process(pipeline.Sample{Channel: ids[k], Value: vals[k], Time: t0.Add(time.Duration(i) * time.Microsecond)})
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
