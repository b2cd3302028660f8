package console

import (
	"encoding/json"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/chromedp"

	"github.com/plenum-engine/plenum/pipeline"
)

// BenchmarkSampleToStream measures the delay from a sample entering the
// running pipeline (PutFrame) to its value read from the stream by an SSE
// client over HTTP, reported as p50 and p99 in milliseconds.
//
//   - path: the display rate set so high that nothing is held back: the cost
//     of the path itself (ingest loop, fan-out, the console's loop, the
//     browser's queue, HTTP).
//   - 10Hz_fed_100Hz: the default display rate of 10 Hz with one channel fed
//     at 100 Hz, as a fast sensor is: the delay of each value that is sent
//     (the rest are superseded and never sent), including the time a value
//     waits for its channel's interval.
//
// go test -run '^$' -bench SampleToStream ./pipeline/console/
func BenchmarkSampleToStream(b *testing.B) {
	for _, bc := range []struct {
		name  string
		rate  float64
		every time.Duration
	}{{"path", 1e6, 0}, {"10Hz_fed_100Hz", 10, 10 * time.Millisecond}} {
		b.Run(bc.name, func(b *testing.B) {
			r := newRig(b, Config{Rate: bc.rate, QueueSize: 1 << 14}, false)
			c := r.connect()
			c.wait(b, "snapshot", 1)
			id := r.ids["engine_speed"]
			put := make([]time.Time, b.N)
			var delays []float64
			seen := -1
			take := func(m msg) (last int) {
				last = -1
				if m.Event != "values" {
					return
				}
				var vm valuesMsg
				if err := json.Unmarshal(m.Data, &vm); err != nil {
					b.Fatal(err)
				}
				for _, v := range vm.V {
					if v.C == int(id) && v.V != nil {
						i := int(*v.V)
						delays = append(delays, float64(m.At.Sub(put[i]))/float64(time.Millisecond))
						last, seen = i, i
					}
				}
				return last
			}
			b.ResetTimer()
			next := time.Now()
			for i := range b.N {
				put[i] = time.Now()
				r.p.PutFrame([]pipeline.Sample{{Channel: id, Value: float64(i), Time: put[i]}})
				if bc.every == 0 {
					for take(<-c.got) != i {
					}
					continue
				}
				next = next.Add(bc.every)
				for wait := time.Until(next); wait > 0; wait = time.Until(next) {
					select {
					case m := <-c.got:
						take(m)
					case <-time.After(wait):
					}
				}
			}
			if bc.every > 0 { // the last value arrives once its interval has passed
				for seen != b.N-1 {
					take(<-c.got)
				}
			}
			b.StopTimer()
			slices.Sort(delays)
			q := func(p float64) float64 { return delays[min(len(delays)-1, int(p*float64(len(delays))))] }
			b.ReportMetric(q(0.5), "p50-ms")
			b.ReportMetric(q(0.99), "p99-ms")
			b.ReportMetric(float64(len(delays))/float64(b.N), "sent/sample")
		})
	}
}

// BenchmarkWarningToStream measures the delay from a warning event emitted
// into the running pipeline to its "warning" message read from the stream
// by an SSE client over HTTP, as p50 and p99 in milliseconds.
//
// go test -run '^$' -bench WarningToStream ./pipeline/console/
func BenchmarkWarningToStream(b *testing.B) {
	r := newRig(b, Config{QueueSize: 1 << 14}, false)
	c := r.connect()
	c.wait(b, "snapshot", 1)
	delays := make([]float64, 0, b.N)
	b.ResetTimer()
	for i := range b.N {
		name := "bench_rule_" + strconv.Itoa(i)
		at := time.Now()
		r.p.Emit(pipeline.Event{Kind: "warning_raised", Name: name, Start: at, End: at, Tags: map[string]string{"severity": "warning"}})
		for m := range c.got {
			if m.Event == "warning" && strings.Contains(string(m.Data), `"`+name+`"`) {
				delays = append(delays, float64(m.At.Sub(at))/float64(time.Millisecond))
				break
			}
		}
		r.p.Emit(pipeline.Event{Kind: "warning_cleared", Name: name, Start: at, End: time.Now()})
	}
	b.StopTimer()
	reportQuantiles(b, delays)
}

// BenchmarkWarningToBanner measures the delay from a warning event emitted
// into the running pipeline to its banner on the driver view in headless
// Chromium (the page notes, by its own clock on the same machine, when the
// banner's element first appears), as p50 and p99 in milliseconds; each
// warning is cleared and gone from the page before the next.
//
// go test -run '^$' -bench WarningToBanner -benchtime 50x ./pipeline/console/
func BenchmarkWarningToBanner(b *testing.B) {
	r := newRig(b, Config{}, false)
	f := r.feed()
	defer f.halt()
	pg := newPage(b, 390, 844)
	pg.do(chromedp.Navigate(r.http.URL + "/console/driver"))
	pg.until("the page is live", `document.querySelector('.fig[data-channel="engine_speed"]')?.dataset.state === "live"`, 10*time.Second)
	pg.do(chromedp.Evaluate[chromedp.Void](`window.shownAt = {};
		new MutationObserver(() => {
			for (const a of document.querySelectorAll('#alarms article[data-rule]')) window.shownAt[a.dataset.rule] ??= Date.now();
		}).observe(document.getElementById("alarms"), {childList: true, subtree: true, attributes: true})`))
	delays := make([]float64, 0, b.N)
	b.ResetTimer()
	for i := range b.N {
		name := "bench_rule_" + strconv.Itoa(i)
		at := time.Now()
		r.p.Emit(pipeline.Event{Kind: "warning_raised", Name: name, Start: at, End: at,
			Tags: map[string]string{"severity": "warning"}, Fields: map[string]float64{"value": 1, "limit": 0.5}})
		shown, err := chromedp.Run(pg.ctx, chromedp.Poll[int64](`window.shownAt["`+name+`"]`, chromedp.WithPollingTimeout(5*time.Second), chromedp.WithPollingInterval(5*time.Millisecond)))
		if err != nil {
			b.Fatalf("warning %s never shown: %v", name, err)
		}
		delays = append(delays, float64(time.UnixMilli(shown).Sub(at))/float64(time.Millisecond))
		r.p.Emit(pipeline.Event{Kind: "warning_cleared", Name: name, Start: at, End: time.Now()})
		pg.until("the banner goes", `document.querySelector('#alarms article') === null`, 5*time.Second)
	}
	b.StopTimer()
	reportQuantiles(b, delays)
}

func reportQuantiles(b *testing.B, delays []float64) {
	slices.Sort(delays)
	q := func(p float64) float64 { return delays[min(len(delays)-1, int(p*float64(len(delays))))] }
	b.ReportMetric(q(0.5), "p50-ms")
	b.ReportMetric(q(0.99), "p99-ms")
}
