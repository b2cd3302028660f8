package main

import (
	"bufio"
	"bytes"
	"context"
	"fmt"
	"io"
	"log/slog"
	"math"
	"net/http"
	"os"
	"os/exec"
	"regexp"
	"strings"
	"sync"
	"testing"
	"time"

	paho "github.com/eclipse/paho.mqtt.golang"
	dto "github.com/prometheus/client_model/go"
	"github.com/prometheus/common/expfmt"
	"github.com/prometheus/common/model"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline/interop"
)

// syncBuffer is a goroutine-safe writer for the daemon's stdout.
type syncBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (s *syncBuffer) Write(p []byte) (int, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.Write(p)
}

func (s *syncBuffer) String() string {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.String()
}

var urlRE = regexp.MustCompile(`metrics:\s+https?://(\S+)/metrics`)
var mqttRE = regexp.MustCompile(`mqtt:\s+mqtt://(\S+)\s`)

// startDemo runs the demo daemon on free ports at the given time scale and
// returns the metrics and broker addresses.
func startDemo(t *testing.T, ctx context.Context, scale float64, mutate func(*config.Config)) (httpAddr, mqttAddr string, done <-chan error) {
	t.Helper()
	cfg, err := config.Parse("demo.yaml", demoConfig)
	if err != nil {
		t.Fatal(err)
	}
	cfg.HTTP.Listen = "127.0.0.1:0"
	cfg.MQTT.Listen = "127.0.0.1:0"
	cfg.Sim.TimeScale = scale
	cfg.StateDir = t.TempDir() // no turbo state or outbox shared between tests
	if mutate != nil {
		mutate(cfg)
	}
	out := &syncBuffer{}
	errc := make(chan error, 1)
	log := slog.New(slog.NewTextHandler(io.Discard, nil))
	if testing.Verbose() {
		log = slog.New(slog.NewTextHandler(os.Stderr, nil))
	}
	go func() { errc <- runDaemon(ctx, cfg, out, log) }()
	deadline := time.Now().Add(10 * time.Second)
	for time.Now().Before(deadline) {
		s := out.String()
		if m := urlRE.FindStringSubmatch(s); m != nil {
			httpAddr = m[1]
			if mm := mqttRE.FindStringSubmatch(s); mm != nil {
				mqttAddr = mm[1]
			}
			if !strings.Contains(s, "advisory only") {
				t.Errorf("start-up output lacks the safety notice:\n%s", s)
			}
			return httpAddr, mqttAddr, errc
		}
		select {
		case err := <-errc:
			t.Fatalf("daemon stopped early: %v\n%s", err, s)
		case <-time.After(20 * time.Millisecond):
		}
	}
	t.Fatalf("daemon did not print its addresses:\n%s", out.String())
	return
}

func scrape(t *testing.T, addr string) (map[string]*dto.MetricFamily, []byte) {
	t.Helper()
	resp, err := http.Get("http://" + addr + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	body, err := io.ReadAll(resp.Body)
	if err != nil {
		t.Fatal(err)
	}
	p := expfmt.NewTextParser(model.UTF8Validation)
	fams, err := p.TextToMetricFamilies(bytes.NewReader(body))
	if err != nil {
		t.Fatalf("exposition does not parse: %v", err)
	}
	return fams, body
}

func gauge(fams map[string]*dto.MetricFamily, name, sensor string) (float64, bool) {
	f, ok := fams[name]
	if !ok {
		return 0, false
	}
	for _, m := range f.Metric {
		for _, l := range m.Label {
			if l.GetName() == "sensor" && l.GetValue() == sensor {
				return m.GetGauge().GetValue(), true
			}
		}
	}
	return 0, false
}

// TestDemoEndToEnd: simulator → pty → serial driver → pipeline → embedded
// broker → a paho subscriber, and /metrics parsed with the expfmt parser.
func TestDemoEndToEnd(t *testing.T) {
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	// Run the drive cycle at 4× so that one test sees idle and a pull.
	httpAddr, mqttAddr, done := startDemo(t, ctx, 4, nil)

	var mu sync.Mutex
	topics := map[string]int{}
	opts := paho.NewClientOptions().AddBroker("tcp://" + mqttAddr).SetClientID("e2e-reader")
	c := paho.NewClient(opts)
	if tok := c.Connect(); !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		t.Fatalf("connect: %v", tok.Error())
	}
	defer c.Disconnect(100)
	tok := c.Subscribe("plenum/#", 0, func(_ paho.Client, m paho.Message) {
		mu.Lock()
		topics[m.Topic()]++
		mu.Unlock()
	})
	if !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		t.Fatalf("subscribe: %v", tok.Error())
	}
	// A read-only client must not be able to publish data: the broker refuses
	// and drops that client (MQTT 3.1.1 has no other way to say no).
	intruder := paho.NewClient(paho.NewClientOptions().AddBroker("tcp://" + mqttAddr).SetClientID("e2e-intruder").SetAutoReconnect(false))
	if tok := intruder.Connect(); !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		t.Fatalf("intruder connect: %v", tok.Error())
	}
	intruder.Publish("plenum/brackenfell-rs/ch/manifold_pressure", 1, false, "666").WaitTimeout(time.Second)

	seen := map[string][]float64{}
	deadline := time.Now().Add(30 * time.Second)
	for time.Now().Before(deadline) {
		fams, _ := scrape(t, httpAddr)
		for _, k := range []struct{ name, sensor string }{
			{"plenum_mass_flow_grams_per_second", "speed_density"},
			{"plenum_relative_pressure_pascals", "boost"},
			{"plenum_lambda_ratio", "wideband"},
		} {
			if v, ok := gauge(fams, k.name, k.sensor); ok {
				seen[k.name] = append(seen[k.name], v)
			}
		}
		if spans(seen["plenum_mass_flow_grams_per_second"], 30) && spans(seen["plenum_relative_pressure_pascals"], 60000) && spans(seen["plenum_lambda_ratio"], 0.1) {
			break
		}
		time.Sleep(250 * time.Millisecond)
	}
	// Idle to a pull: air mass flow from a few g/s to over 30 g/s more, boost
	// from manifold vacuum to over 60 kPa more, lambda from 1 to rich.
	for n, span := range map[string]float64{"plenum_mass_flow_grams_per_second": 30, "plenum_relative_pressure_pascals": 60000, "plenum_lambda_ratio": 0.1} {
		if !spans(seen[n], span) {
			t.Errorf("%s did not change by %g as the drive cycle ran: %v", n, span, seen[n])
		}
	}
	fams, _ := scrape(t, httpAddr)
	if f := fams["plenum_source_up"]; f == nil || len(f.Metric) != 2 || f.Metric[0].GetGauge().GetValue() != 1 || f.Metric[1].GetGauge().GetValue() != 1 {
		t.Errorf("plenum_source_up should be 1 for both the serial and the OBD source: %v", f)
	}
	// The ECU's view and the microcontroller's view of the same engine agree:
	// barometric pressure (static) within the 1 kPa resolution of PID 0x33
	// plus the simulated sensor noise.
	serialBaro, ok1 := gauge(fams, "plenum_pressure_pascals", "barometric")
	ecuBaro, ok2 := gauge(fams, "plenum_pressure_pascals", "ecu_barometric_pressure")
	if !ok1 || !ok2 || math.Abs(serialBaro-ecuBaro) > 1500 {
		t.Errorf("barometric pressure: serial %v (%v), OBD %v (%v)", serialBaro, ok1, ecuBaro, ok2)
	}

	mu.Lock()
	got := fmt.Sprint(topics)
	nCh := topics["plenum/brackenfell-rs/ch/manifold_pressure"]
	nSnap := topics["plenum/brackenfell-rs/snapshot"]
	nStatus := topics["plenum/brackenfell-rs/status"]
	mu.Unlock()
	if nCh == 0 || nSnap == 0 || nStatus == 0 {
		t.Errorf("subscriber to plenum/# missed channel, snapshot or status topics: %s", got)
	}
	cancel()
	select {
	case err := <-done:
		if err != nil {
			t.Fatalf("daemon returned %v on shutdown", err)
		}
	case <-time.After(10 * time.Second):
		t.Fatal("daemon did not shut down")
	}
}

// spans reports whether the values cover a range of at least d.
func spans(v []float64, d float64) bool {
	if len(v) < 2 {
		return false
	}
	lo, hi := v[0], v[0]
	for _, x := range v {
		lo, hi = min(lo, x), max(hi, x)
	}
	return hi-lo >= d
}

// TestMosquittoInterop publishes through Debian's mosquitto as the external
// broker and reads back with mosquitto_sub.
func TestMosquittoInterop(t *testing.T) {
	paths := interop.Need(t, "mosquitto mosquitto-clients", "mosquitto", "mosquitto_sub")
	mq := interop.StartMosquitto(t, paths[0], "allow_anonymous true\n")
	port := mq.Port

	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	_, _, done := startDemo(t, ctx, 4, func(c *config.Config) {
		c.MQTT.Broker = fmt.Sprintf("tcp://127.0.0.1:%d", port)
	})
	sub := exec.Command(paths[1], "-h", "127.0.0.1", "-p", fmt.Sprint(port), "-t", "plenum/brackenfell-rs/#", "-v", "-C", "40", "-W", "20")
	out, err := sub.Output()
	if err != nil {
		t.Fatalf("mosquitto_sub: %v\n%s\nbroker log:\n%s", err, out, mq.Output())
	}
	sc := bufio.NewScanner(bytes.NewReader(out))
	n := 0
	var sawMAP, sawStatus bool
	for sc.Scan() {
		line := sc.Text()
		n++
		sawMAP = sawMAP || strings.HasPrefix(line, "plenum/brackenfell-rs/ch/manifold_pressure {\"v\":")
		sawStatus = sawStatus || strings.HasPrefix(line, "plenum/brackenfell-rs/status ")
	}
	if n < 40 || !sawMAP || !sawStatus {
		t.Fatalf("mosquitto_sub got %d lines, MAP %v, status %v:\n%s", n, sawMAP, sawStatus, out)
	}
	cancel()
	<-done
}

// TestPromtoolChecksScrape runs promtool check metrics on a real scrape, and
// promtool check rules on the shipped alert rules.
func TestPromtoolChecksScrape(t *testing.T) {
	interop.Need(t, "prometheus", "promtool")
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	httpAddr, _, done := startDemo(t, ctx, 4, nil)
	time.Sleep(2 * time.Second)
	_, body := scrape(t, httpAddr)
	cmd := exec.Command("promtool", "check", "metrics")
	cmd.Stdin = bytes.NewReader(body)
	if out, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("promtool check metrics: %v\n%s", err, out)
	}
	if out, err := exec.Command("promtool", "check", "rules", "../../deploy/prometheus/plenum-rules.yml").CombinedOutput(); err != nil {
		t.Fatalf("promtool check rules: %v\n%s", err, out)
	}
	cancel()
	<-done
}
