package main

import (
	"bytes"
	"compress/gzip"
	"context"
	"crypto/rand"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net"
	"net/http"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"runtime"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	paho "github.com/eclipse/paho.mqtt.golang"
	"github.com/influxdata/line-protocol/v2/lineprotocol"
	dto "github.com/prometheus/client_model/go"
	"github.com/prometheus/common/expfmt"
	"github.com/prometheus/common/model"
	"go.yaml.in/yaml/v3"

	"github.com/plenum-engine/plenum/pipeline/interop"
	"github.com/plenum-engine/plenum/pipeline/mqttpub"
	"github.com/plenum-engine/plenum/pipeline/record"
)

// The workshop of deploy/workshop: many cars, one mosquitto with the
// workshop's users and ACL, one VictoriaMetrics receiving every car's runs,
// one Prometheus with the workshop's rules.

const workshopDir = "../../deploy/workshop"

// TestWorkshopCarConfigChecks: the example car configuration of the
// workshop passes `plenum check`.
func TestWorkshopCarConfigChecks(t *testing.T) {
	var out, errb bytes.Buffer
	if code := run([]string{"check", "-config", filepath.Join(workshopDir, "car01.yaml")}, &out, &errb); code != 0 {
		t.Fatalf("check deploy/workshop/car01.yaml exited %d: %s", code, errb.String())
	}
}

// TestWorkshopPrometheusFiles checks the workshop's Prometheus configuration
// (with its targets file and rules) and runs the rules' unit tests.
func TestWorkshopPrometheusFiles(t *testing.T) {
	promtool := interop.Need(t, "prometheus", "promtool")[0]
	for _, args := range [][]string{
		{"check", "config", "prometheus.yml"},
		{"check", "rules", "workshop-rules.yml"},
		{"test", "rules", "workshop-rules.test.yml"},
	} {
		cmd := exec.Command(promtool, args...)
		cmd.Dir = workshopDir
		out, err := cmd.CombinedOutput()
		if err != nil {
			t.Errorf("promtool %s: %v\n%s", strings.Join(args, " "), err, out)
		}
	}
}

// bgProc is a program started by a test, with its output kept.
type bgProc struct {
	name string
	cmd  *exec.Cmd
	out  *syncBuffer
	done chan struct{} // closed when it has exited; then err is its Wait error
	err  error
}

// startBg starts bin with args; it is killed at the end of the test if it
// is still running.
func startBg(t *testing.T, name, bin string, args ...string) *bgProc {
	t.Helper()
	p := &bgProc{name: name, cmd: exec.Command(bin, args...), out: &syncBuffer{}, done: make(chan struct{})}
	p.cmd.Stdout, p.cmd.Stderr = p.out, p.out
	if err := p.cmd.Start(); err != nil {
		t.Fatalf("start %s: %v", name, err)
	}
	go func() { p.err = p.cmd.Wait(); close(p.done) }()
	t.Cleanup(func() {
		select {
		case <-p.done:
		default:
			p.cmd.Process.Kill()
			<-p.done
		}
	})
	return p
}

// stop sends SIGTERM and waits for the exit; it fails t if the program is
// still running after limit or exits with an error.
func (p *bgProc) stop(t *testing.T, limit time.Duration) {
	t.Helper()
	p.cmd.Process.Signal(syscall.SIGTERM)
	select {
	case <-p.done:
	case <-time.After(limit):
		t.Fatalf("%s still running %v after SIGTERM:\n%s", p.name, limit, tail(p.out.String(), 3000))
	}
	if p.err != nil {
		t.Errorf("%s exited with %v:\n%s", p.name, p.err, tail(p.out.String(), 3000))
	}
}

func (p *bgProc) exited() bool {
	select {
	case <-p.done:
		return true
	default:
		return false
	}
}

func tail(s string, n int) string {
	if len(s) > n {
		return "…" + s[len(s)-n:]
	}
	return s
}

// waitUntil polls cond every 50 ms until it holds; it fails t after limit,
// describing what it waited for and, from last, what it saw.
func waitUntil(t *testing.T, limit time.Duration, what string, cond func() (bool, string)) {
	t.Helper()
	deadline := time.Now().Add(limit)
	for {
		ok, last := cond()
		if ok {
			return
		}
		if time.Now().After(deadline) {
			t.Fatalf("timed out after %v waiting for %s; last: %s", limit, what, last)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// buildPlenum builds this package's binary once into a temporary directory.
func buildPlenum(t *testing.T) string {
	t.Helper()
	gobin, err := exec.LookPath("go")
	if err != nil {
		gobin = filepath.Join(runtime.GOROOT(), "bin", "go")
	}
	bin := filepath.Join(t.TempDir(), "plenum")
	cmd := exec.Command(gobin, "build", "-o", bin, ".")
	if out, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("go build: %v\n%s", err, out)
	}
	return bin
}

// workshopBrokerConf is deploy/workshop/mosquitto.conf with the lines of
// the keys in set replaced (the first of each; later ones dropped): the
// shipped configuration on a test's port and paths. A key the file lacks
// fails t, so the test follows the file.
func workshopBrokerConf(t *testing.T, set map[string]string) string {
	t.Helper()
	src, err := os.ReadFile(filepath.Join(workshopDir, "mosquitto.conf"))
	if err != nil {
		t.Fatal(err)
	}
	seen := map[string]bool{}
	var b strings.Builder
	for _, line := range strings.Split(string(src), "\n") {
		if f := strings.Fields(line); len(f) > 0 {
			if v, ok := set[f[0]]; ok {
				if seen[f[0]] {
					continue
				}
				seen[f[0]] = true
				line = f[0] + " " + v
			}
		}
		b.WriteString(line + "\n")
	}
	for k := range set {
		if !seen[k] {
			t.Fatalf("deploy/workshop/mosquitto.conf has no %s line", k)
		}
	}
	return b.String()
}

func randomPassword(t *testing.T) string {
	b := make([]byte, 12)
	if _, err := rand.Read(b); err != nil {
		t.Fatal(err)
	}
	return hex.EncodeToString(b)
}

// tryScrape reads a daemon's /metrics.
func tryScrape(addr string) (map[string]*dto.MetricFamily, error) {
	c := http.Client{Timeout: 5 * time.Second}
	resp, err := c.Get("http://" + addr + "/metrics")
	if err != nil {
		return nil, err
	}
	defer resp.Body.Close()
	if resp.StatusCode != 200 {
		return nil, fmt.Errorf("GET /metrics: %s", resp.Status)
	}
	p := expfmt.NewTextParser(model.UTF8Validation)
	return p.TextToMetricFamilies(resp.Body)
}

// familySum is the sum of every series of a gauge, counter or untyped
// family, and whether the family exists.
func familySum(fams map[string]*dto.MetricFamily, name string) (float64, bool) {
	f, ok := fams[name]
	if !ok {
		return 0, false
	}
	s := 0.0
	for _, m := range f.Metric {
		switch {
		case m.Gauge != nil:
			s += m.Gauge.GetValue()
		case m.Counter != nil:
			s += m.Counter.GetValue()
		case m.Untyped != nil:
			s += m.Untyped.GetValue()
		}
	}
	return s, true
}

// residentBytes is VmRSS of a process.
func residentBytes(t *testing.T, pid int) int64 {
	t.Helper()
	b, err := os.ReadFile("/proc/" + strconv.Itoa(pid) + "/status")
	if err != nil {
		t.Fatal(err)
	}
	for _, line := range strings.Split(string(b), "\n") {
		if rest, ok := strings.CutPrefix(line, "VmRSS:"); ok {
			kb, err := strconv.ParseInt(strings.Fields(rest)[0], 10, 64)
			if err != nil {
				t.Fatal(err)
			}
			return kb << 10
		}
	}
	t.Fatalf("no VmRSS for pid %d", pid)
	return 0
}

// wallWatcher is a read-only wall account subscribed to plenum/#: it
// counts what arrives per vehicle and notes every message that crosses
// between cars or should not have arrived at all.
type wallWatcher struct {
	mu       sync.Mutex
	cars     map[string]bool
	total    int
	bytes    int // topics and payloads
	perCar   map[string]int
	snapshot map[string]bool
	online   map[string]bool
	markers  map[string]bool // payloads of the ACL probes that arrived
	crossed  []string        // what should not have arrived
}

func (w *wallWatcher) handle(_ paho.Client, m paho.Message) {
	w.mu.Lock()
	defer w.mu.Unlock()
	w.total++
	w.bytes += len(m.Topic()) + len(m.Payload())
	parts := strings.SplitN(m.Topic(), "/", 3)
	if len(parts) < 3 || parts[0] != "plenum" || !w.cars[parts[1]] {
		w.crossed = append(w.crossed, fmt.Sprintf("%s (no such car)", m.Topic()))
		return
	}
	car, rest := parts[1], parts[2]
	w.perCar[car]++
	if p := string(m.Payload()); strings.HasPrefix(p, "acl-probe") {
		w.markers[p] = true
	}
	switch {
	case rest == "status":
		var s mqttpub.Status
		if err := json.Unmarshal(m.Payload(), &s); err != nil || s.Vehicle != car {
			w.crossed = append(w.crossed, fmt.Sprintf("%s: %.200s", m.Topic(), m.Payload()))
		} else if s.State == "online" {
			w.online[car] = true
		}
	case rest == "snapshot":
		w.snapshot[car] = true
	case strings.HasPrefix(rest, "cmd/") || strings.HasPrefix(rest, "reply/"):
		w.crossed = append(w.crossed, m.Topic()+" (a wall account may not read commands)")
	}
}

func (w *wallWatcher) count() (messages, bytes int) {
	w.mu.Lock()
	defer w.mu.Unlock()
	return w.total, w.bytes
}

// wallTile is what the test reads of the console's fleet stream.
type wallTile struct {
	Name  string `json:"name"`
	State string `json:"state"`
	Stale bool   `json:"stale"`
}

// promQuery runs an instant PromQL query now on Prometheus or
// VictoriaMetrics and returns each result's value by the values of the
// labels by, joined with "/".
func promQuery(base, q string, by ...string) (map[string]float64, error) {
	u := base + "/api/v1/query?" + url.Values{"query": {q}, "nocache": {"1"}}.Encode()
	resp, err := http.Get(u)
	if err != nil {
		return nil, err
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	var r struct {
		Status string `json:"status"`
		Data   struct {
			Result []struct {
				Metric map[string]string `json:"metric"`
				Value  [2]any            `json:"value"`
			} `json:"result"`
		} `json:"data"`
	}
	if err := json.Unmarshal(b, &r); err != nil || r.Status != "success" {
		return nil, fmt.Errorf("query %s: %v %.300s", q, err, b)
	}
	out := map[string]float64{}
	for _, s := range r.Data.Result {
		str, _ := s.Value[1].(string)
		v, err := strconv.ParseFloat(str, 64)
		if err != nil {
			return nil, fmt.Errorf("query %s: value %v", q, s.Value)
		}
		key := make([]string, len(by))
		for i, l := range by {
			key[i] = s.Metric[l]
		}
		out[strings.Join(key, "/")] += v
	}
	return out, nil
}

// carRecording is what one car recorded, counted as VictoriaMetrics stores
// it: a sample is one series (measurement and tags) at one millisecond.
type carRecording struct {
	run         string
	bytes       int64 // of line protocol
	lines       int   // "plenum" lines: one sample each
	distinct    int   // their distinct (series, millisecond)
	series      int   // their distinct series
	eventLines  int
	eventsMS    int // distinct (event series, millisecond)
	badIdentity []string
}

// readCarRecording reads the one run a car recorded under dir.
func readCarRecording(t *testing.T, dir, vehicle string) carRecording {
	t.Helper()
	runs, _ := filepath.Glob(filepath.Join(dir, "*", "run.json"))
	if len(runs) != 1 {
		t.Fatalf("%s: %d runs recorded, want 1", dir, len(runs))
	}
	rc := carRecording{run: filepath.Base(filepath.Dir(runs[0]))}
	files, err := record.DataFiles(filepath.Dir(runs[0])) // .lp, or .lp.gz once compressed
	if err != nil {
		t.Fatal(err)
	}
	type key struct {
		series string
		ms     int64
	}
	seen := map[key]bool{}
	series := map[string]bool{}
	for _, f := range files {
		b, err := record.ReadFile(f)
		if err != nil {
			t.Fatal(err)
		}
		rc.bytes += int64(len(b))
		d := lineprotocol.NewDecoderWithBytes(b)
		for d.Next() {
			m, err := d.Measurement()
			if err != nil {
				t.Fatalf("%s: %v", f, err)
			}
			var tags strings.Builder
			tags.Write(m)
			var veh, run string
			for {
				k, v, err := d.NextTag()
				if err != nil {
					t.Fatalf("%s: %v", f, err)
				}
				if k == nil {
					break
				}
				switch string(k) {
				case "vehicle":
					veh = string(v)
				case "run":
					run = string(v)
				}
				fmt.Fprintf(&tags, ",%s=%s", k, v)
			}
			for {
				k, _, err := d.NextField()
				if err != nil {
					t.Fatalf("%s: %v", f, err)
				}
				if k == nil {
					break
				}
			}
			ts, err := d.Time(lineprotocol.Nanosecond, time.Time{})
			if err != nil {
				t.Fatalf("%s: %v", f, err)
			}
			if veh != vehicle || run != rc.run {
				rc.badIdentity = append(rc.badIdentity, tags.String())
			}
			k := key{tags.String(), ts.UnixMilli()}
			if string(m) == "plenum_event" {
				rc.eventLines++
				if !seen[k] {
					rc.eventsMS++
				}
			} else {
				rc.lines++
				if !seen[k] {
					rc.distinct++
				}
				series[k.series] = true
			}
			seen[k] = true
		}
	}
	rc.series = len(series)
	return rc
}

// vmMetric is the sum of the series of VictoriaMetrics's own metric name
// (those with label=value, when label is set) in its /metrics.
func vmMetric(t *testing.T, base, name, label, value string) (float64, bool) {
	t.Helper()
	resp, err := http.Get(base + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	p := expfmt.NewTextParser(model.UTF8Validation)
	fams, err := p.TextToMetricFamilies(resp.Body)
	if err != nil {
		t.Fatal(err)
	}
	sum, found := 0.0, false
	for _, m := range fams[name].GetMetric() {
		ok := label == ""
		for _, l := range m.Label {
			ok = ok || l.GetName() == label && l.GetValue() == value
		}
		if ok {
			sum += m.GetCounter().GetValue() + m.GetGauge().GetValue() + m.GetUntyped().GetValue()
			found = true
		}
	}
	return sum, found
}

// ruleMetricRE finds the daemon metrics a rules file reads (not the
// recorded series, whose names hold colons).
var ruleMetricRE = regexp.MustCompile(`(^|[^:a-z_])(plenum_[a-z0-9_]+)`)

// TestWorkshopTenCars runs a workshop: ten `plenum run` processes, each a
// simulated car (the demo's simulated microcontroller and ECU) with its own
// vehicle name, publishing to one mosquitto configured with
// deploy/workshop's mosquitto.conf and ACL (passwords made with
// mosquitto_passwd) and pushing its run to one VictoriaMetrics; car01's
// daemon also follows the others for its wall view, as the wall account.
// It checks that every car publishes and is confirmed, that nothing crosses
// between cars on the broker (and that the ACL refuses a car writing into
// another's topics and a wall screen writing at all), that a stopped car
// turns stale on the wall view while the others stay live, and that each
// car's points all arrive in VictoriaMetrics under its own vehicle and run.
// It measures the load of ten cars on the broker and the database (t.Logf).
//
// Alone: PLENUM_INTEGRATION=1 go test -run TestWorkshopTenCars -v ./cmd/plenum/
func TestWorkshopTenCars(t *testing.T) {
	const cars = 10
	const window = 10 * time.Second // the load measurement
	paths := interop.Need(t, "mosquitto victoria-metrics prometheus", "mosquitto", "mosquitto_passwd", "victoria-metrics", "prometheus")
	began := time.Now()
	dir := t.TempDir()
	bin := buildPlenum(t)
	built := time.Since(began)

	// Accounts: one per car, named as its vehicle, and the wall screen.
	names := make([]string, cars)
	isCar := map[string]bool{}
	passwords := map[string]string{}
	// Started as root, mosquitto reads its files as the user mosquitto:
	// they go into a directory of their own that it can read (the test's
	// temporary directories are private to root).
	mqDir, err := os.MkdirTemp("", "plenum-workshop-broker-")
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { os.RemoveAll(mqDir) })
	if err := os.Chmod(mqDir, 0o755); err != nil {
		t.Fatal(err)
	}
	pwFile := filepath.Join(mqDir, "mosquitto.passwd")
	for i := range names {
		names[i] = fmt.Sprintf("car%02d", i+1)
		isCar[names[i]] = true
	}
	for i, user := range append(append([]string(nil), names...), "wall") {
		passwords[user] = randomPassword(t)
		args := []string{"-b", pwFile, user, passwords[user]}
		if i == 0 {
			args = append([]string{"-c"}, args...)
		}
		if out, err := exec.Command(paths[1], args...).CombinedOutput(); err != nil {
			t.Fatalf("mosquitto_passwd %s: %v\n%s", user, err, out)
		}
		if err := os.WriteFile(filepath.Join(dir, user+".pw"), []byte(passwords[user]), 0o600); err != nil {
			t.Fatal(err)
		}
	}

	// The broker: the shipped configuration and ACL file, on a free port,
	// included from a main configuration as Debian's includes conf.d.
	aclText, err := os.ReadFile(filepath.Join(workshopDir, "mosquitto.acl"))
	if err != nil {
		t.Fatal(err)
	}
	acl := filepath.Join(mqDir, "mosquitto.acl")
	if err := os.WriteFile(acl, aclText, 0o644); err != nil {
		t.Fatal(err)
	}
	if err := os.Chmod(pwFile, 0o644); err != nil {
		t.Fatal(err)
	}
	mqPort := interop.FreePort(t)
	conf := workshopBrokerConf(t, map[string]string{
		"listener":      fmt.Sprintf("%d 127.0.0.1", mqPort),
		"password_file": pwFile,
		"acl_file":      acl,
	})
	confD := filepath.Join(mqDir, "conf.d")
	if err := os.Mkdir(confD, 0o755); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(confD, "plenum.conf"), []byte(conf), 0o644); err != nil {
		t.Fatal(err)
	}
	confPath := filepath.Join(mqDir, "mosquitto.conf")
	mainConf := fmt.Sprintf("persistence true\npersistence_location %s/\nlog_dest stdout\ninclude_dir %s\n", mqDir, confD)
	if err := os.WriteFile(confPath, []byte(mainConf), 0o644); err != nil {
		t.Fatal(err)
	}
	mq := startBg(t, "mosquitto", paths[0], "-c", confPath)
	mqAddr := fmt.Sprintf("127.0.0.1:%d", mqPort)
	broker := "tcp://" + mqAddr

	// The database, as deploy/workshop/README.md starts it.
	vmPort := interop.FreePort(t)
	vmBase := fmt.Sprintf("http://127.0.0.1:%d", vmPort)
	vm := startBg(t, "victoria-metrics", paths[2], "-storageDataPath="+filepath.Join(dir, "vm"),
		fmt.Sprintf("-httpListenAddr=127.0.0.1:%d", vmPort), "-dedup.minScrapeInterval=1ms", "-search.latencyOffset=0")
	waitUntil(t, 30*time.Second, "mosquitto and victoria-metrics to listen", func() (bool, string) {
		if mq.exited() || vm.exited() {
			t.Fatalf("a server exited:\nmosquitto: %s\nvictoria-metrics: %s", mq.out.String(), tail(vm.out.String(), 2000))
		}
		c, err := net.Dial("tcp", mqAddr)
		if err != nil {
			return false, err.Error()
		}
		c.Close()
		resp, err := http.Get(vmBase + "/health")
		if err != nil {
			return false, err.Error()
		}
		resp.Body.Close()
		return resp.StatusCode == 200, resp.Status
	})
	defer func() {
		if t.Failed() {
			t.Logf("mosquitto:\n%s", tail(mq.out.String(), 4000))
		}
	}()

	// The wall account, watching everything it may read.
	w := &wallWatcher{cars: isCar, perCar: map[string]int{}, snapshot: map[string]bool{}, online: map[string]bool{}, markers: map[string]bool{}}
	dial := func(id, user string) paho.Client {
		c := paho.NewClient(paho.NewClientOptions().AddBroker(broker).SetClientID(id).SetUsername(user).
			SetPassword(passwords[user]).SetAutoReconnect(false).SetProtocolVersion(4).SetOrderMatters(true))
		if tok := c.Connect(); !tok.WaitTimeout(10*time.Second) || tok.Error() != nil {
			t.Fatalf("connect as %s: %v", user, tok.Error())
		}
		t.Cleanup(func() { c.Disconnect(50) })
		return c
	}
	wall := dial("workshop-test-wall", "wall")
	if tok := wall.Subscribe("plenum/#", 1, w.handle); !tok.WaitTimeout(10*time.Second) || tok.Error() != nil {
		t.Fatalf("wall subscribe: %v", tok.Error())
	}

	// Ten cars: the demo's configuration with a vehicle, a simulator seed,
	// the workshop broker and database, and ports and directories of their own.
	type car struct {
		name, http, rec string
		p               *bgProc
	}
	fleet := make([]*car, cars)
	for i, name := range names {
		var m map[string]any
		if err := yaml.Unmarshal(demoConfig, &m); err != nil {
			t.Fatal(err)
		}
		c := &car{name: name, http: fmt.Sprintf("127.0.0.1:%d", interop.FreePort(t)), rec: filepath.Join(dir, name, "runs")}
		m["vehicle"] = name
		m["simulator"] = map[string]any{"time_scale": 1, "seed": i + 1}
		m["mqtt"] = map[string]any{"broker": broker, "username": name, "password_file": filepath.Join(dir, name+".pw"), "max_rate_hz": 10}
		m["http"] = map[string]any{"listen": c.http}
		m["record"] = map[string]any{"dir": c.rec, "push": map[string]any{"url": vmBase + "/write?db=plenum&precision=ns", "gzip": true}}
		m["state_dir"] = filepath.Join(dir, name, "state")
		if i == 0 {
			m["follow"] = map[string]any{"broker": broker, "username": "wall", "password_file": filepath.Join(dir, "wall.pw"), "stale_after": "2s"}
		}
		b, err := yaml.Marshal(m)
		if err != nil {
			t.Fatal(err)
		}
		cfg := filepath.Join(dir, name+".yaml")
		if err := os.WriteFile(cfg, b, 0o644); err != nil {
			t.Fatal(err)
		}
		fleet[i] = c
	}
	for _, c := range fleet {
		c.p = startBg(t, c.name, bin, "run", "-config", filepath.Join(dir, c.name+".yaml"))
	}

	// Prometheus: the shipped prometheus.yml and rules, with a targets file
	// naming the ten daemons and their vehicles.
	promDir := filepath.Join(dir, "prometheus")
	if err := os.MkdirAll(promDir, 0o755); err != nil {
		t.Fatal(err)
	}
	for _, f := range []string{"prometheus.yml", "workshop-rules.yml"} {
		b, err := os.ReadFile(filepath.Join(workshopDir, f))
		if err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(filepath.Join(promDir, f), b, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	var targets strings.Builder
	for _, c := range fleet {
		fmt.Fprintf(&targets, "- targets: ['%s']\n  labels: {vehicle: %s}\n", c.http, c.name)
	}
	if err := os.WriteFile(filepath.Join(promDir, "plenum-targets.yml"), []byte(targets.String()), 0o644); err != nil {
		t.Fatal(err)
	}
	promBase := fmt.Sprintf("http://127.0.0.1:%d", interop.FreePort(t))
	prom := startBg(t, "prometheus", paths[3], "--config.file="+filepath.Join(promDir, "prometheus.yml"),
		"--storage.tsdb.path="+filepath.Join(promDir, "data"), "--web.listen-address="+strings.TrimPrefix(promBase, "http://"))
	defer func() {
		if t.Failed() {
			t.Logf("prometheus:\n%s", tail(prom.out.String(), 3000))
		}
	}()
	defer func() {
		if t.Failed() {
			for _, c := range fleet {
				t.Logf("%s:\n%s", c.name, tail(c.p.out.String(), 1500))
			}
		}
	}()

	// Every car up: connected, its publishes confirmed by the broker
	// (the ACL lets it write its topics and read its own status), pushing,
	// and seen by the wall account.
	waitUntil(t, 60*time.Second, "every car to publish, be confirmed and push", func() (bool, string) {
		for _, c := range fleet {
			if c.p.exited() {
				t.Fatalf("%s exited: %v\n%s", c.name, c.p.err, tail(c.p.out.String(), 3000))
			}
			fams, err := tryScrape(c.http)
			if err != nil {
				return false, c.name + ": " + err.Error()
			}
			conf, _ := familySum(fams, "plenum_mqtt_publish_confirmed")
			sent, _ := familySum(fams, "plenum_push_sent_lines_total")
			if conf != 1 || sent == 0 {
				return false, fmt.Sprintf("%s: publish confirmed %v, pushed %v lines", c.name, conf, sent)
			}
		}
		w.mu.Lock()
		defer w.mu.Unlock()
		for _, n := range names {
			if !w.online[n] || !w.snapshot[n] {
				return false, fmt.Sprintf("wall: %s online %v snapshot %v", n, w.online[n], w.snapshot[n])
			}
		}
		return true, ""
	})
	up := time.Since(began)

	// The wall view of car01's console: the nine others, online and live.
	sctx, scancel := context.WithCancel(context.Background())
	defer scancel()
	stream := readSSE(sctx, t, "http://"+fleet[0].http+"/console/fleet")
	var tiles []wallTile
	waitWall := func(what string, cond func(map[string]wallTile) bool) {
		t.Helper()
		deadline := time.After(30 * time.Second)
		for {
			byName := map[string]wallTile{}
			for _, v := range tiles {
				byName[v.Name] = v
			}
			if cond(byName) {
				return
			}
			select {
			case e := <-stream:
				if e.Event != "vehicles" {
					continue
				}
				var m struct {
					Vehicles []wallTile `json:"vehicles"`
				}
				if err := json.Unmarshal(e.Data, &m); err != nil {
					t.Fatalf("fleet stream: %v in %.300s", err, e.Data)
				}
				tiles = m.Vehicles
			case <-deadline:
				t.Fatalf("wall view: timed out waiting for %s; tiles %+v", what, tiles)
			}
		}
	}
	waitWall("the nine other cars online and live", func(vs map[string]wallTile) bool {
		if len(vs) != cars-1 {
			return false
		}
		for _, c := range fleet[1:] {
			if v, ok := vs[c.name]; !ok || v.State != "online" || v.Stale {
				return false
			}
		}
		return true
	})

	// The ACL refuses a car writing into another car's topics and a wall
	// screen writing anywhere (MQTT 3.1.1: the broker acknowledges and
	// drops). Then car02 writes into its own topics: once that arrives, the
	// refused messages, sent before on the same connections to the same
	// single-threaded broker, would have arrived too.
	c02 := dial("workshop-test-car02-probe", "car02")
	for _, pub := range []struct {
		c            paho.Client
		topic, value string
	}{
		{wall, "plenum/car03/ch/acl_probe", "acl-probe wall into car03"},
		{wall, "plenum/wall/status", "acl-probe wall as a vehicle"},
		{c02, "plenum/car03/ch/acl_probe", "acl-probe car02 into car03"},
		{c02, "plenum/car03/status", "acl-probe car02 into car03's status"},
		{c02, "plenum/car02/ch/acl_probe", "acl-probe car02 into its own"},
	} {
		if tok := pub.c.Publish(pub.topic, 1, false, pub.value); !tok.WaitTimeout(10*time.Second) || tok.Error() != nil {
			t.Fatalf("publish %s: %v", pub.topic, tok.Error())
		}
	}
	waitUntil(t, 10*time.Second, "car02's write into its own topics", func() (bool, string) {
		w.mu.Lock()
		defer w.mu.Unlock()
		return w.markers["acl-probe car02 into its own"], fmt.Sprint(w.markers)
	})
	w.mu.Lock()
	if len(w.markers) != 1 {
		t.Errorf("the ACL let through %v", w.markers)
	}
	w.mu.Unlock()

	// The load of ten cars over a window.
	type sample struct {
		at                 time.Time
		mq, vm, prom, cars int64
		msgs, msgBytes     float64
		published          float64
		rows, pushed       float64
	}
	vmRows := func() float64 {
		n, ok := vmMetric(t, vmBase, "vm_rows_inserted_total", "type", "influx")
		if !ok {
			t.Fatal(`victoria-metrics: no vm_rows_inserted_total{type="influx"}`)
		}
		return n
	}
	take := func() sample {
		n, b := w.count()
		s := sample{at: time.Now(), mq: cpuTicks(t, mq.cmd.Process.Pid), vm: cpuTicks(t, vm.cmd.Process.Pid), prom: cpuTicks(t, prom.cmd.Process.Pid),
			msgs: float64(n), msgBytes: float64(b), rows: vmRows()}
		for _, c := range fleet {
			s.cars += cpuTicks(t, c.p.cmd.Process.Pid)
			fams, err := tryScrape(c.http)
			if err != nil {
				t.Fatal(err)
			}
			p, _ := familySum(fams, "plenum_mqtt_published_messages_total")
			l, _ := familySum(fams, "plenum_push_sent_lines_total")
			s.published += p
			s.pushed += l
		}
		return s
	}
	s0 := take()
	<-time.After(window)
	s1 := take()
	secs := s1.at.Sub(s0.at).Seconds()
	hz := clockTicks()
	core := func(d int64) float64 { return 100 * float64(d) / hz / secs } // % of one core
	mqCPU, vmCPU, promCPU, carsCPU := core(s1.mq-s0.mq), core(s1.vm-s0.vm), core(s1.prom-s0.prom), core(s1.cars-s0.cars)
	mqRSS, vmRSS, promRSS := residentBytes(t, mq.cmd.Process.Pid), residentBytes(t, vm.cmd.Process.Pid), residentBytes(t, prom.cmd.Process.Pid)
	var carRSS int64
	for _, c := range fleet {
		carRSS += residentBytes(t, c.p.cmd.Process.Pid)
	}
	msgs, msgBytes, published := (s1.msgs-s0.msgs)/secs, (s1.msgBytes-s0.msgBytes)/secs, (s1.published-s0.published)/secs
	rows, pushed := (s1.rows-s0.rows)/secs, (s1.pushed-s0.pushed)/secs
	const mib = 1 << 20
	t.Logf("load of %d cars over %.1f s (CPU in %% of one core, from /proc/<pid>/stat utime+stime; memory VmRSS):", cars, secs)
	t.Logf("  mosquitto:        CPU %5.1f %%, RSS %5.1f MiB; %6.0f messages/s published by the cars (their plenum_mqtt_published_messages_total), %6.0f/s (%.0f KiB/s of topics and payloads) delivered to one wall account on plenum/#", mqCPU, float64(mqRSS)/mib, published, msgs, msgBytes/1024)
	t.Logf("  victoria-metrics: CPU %5.1f %%, RSS %5.1f MiB; %6.0f rows/s inserted (vm_rows_inserted_total{type=\"influx\"}) from %6.0f lines/s pushed (plenum_push_sent_lines_total)", vmCPU, float64(vmRSS)/mib, rows, pushed)
	t.Logf("  prometheus:       CPU %5.1f %%, RSS %5.1f MiB; scraping %d daemons every 5 s, evaluating the workshop's rules", promCPU, float64(promRSS)/mib, cars)
	t.Logf("  the %d daemons:   CPU %5.1f %% in all (%.1f %% each), RSS %5.1f MiB each", cars, carsCPU, carsCPU/cars, float64(carRSS)/cars/mib)

	// Prometheus scrapes every daemon under its vehicle label, and the
	// workshop's recording rules see every car's frames.
	waitUntil(t, 40*time.Second, "prometheus to scrape every car and record its frame rate", func() (bool, string) {
		ups, err1 := promQuery(promBase, `up{job="plenum"} == 1`, "vehicle")
		rates, err2 := promQuery(promBase, `vehicle:plenum_source_frames:rate1m > 0`, "vehicle")
		if err := errors.Join(err1, err2); err != nil {
			return false, err.Error()
		}
		for _, n := range names {
			if ups[n] != 1 || rates[n] == 0 {
				return false, fmt.Sprintf("up %v, frame rates %v", ups, rates)
			}
		}
		return len(ups) == cars && len(rates) == cars, fmt.Sprintf("up %v, frame rates %v", ups, rates)
	})

	// A car stops: the wall view shows it stale (and offline, by its last
	// status), the others stay live.
	stopped := fleet[6]
	stopped.p.stop(t, 20*time.Second)
	waitWall(stopped.name+" stale while the others stay live", func(vs map[string]wallTile) bool {
		if len(vs) != cars-1 || !vs[stopped.name].Stale || vs[stopped.name].State != "offline" {
			return false
		}
		for _, c := range fleet[1:] {
			if c != stopped && (vs[c.name].Stale || vs[c.name].State != "online") {
				return false
			}
		}
		return true
	})
	scancel()
	// And Prometheus finds it down: WorkshopCarDown pending (it fires after
	// a minute) for that car alone.
	waitUntil(t, 40*time.Second, "WorkshopCarDown for "+stopped.name, func() (bool, string) {
		down, err := promQuery(promBase, `ALERTS{alertname="WorkshopCarDown"}`, "vehicle", "alertstate")
		if err != nil {
			return false, err.Error()
		}
		return len(down) == 1 && down[stopped.name+"/pending"] == 1, fmt.Sprint(down)
	})

	// The metrics the workshop's rules read exist in a real scrape.
	rules, err := os.ReadFile(filepath.Join(workshopDir, "workshop-rules.yml"))
	if err != nil {
		t.Fatal(err)
	}
	fams, err := tryScrape(fleet[1].http)
	if err != nil {
		t.Fatal(err)
	}
	for _, m := range ruleMetricRE.FindAllStringSubmatch(string(rules), -1) {
		if _, ok := fams[m[2]]; !ok {
			t.Errorf("workshop-rules.yml reads %s, which the daemon does not export", m[2])
		}
	}

	// Every car stops; what it recorded last is pushed as it stops.
	var wg sync.WaitGroup
	for _, c := range fleet {
		if c == stopped {
			continue
		}
		c.p.cmd.Process.Signal(syscall.SIGTERM)
	}
	for _, c := range fleet {
		wg.Add(1)
		go func() { defer wg.Done(); <-c.p.done }()
	}
	waited := make(chan struct{})
	go func() { wg.Wait(); close(waited) }()
	select {
	case <-waited:
	case <-time.After(30 * time.Second):
		t.Fatal("cars still running 30 s after SIGTERM")
	}
	for _, c := range fleet {
		if c.p.err != nil {
			t.Errorf("%s exited with %v", c.name, c.p.err)
		}
		if out := c.p.out.String(); strings.Contains(out, "level=ERROR") || strings.Contains(out, "stopping with lines the server has not taken") {
			t.Errorf("%s logged:\n%s", c.name, tail(out, 3000))
		}
	}

	// Each car's points in VictoriaMetrics: one sample per recorded line
	// (VictoriaMetrics keeps milliseconds: two lines of one series in one
	// millisecond would be one sample), under its own vehicle and run, and
	// no other vehicle.
	recs := map[string]carRecording{}
	lines := 0
	for _, c := range fleet {
		r := readCarRecording(t, c.rec, c.name)
		if len(r.badIdentity) > 0 {
			t.Errorf("%s recorded lines of another identity: %v", c.name, r.badIdentity[:min(3, len(r.badIdentity))])
		}
		recs[c.name] = r
		lines += r.lines + r.eventLines
	}
	var got, gotEvents, gotSeries map[string]float64
	var runs map[string]float64
	waitUntil(t, 30*time.Second, "every car's points in victoria-metrics", func() (bool, string) {
		if resp, err := http.Get(vmBase + "/internal/force_flush"); err == nil {
			resp.Body.Close()
		}
		var err1, err2, err3, err4 error
		got, err1 = promQuery(vmBase, `sum by (vehicle) (count_over_time(plenum_value[1h]))`, "vehicle")
		gotEvents, err2 = promQuery(vmBase, `sum by (vehicle) (count_over_time(plenum_event_duration_seconds[1h]))`, "vehicle")
		gotSeries, err3 = promQuery(vmBase, `count by (vehicle) (last_over_time(plenum_value[1h]))`, "vehicle")
		runs, err4 = promQuery(vmBase, `count by (vehicle, run) (last_over_time({__name__=~"plenum_.*"}[1h]))`, "vehicle", "run")
		if err := errors.Join(err1, err2, err3, err4); err != nil {
			t.Fatal(err)
		}
		for _, n := range names {
			r := recs[n]
			if got[n] != float64(r.distinct) || gotEvents[n] != float64(r.eventsMS) || gotSeries[n] != float64(r.series) {
				return false, fmt.Sprintf("%s: %v samples in %v series and %v events stored; %d lines (%d distinct) in %d series and %d events (%d distinct) recorded",
					n, got[n], gotSeries[n], gotEvents[n], r.lines, r.distinct, r.series, r.eventLines, r.eventsMS)
			}
		}
		return true, ""
	})
	if len(got) != cars || len(gotEvents) != cars || len(gotSeries) != cars {
		t.Errorf("vehicles in victoria-metrics: %v", got)
	}
	if len(runs) != cars {
		t.Errorf("vehicles and runs in victoria-metrics: %v", runs)
	}
	var merged []string
	for _, n := range names {
		r := recs[n]
		if runs[n+"/"+r.run] == 0 {
			t.Errorf("%s's run %s is not in victoria-metrics under its vehicle: %v", n, r.run, runs)
		}
		merged = append(merged, fmt.Sprintf("%s %d/%d", n, r.lines-r.distinct, r.lines))
	}
	t.Logf("recorded lines that share a millisecond with another of their series, one sample in VictoriaMetrics: %s", strings.Join(merged, ", "))
	w.mu.Lock()
	if len(w.crossed) > 0 {
		t.Errorf("crossed between cars on the broker: %v", w.crossed[:min(5, len(w.crossed))])
	}
	if len(w.perCar) != cars {
		t.Errorf("wall saw vehicles %v", w.perCar)
	}
	w.mu.Unlock()

	// What the points cost on the wire and on the database's disk, and
	// fifty cars scaled linearly from ten.
	var recBytes int64
	for _, r := range recs {
		recBytes += r.bytes
	}
	lineBytes := float64(recBytes) / float64(lines)
	segs, err := record.DataFiles(filepath.Join(fleet[1].rec, recs[fleet[1].name].run))
	if err != nil || len(segs) == 0 {
		t.Fatalf("%s's segments: %v (%d)", fleet[1].name, err, len(segs))
	}
	lp, err := record.ReadFile(segs[0])
	if err != nil {
		t.Fatal(err)
	}
	lp = lp[:min(len(lp), 4<<20)]
	var zb bytes.Buffer
	zw := gzip.NewWriter(&zb)
	zw.Write(lp)
	zw.Close()
	zratio := float64(len(lp)) / float64(zb.Len())
	if resp, err := http.Get(vmBase + "/internal/force_flush"); err == nil {
		resp.Body.Close()
	}
	vmDisk, _ := vmMetric(t, vmBase, "vm_data_size_bytes", "", "")
	stored := 0.0
	for _, n := range names {
		stored += got[n] + gotEvents[n]
	}
	pushBytes := pushed * lineBytes
	t.Logf("  push traffic: %.0f bytes a line, %.0f KiB/s of line protocol in all, %.0f KiB/s gzipped (gzip takes it %.1f times smaller)", lineBytes, pushBytes/1024, pushBytes/zratio/1024, zratio)
	t.Logf("  victoria-metrics data: %.1f MiB after the test (vm_data_size_bytes), %.2f bytes per stored value sample, quality samples and indexes included; parts of a database this young are not merged yet, so this is more than a long-running one takes", vmDisk/mib, vmDisk/stored)
	t.Logf("  at 50 cars, scaled linearly: mosquitto %.0f %% of a core, %.0f messages/s in (and as many out to each client reading plenum/#), victoria-metrics %.0f %% of a core, %.0f rows/s, %.1f GiB a day on disk, prometheus %.0f %% of a core; %.1f MiB/s of pushes (%.1f gzipped) and %.1f MiB/s of MQTT into the workshop network",
		5*mqCPU, 5*published, 5*vmCPU, 5*rows, 5*pushed*vmDisk/stored*86400/(1<<30), 5*promCPU, 5*pushBytes/mib, 5*pushBytes/zratio/mib, 5*msgBytes/mib)
	t.Logf("%d cars: %d lines recorded and stored; built in %v, all up after %v, done in %v",
		cars, lines, built.Round(time.Millisecond), up.Round(time.Millisecond), time.Since(began).Round(time.Millisecond))
}
