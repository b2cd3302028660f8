package tsdbpush

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math"
	"net/http"
	"net/http/httptest"
	"net/http/httputil"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"sort"
	"strconv"
	"sync/atomic"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/interop"
	"github.com/plenum-engine/plenum/pipeline/record"
)

// The integration tests push a run recorded by the real recorder to Debian's
// servers: influxd (package influxdb, InfluxDB 1.6) and victoria-metrics
// (package victoria-metrics), each started on a free loopback port with its
// data in t.TempDir() and killed at the end.

const itSamples = 20000

// point is what the recorder was given for one sample.
type point struct {
	channel string
	ns      int64
	value   float64
	quality string
}

// recordRun records itSamples samples on three channels with the real
// recorder and returns the run's line protocol and what was written.
func recordRun(t *testing.T) ([]byte, []point) {
	t.Helper()
	reg := pipeline.NewRegistry()
	var ids []pipeline.ChannelID
	var names []string
	for _, c := range []struct{ name, source string }{
		{"manifold_pressure", "mcu"}, {"intake_air_temp", "mcu"}, {"engine_speed", "obd"},
	} {
		ch, ok := pipeline.Standard(c.name)
		if !ok {
			t.Fatalf("no standard channel %s", c.name)
		}
		ch.Source = c.source
		id, err := reg.Register(ch)
		if err != nil {
			t.Fatal(err)
		}
		ids, names = append(ids, id), append(names, c.name)
	}
	dir := t.TempDir()
	r, err := record.Open(record.Config{Dir: dir, Run: "it1", Vehicle: "v1"}, reg)
	if err != nil {
		t.Fatal(err)
	}
	// Whole milliseconds: VictoriaMetrics keeps millisecond timestamps.
	base := time.UnixMilli(1700000000000)
	var want []point
	for i := range itSamples {
		k := i % 3
		x := float64(i)
		v := [3]float64{
			101325 + 5000*math.Sin(x),
			25 + 10*math.Sin(x*0.37) + 1e-9*x,
			3000 + 2500*math.Sin(x*0.01) + math.Sqrt(x),
		}[k]
		q := pipeline.OK
		switch {
		case i%211 == 0:
			q = pipeline.SensorFault
		case i%97 == 0:
			q = pipeline.OutOfRange
		case i%50 == 0:
			q = pipeline.Stale
		}
		ts := base.Add(time.Duration(i) * time.Millisecond)
		r.Write(pipeline.Sample{Channel: ids[k], Quality: q, Time: ts, Value: v})
		want = append(want, point{channel: names[k], ns: ts.UnixNano(), value: v, quality: q.String()})
		if i%5000 == 4999 {
			if err := r.Sync(); err != nil {
				t.Fatal(err)
			}
		}
	}
	if err := r.Close(); err != nil {
		t.Fatal(err)
	}
	if r.Points() != itSamples || r.Failed() != 0 {
		t.Fatalf("recorder wrote %d points, refused %d", r.Points(), r.Failed())
	}
	files, _ := filepath.Glob(filepath.Join(r.Dir(), "*.lp"))
	sort.Strings(files)
	var lp []byte
	for _, f := range files {
		b, err := os.ReadFile(f)
		if err != nil {
			t.Fatal(err)
		}
		lp = append(lp, b...)
	}
	if n := bytes.Count(lp, []byte{'\n'}); n != itSamples {
		t.Fatalf("recording has %d lines, want %d", n, itSamples)
	}
	return lp, want
}

// push sends lp through a Pusher to writeURL and waits until all its lines
// are sent.
func push(t *testing.T, writeURL string, lp []byte, gz bool) Stats {
	t.Helper()
	p, err := Open(Config{
		URL: writeURL, Dir: t.TempDir(), Gzip: gz,
		BatchLines: 5000, FlushEvery: 20 * time.Millisecond,
		MinBackoff: 10 * time.Millisecond, MaxBackoff: 100 * time.Millisecond,
		Logger: slog.New(slog.NewTextHandler(io.Discard, nil)),
	})
	if err != nil {
		t.Fatal(err)
	}
	// Hand the recording over in pieces of whole lines, as the recorder's
	// syncs would.
	for rest := lp; len(rest) > 0; {
		n := bytes.LastIndexByte(rest[:min(len(rest), 64<<10)], '\n') + 1 // whole lines
		if err := p.Append(rest[:n]); err != nil {
			t.Fatal(err)
		}
		rest = rest[n:]
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- p.Run(ctx) }()
	want := uint64(bytes.Count(lp, []byte{'\n'}))
	deadline := time.Now().Add(60 * time.Second)
	for p.Stats().SentLines < want && time.Now().Before(deadline) {
		time.Sleep(10 * time.Millisecond)
	}
	cancel()
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	if err := p.Close(); err != nil {
		t.Fatal(err)
	}
	st := p.Stats()
	if st.SentLines != want || st.BacklogBytes != 0 || st.RejectedBatches != 0 || st.DroppedLines != 0 {
		t.Fatalf("push incomplete: %+v", st)
	}
	return st
}

// flakyAck forwards every request to target but answers 503 to the client
// for every third one the server did accept, so the Pusher resends a batch
// the server already stored: the retry case.
func flakyAck(t *testing.T, target string) (*httptest.Server, *atomic.Int64) {
	u, err := url.Parse(target)
	if err != nil {
		t.Fatal(err)
	}
	var n, lied atomic.Int64
	rp := httputil.NewSingleHostReverseProxy(u)
	rp.ModifyResponse = func(r *http.Response) error {
		if r.StatusCode/100 == 2 && n.Add(1)%3 == 1 {
			lied.Add(1)
			r.StatusCode = http.StatusServiceUnavailable
			r.Status = "503 Service Unavailable"
		}
		return nil
	}
	srv := httptest.NewServer(rp)
	t.Cleanup(srv.Close)
	return srv, &lied
}

// startServer runs bin until the test ends and waits for ready to answer
// want.
func startServer(t *testing.T, bin string, ready string, want int, args ...string) {
	t.Helper()
	logf, err := os.Create(filepath.Join(t.TempDir(), filepath.Base(bin)+".log"))
	if err != nil {
		t.Fatal(err)
	}
	cmd := exec.Command(bin, args...)
	cmd.Stdout, cmd.Stderr = logf, logf
	if err := cmd.Start(); err != nil {
		t.Fatalf("start %s: %v", bin, err)
	}
	exited := make(chan struct{})
	go func() { cmd.Wait(); close(exited) }()
	t.Cleanup(func() {
		cmd.Process.Kill()
		<-exited
		logf.Close()
	})
	deadline := time.Now().Add(30 * time.Second)
	for {
		resp, err := http.Get(ready)
		if err == nil {
			resp.Body.Close()
			if resp.StatusCode == want {
				return
			}
		}
		select {
		case <-exited:
			b, _ := os.ReadFile(logf.Name())
			t.Fatalf("%s exited: %s", bin, b)
		default:
		}
		if time.Now().After(deadline) {
			t.Fatalf("%s not ready at %s: %v", bin, ready, err)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

func getJSON(t *testing.T, u string, v any) {
	t.Helper()
	resp, err := http.Get(u)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	if resp.StatusCode != 200 {
		t.Fatalf("GET %s: %d %s", u, resp.StatusCode, b)
	}
	d := json.NewDecoder(bytes.NewReader(b))
	d.UseNumber() // nanosecond times do not fit a float64
	if err := d.Decode(v); err != nil {
		t.Fatalf("GET %s: %v in %.300s", u, err, b)
	}
}

type influxResult struct {
	Results []struct {
		Error  string `json:"error"`
		Series []struct {
			Columns []string            `json:"columns"`
			Values  [][]json.RawMessage `json:"values"`
		} `json:"series"`
	} `json:"results"`
}

func influxQuery(t *testing.T, base, db, q string) influxResult {
	t.Helper()
	var r influxResult
	getJSON(t, base+"/query?"+url.Values{"db": {db}, "epoch": {"ns"}, "q": {q}}.Encode(), &r)
	if len(r.Results) == 0 || r.Results[0].Error != "" {
		t.Fatalf("query %q: %+v", q, r)
	}
	return r
}

func influxCount(t *testing.T, base, db string) int64 {
	r := influxQuery(t, base, db, "SELECT count(value) FROM plenum")
	if len(r.Results[0].Series) == 0 {
		return 0
	}
	n, err := strconv.ParseInt(string(r.Results[0].Series[0].Values[0][1]), 10, 64)
	if err != nil {
		t.Fatal(err)
	}
	return n
}

func TestIntegrationInfluxDB1(t *testing.T) {
	bin := interop.Need(t, "influxdb", "influxd")[0]
	start := time.Now()
	dir := t.TempDir()
	httpPort, rpcPort := interop.FreePort(t), interop.FreePort(t)
	conf := fmt.Sprintf(`reporting-disabled = true
bind-address = "127.0.0.1:%d"
[meta]
  dir = %q
  logging-enabled = false
[data]
  dir = %q
  wal-dir = %q
  query-log-enabled = false
[coordinator]
  max-select-point = 0
[http]
  bind-address = "127.0.0.1:%d"
  log-enabled = false
  max-row-limit = 0
[monitor]
  store-enabled = false
[continuous_queries]
  enabled = false
[subscriber]
  enabled = false
`, rpcPort, filepath.Join(dir, "meta"), filepath.Join(dir, "data"), filepath.Join(dir, "wal"), httpPort)
	cpath := filepath.Join(dir, "influxdb.conf")
	if err := os.WriteFile(cpath, []byte(conf), 0o644); err != nil {
		t.Fatal(err)
	}
	base := fmt.Sprintf("http://127.0.0.1:%d", httpPort)
	startServer(t, bin, base+"/ping", http.StatusNoContent, "run", "-config", cpath)
	for _, db := range []string{"plenum", "plenum_retry"} {
		resp, err := http.PostForm(base+"/query", url.Values{"q": {"CREATE DATABASE " + db}})
		if err != nil {
			t.Fatal(err)
		}
		resp.Body.Close()
	}
	lp, want := recordRun(t)

	t.Run("values", func(t *testing.T) {
		push(t, base+"/write?db=plenum&precision=ns", lp, true)
		if n := influxCount(t, base, "plenum"); n != itSamples {
			t.Fatalf("count(value) = %d, want %d", n, itSamples)
		}
		byChan := map[string][]point{}
		for _, p := range want {
			byChan[p.channel] = append(byChan[p.channel], p)
		}
		for ch, pts := range byChan {
			r := influxQuery(t, base, "plenum",
				fmt.Sprintf("SELECT value, quality, vehicle, run FROM plenum WHERE channel='%s'", ch))
			rows := r.Results[0].Series[0].Values
			if len(rows) != len(pts) {
				t.Fatalf("%s: %d rows, want %d", ch, len(rows), len(pts))
			}
			for i, row := range rows {
				ns, err1 := strconv.ParseInt(string(row[0]), 10, 64)
				v, err2 := strconv.ParseFloat(string(row[1]), 64)
				var q, veh, run string
				err3 := json.Unmarshal(row[2], &q)
				err4 := json.Unmarshal(row[3], &veh)
				err5 := json.Unmarshal(row[4], &run)
				if err := errors.Join(err1, err2, err3, err4, err5); err != nil {
					t.Fatalf("%s row %d: %v", ch, i, err)
				}
				w := pts[i]
				if ns != w.ns || math.Float64bits(v) != math.Float64bits(w.value) ||
					q != w.quality || veh != "v1" || run != "it1" {
					t.Fatalf("%s row %d: got %d %v %s %s %s, want time %d value %v quality %s",
						ch, i, ns, v, q, veh, run, w.ns, w.value, w.quality)
				}
			}
		}
	})

	t.Run("retry does not duplicate", func(t *testing.T) {
		proxy, lied := flakyAck(t, base)
		st := push(t, proxy.URL+"/write?db=plenum_retry&precision=ns", lp, false)
		if lied.Load() == 0 || st.Retries < uint64(lied.Load()) {
			t.Fatalf("no batch was resent: lied %d times, %d retries", lied.Load(), st.Retries)
		}
		if n := influxCount(t, base, "plenum_retry"); n != itSamples {
			t.Fatalf("after %d resent batches count(value) = %d, want %d", lied.Load(), n, itSamples)
		}
		t.Logf("%d batches stored twice by the server, count still %d", lied.Load(), itSamples)
	})
	t.Logf("InfluxDB 1.x integration took %v", time.Since(start).Round(time.Millisecond))
}

// vmSeries is one line of /api/v1/export.
type vmSeries struct {
	Metric     map[string]string `json:"metric"`
	Values     []json.Number     `json:"values"`
	Timestamps []int64           `json:"timestamps"`
}

func vmExport(t *testing.T, base, match string) []vmSeries {
	t.Helper()
	if resp, err := http.Get(base + "/internal/force_flush"); err == nil {
		resp.Body.Close()
	}
	resp, err := http.Get(base + "/api/v1/export?" + url.Values{"match[]": {match}}.Encode())
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	var out []vmSeries
	sc := bufio.NewScanner(resp.Body)
	sc.Buffer(nil, 64<<20)
	for sc.Scan() {
		var s vmSeries
		d := json.NewDecoder(bytes.NewReader(sc.Bytes()))
		d.UseNumber()
		if err := d.Decode(&s); err != nil {
			t.Fatalf("export line %.200s: %v", sc.Bytes(), err)
		}
		out = append(out, s)
	}
	return out
}

func vmCount(ss []vmSeries) int {
	n := 0
	for _, s := range ss {
		n += len(s.Values)
	}
	return n
}

// vmRelTol: VictoriaMetrics stores a value as a decimal mantissa and
// exponent and exports about 12 significant digits (101.32584147098481
// comes back as 101.3258414709), so values are compared with a relative
// tolerance; InfluxDB above is compared bit for bit.
const vmRelTol = 1e-11

func TestIntegrationVictoriaMetrics(t *testing.T) {
	bin := interop.Need(t, "victoria-metrics", "victoria-metrics")[0]
	start := time.Now()
	port := interop.FreePort(t)
	base := fmt.Sprintf("http://127.0.0.1:%d", port)
	startServer(t, bin, base+"/health", http.StatusOK,
		"-storageDataPath="+t.TempDir(),
		fmt.Sprintf("-httpListenAddr=127.0.0.1:%d", port),
		"-search.latencyOffset=0",
		"-dedup.minScrapeInterval=1ms", // a resent sample (same series, same ms) is kept once
		"-retentionPeriod=100y",        // the samples are dated 2023
	)
	lp, want := recordRun(t)

	waitCount := func(match string) []vmSeries {
		var ss []vmSeries
		for deadline := time.Now().Add(20 * time.Second); time.Now().Before(deadline); time.Sleep(100 * time.Millisecond) {
			if ss = vmExport(t, base, match); vmCount(ss) >= itSamples {
				break
			}
		}
		return ss
	}

	t.Run("values", func(t *testing.T) {
		push(t, base+"/write?db=plenum&precision=ns", lp, true)
		ss := waitCount(`plenum_value{db="plenum"}`)
		if n := vmCount(ss); n != itSamples {
			t.Fatalf("exported %d samples, want %d", n, itSamples)
		}
		byChan := map[string][]point{}
		for _, p := range want {
			byChan[p.channel] = append(byChan[p.channel], p)
		}
		worst := 0.0
		for _, s := range ss {
			pts := byChan[s.Metric["channel"]]
			if len(pts) != len(s.Values) || s.Metric["vehicle"] != "v1" || s.Metric["run"] != "it1" {
				t.Fatalf("series %v: %d samples, want %d", s.Metric, len(s.Values), len(pts))
			}
			for i, vn := range s.Values {
				v, err := strconv.ParseFloat(vn.String(), 64)
				if err != nil {
					t.Fatal(err)
				}
				w := pts[i]
				rel := math.Abs(v-w.value) / math.Abs(w.value)
				worst = max(worst, rel)
				if s.Timestamps[i] != w.ns/1e6 || rel > vmRelTol {
					t.Fatalf("%s sample %d: got %v at %d ms, want %v at %d ms", w.channel, i, v, s.Timestamps[i], w.value, w.ns/1e6)
				}
			}
		}
		t.Logf("largest relative value difference %.3g (tolerance %g)", worst, vmRelTol)
	})

	t.Run("a demo recording, channel by channel", func(t *testing.T) {
		// The golden run: a whole demo cycle recorded by the daemon, with
		// derived channels computed from serial frames and ECU answers.
		const golden = "../../testdata/golden-run/0001.lp.gz"
		rec, err := record.ReadAll([]string{golden})
		if err != nil {
			t.Fatal(err)
		}
		type msKey struct {
			k  uint32
			ms int64
		}
		lines := map[record.SeriesKey]int{}
		distinct := map[record.SeriesKey]int{}
		seen := map[msKey]bool{}
		for _, p := range rec.Points {
			k := rec.Keys[p.Key]
			lines[k]++
			if mk := (msKey{p.Key, p.NS / 1e6}); !seen[mk] {
				seen[mk] = true
				distinct[k]++
			}
		}
		raw, err := record.ReadFile(golden)
		if err != nil {
			t.Fatal(err)
		}
		push(t, base+"/write?db=plenum_golden&precision=ns", raw, true)
		var ss []vmSeries
		for deadline := time.Now().Add(20 * time.Second); time.Now().Before(deadline); time.Sleep(100 * time.Millisecond) {
			if ss = vmExport(t, base, `plenum_value{db="plenum_golden"}`); vmCount(ss) >= len(seen) {
				break
			}
		}
		got := map[record.SeriesKey]int{}
		for _, s := range ss {
			got[record.SeriesKey{Channel: s.Metric["channel"], Source: s.Metric["source"]}] += len(s.Values)
		}
		merged := 0
		for k, n := range lines {
			// Every recorded line is one stored point. VictoriaMetrics keeps
			// milliseconds: two values of one series less than 1 ms apart (a
			// derived channel computed from a serial line and, a fraction of
			// a millisecond later, an ECU answer) would become one there,
			// while the recording and InfluxDB keep both; the log line says
			// how many this recording has.
			if got[k] != n {
				t.Errorf("%s from %s: %d points stored, %d recorded lines (%d distinct milliseconds)", k.Channel, k.Source, got[k], n, distinct[k])
			}
			merged += n - distinct[k]
		}
		if len(got) != len(lines) {
			t.Errorf("%d series stored, %d recorded", len(got), len(lines))
		}
		t.Logf("%d series, %d points; %d recorded values share a millisecond with another of their series", len(lines), len(rec.Points), merged)
	})

	t.Run("retry does not duplicate", func(t *testing.T) {
		proxy, lied := flakyAck(t, base)
		st := push(t, proxy.URL+"/write?db=plenum_retry&precision=ns", lp, false)
		if lied.Load() == 0 || st.Retries < uint64(lied.Load()) {
			t.Fatalf("no batch was resent: lied %d times, %d retries", lied.Load(), st.Retries)
		}
		ss := waitCount(`plenum_value{db="plenum_retry"}`)
		time.Sleep(200 * time.Millisecond) // a duplicate would show now
		if n := vmCount(vmExport(t, base, `plenum_value{db="plenum_retry"}`)); n != itSamples || vmCount(ss) != itSamples {
			t.Fatalf("after %d resent batches %d samples, want %d", lied.Load(), n, itSamples)
		}
		t.Logf("%d batches stored twice by the server, %d samples after dedup", lied.Load(), itSamples)
	})
	t.Logf("VictoriaMetrics integration took %v", time.Since(start).Round(time.Millisecond))
}
