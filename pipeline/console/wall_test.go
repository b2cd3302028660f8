package console

import (
	"context"
	"encoding/json"
	"fmt"
	"log/slog"
	"net/http"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/fleet"
	"github.com/plenum-engine/plenum/pipeline/interop"
	"github.com/plenum-engine/plenum/pipeline/mqttpub"
)

// fakeFleet is a Fleet the test sets by hand.
type fakeFleet struct {
	mu      sync.Mutex
	vs      []fleet.Vehicle
	changed chan struct{}
}

func newFakeFleet() *fakeFleet { return &fakeFleet{changed: make(chan struct{})} }

func (f *fakeFleet) Vehicles() []fleet.Vehicle {
	f.mu.Lock()
	defer f.mu.Unlock()
	return append([]fleet.Vehicle(nil), f.vs...)
}

func (f *fakeFleet) Changes() <-chan struct{} {
	f.mu.Lock()
	defer f.mu.Unlock()
	return f.changed
}

func (f *fakeFleet) set(vs ...fleet.Vehicle) {
	f.mu.Lock()
	f.vs = vs
	close(f.changed)
	f.changed = make(chan struct{})
	f.mu.Unlock()
}

// fleetClient reads the fleet stream's "vehicles" messages.
func fleetClient(t *testing.T, url string) <-chan fleetJSON {
	t.Helper()
	resp, err := http.Get(url)
	if err != nil {
		t.Fatal(err)
	}
	if resp.StatusCode != 200 || resp.Header.Get("Content-Type") != "text/event-stream" {
		t.Fatalf("fleet stream: %s %q", resp.Status, resp.Header.Get("Content-Type"))
	}
	t.Cleanup(func() { resp.Body.Close() })
	out := make(chan fleetJSON, 64)
	go func() {
		defer close(out)
		var event string
		buf := make([]byte, 0, 1<<16)
		tmp := make([]byte, 4096)
		for {
			n, err := resp.Body.Read(tmp)
			buf = append(buf, tmp[:n]...)
			for {
				i := strings.Index(string(buf), "\n")
				if i < 0 {
					break
				}
				line := string(buf[:i])
				buf = buf[i+1:]
				switch {
				case strings.HasPrefix(line, "event: "):
					event = line[7:]
				case strings.HasPrefix(line, "data: ") && event == "vehicles":
					var m fleetJSON
					if json.Unmarshal([]byte(line[6:]), &m) == nil {
						out <- m
					}
				}
			}
			if err != nil {
				return
			}
		}
	}()
	return out
}

func nextVehicles(t *testing.T, c <-chan fleetJSON, what string, ok func(fleetJSON) bool) fleetJSON {
	t.Helper()
	deadline := time.After(10 * time.Second)
	for {
		select {
		case m, open := <-c:
			if !open {
				t.Fatalf("the fleet stream ended before %s", what)
			}
			if ok(m) {
				return m
			}
		case <-deadline:
			t.Fatalf("no fleet message with %s", what)
		}
	}
}

// TestFleetStream: the fleet stream sends every vehicle followed on
// connect and again at a change, with values formatted for people, its
// warnings, its run and the fleet's stale flag; without a follower it
// says so.
func TestFleetStream(t *testing.T) {
	ff := newFakeFleet()
	now := time.Now()
	ff.set(fleet.Vehicle{Name: "car-a", State: "online", Since: now.Add(-time.Minute), Heard: now, SnapshotTime: now,
		Snapshot: map[string]mqttpub.Value{
			"oil_temp":       {V: 104.26, Unit: "degC", Quality: "ok"},
			"engine_speed":   {V: 3012.4, Unit: "rpm", Quality: "ok"},
			"boost_pressure": {V: 121500, Unit: "Pa", Quality: "stale"},
		},
		Warnings: []fleet.Warning{{Rule: "oil_temp_high", Event: mqttpub.EventPayload{Kind: "warning_raised", Name: "oil_temp_high",
			Start: now.Format(time.RFC3339Nano), Tags: map[string]string{"severity": "critical"}, Fields: map[string]float64{"value": 131}}}},
		Events: []mqttpub.EventPayload{{Kind: "run_started", Name: "run-7", Start: now.Format(time.RFC3339Nano)}},
	})
	r := newRig(t, Config{Fleet: ff}, false)
	c := fleetClient(t, r.http.URL+FleetPath)
	m := nextVehicles(t, c, "car-a", func(m fleetJSON) bool { return len(m.Vehicles) == 1 })
	v := m.Vehicles[0]
	if !m.Following || v.Name != "car-a" || v.State != "online" || v.Stale || v.Run != "run-7" || v.HeardMS != now.UnixMilli() {
		t.Errorf("tile %+v (following %v)", v, m.Following)
	}
	want := []tileValueJSON{{"boost_pressure", "122", "kPa", "stale"}, {"engine_speed", "3012", "rpm", "ok"}, {"oil_temp", "104", "°C", "ok"}}
	if fmt.Sprint(v.Values) != fmt.Sprint(want) {
		t.Errorf("values %v, want %v", v.Values, want)
	}
	if len(v.Warnings) != 1 || v.Warnings[0].Name != "oil_temp_high" || v.Warnings[0].Severity != "critical" || v.Warnings[0].Fields["value"] != 131 {
		t.Errorf("warnings %+v", v.Warnings)
	}
	// A change: car-a turns stale, car-b appears.
	ff.set(fleet.Vehicle{Name: "car-a", State: "online", Heard: now, Stale: true}, fleet.Vehicle{Name: "car-b", State: "offline"})
	m = nextVehicles(t, c, "car-a stale and car-b", func(m fleetJSON) bool { return len(m.Vehicles) == 2 })
	if !m.Vehicles[0].Stale || m.Vehicles[1].Name != "car-b" || m.Vehicles[1].State != "offline" || m.Vehicles[0].Values == nil {
		t.Errorf("after the change: %+v", m.Vehicles)
	}

	r2 := newRig(t, Config{}, false)
	m = nextVehicles(t, fleetClient(t, r2.http.URL+FleetPath), "the first message", func(fleetJSON) bool { return true })
	if m.Following || len(m.Vehicles) != 0 {
		t.Errorf("without a follower: %+v", m)
	}
}

// startCar runs a fake vehicle: a pipeline with engine speed and oil
// temperature fed every 50 ms, and a real publisher over it.
func startCar(t *testing.T, ctx context.Context, name, broker string, wg *sync.WaitGroup) {
	t.Helper()
	reg := pipeline.NewRegistry()
	var ids []pipeline.ChannelID
	for _, n := range []string{"engine_speed", "oil_temp"} {
		ch, _ := pipeline.Catalogued(n)
		ch.Source = "bench"
		id, err := reg.Register(ch)
		if err != nil {
			t.Fatal(err)
		}
		ids = append(ids, id)
	}
	p := pipeline.New(reg, nil, pipeline.Options{})
	pub, err := mqttpub.New(mqttpub.Config{Broker: broker, Vehicle: name, SnapshotEvery: 200 * time.Millisecond, Version: "test",
		Logger: slog.New(slog.DiscardHandler)}, reg, p.Subscribe("mqtt", 256))
	if err != nil {
		t.Fatal(err)
	}
	pub.SetStore(p.Store())
	wg.Add(3)
	go func() { defer wg.Done(); p.Run(ctx) }()
	go func() { defer wg.Done(); pub.Run(ctx) }()
	go func() {
		defer wg.Done()
		tk := time.NewTicker(50 * time.Millisecond)
		defer tk.Stop()
		for i := 0; ; i++ {
			select {
			case <-ctx.Done():
				return
			case <-tk.C:
				now := time.Now()
				p.Put(pipeline.Sample{Channel: ids[0], Value: 2000 + float64(i*37%3000), Time: now, Quality: pipeline.OK})
				p.Put(pipeline.Sample{Channel: ids[1], Value: 90 + float64(i%100)/10, Time: now, Quality: pipeline.OK})
			}
		}
	}()
	if name == "car-a" {
		// a warning that stays raised, for the tile
		go func() {
			time.Sleep(300 * time.Millisecond) // not an assertion: the publisher connects meanwhile
			p.Emit(pipeline.Event{Kind: "warning_raised", Name: "oil_temp_high", Start: time.Now(), End: time.Now(),
				Tags: map[string]string{"severity": "critical"}, Fields: map[string]float64{"value": 131, "limit": 125}})
		}()
	}
}

// TestBrowserWallFollowsTwoVehicles: two vehicles, each a pipeline with a
// real publisher, through one external mosquitto; this console follows
// them and its wall view at 1920×1080 shows a tile for each, with their
// values and warning; when one goes quiet its tile turns stale while the
// other stays live.
func TestBrowserWallFollowsTwoVehicles(t *testing.T) {
	paths := interop.Need(t, "mosquitto", "mosquitto")
	chromiumPath(t)
	addr := interop.StartMosquitto(t, paths[0], "allow_anonymous true\n").Addr

	ctx, cancel := context.WithCancel(context.Background())
	var wg sync.WaitGroup
	defer func() { cancel(); wg.Wait() }()
	f, err := fleet.New(fleet.Config{Broker: "tcp://" + addr, Self: "workshop-pc", StaleAfter: 1500 * time.Millisecond,
		Logger: slog.New(slog.DiscardHandler)})
	if err != nil {
		t.Fatal(err)
	}
	wg.Add(1)
	go func() { defer wg.Done(); f.Run(ctx) }()
	z := interop.NewProxy(t, addr)
	startCar(t, ctx, "car-a", "tcp://"+addr, &wg)
	startCar(t, ctx, "car-b", z.URL(), &wg)

	r := newRig(t, Config{Vehicle: "workshop-pc", Fleet: f}, false)
	feed := r.feed()
	defer feed.halt()
	pg := newPage(t, 1920, 1080)
	pg.do(chromedp.Navigate(r.http.URL + "/console/wall"))
	tile := func(name string) string { return `document.querySelector('.tile[data-vehicle="` + name + `"]')` }
	pg.until("both followed vehicles live with values", tile("car-a")+`?.dataset.state === "live" && `+tile("car-b")+`?.dataset.state === "live" && `+
		tile("car-b")+`.querySelector('.tv[data-state="live"] dd')?.textContent.includes("rpm")`, 20*time.Second)
	pg.until("car-a's warning on its tile", tile("car-a")+`.querySelector('.twarn').textContent.includes("◆ ALERT Oil temp high")`, 10*time.Second)
	pg.until("the own tile live", tile("workshop-pc")+`?.dataset.state === "live"`, 5*time.Second)
	if n := evalAs[int](pg, `document.querySelectorAll('.tile').length`); n != 3 {
		t.Errorf("%d tiles, want 3 (this vehicle and the two followed)", n)
	}
	pg.noHorizontalScroll("wall with three tiles")
	pg.shot("wall-fleet-live-1920x1080")

	z.Freeze() // car-b goes quiet
	defer z.Thaw()
	pg.until("car-b's tile stale, car-a's live", tile("car-b")+`.dataset.state === "stale" && `+tile("car-b")+`.querySelector('.tstatus').textContent.includes("STALE") && `+
		tile("car-a")+`.dataset.state === "live"`, 10*time.Second)
	if s := evalAs[string](pg, tile("car-b")+`.querySelector('.tv dd').textContent`); !strings.Contains(s, "STALE") {
		t.Errorf("car-b's value %q does not say it is stale", s)
	}
	pg.shot("wall-fleet-stale-1920x1080")
	for _, e := range pg.errors() {
		t.Errorf("console error: %s", e)
	}
}
