package fleet

import (
	"context"
	"errors"
	"log/slog"
	"sync"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/interop"
	"github.com/plenum-engine/plenum/pipeline/mqttpub"
)

// car is a fake vehicle: a pipeline with one channel fed every 50 ms and a
// real mqttpub.Publisher over it.
type car struct {
	p  *pipeline.Pipeline
	id pipeline.ChannelID
}

func startCar(t *testing.T, ctx context.Context, name, broker string, wg *sync.WaitGroup) *car {
	t.Helper()
	reg := pipeline.NewRegistry()
	ch, ok := pipeline.Standard("manifold_pressure")
	if !ok {
		t.Fatal("manifold_pressure is not a standard channel")
	}
	ch.Source = "bench"
	id, err := reg.Register(ch)
	if err != nil {
		t.Fatal(err)
	}
	p := pipeline.New(reg, nil, pipeline.Options{})
	pub, err := mqttpub.New(mqttpub.Config{Broker: broker, Vehicle: name, SnapshotEvery: 200 * time.Millisecond, Version: "test"},
		reg, p.Subscribe("mqtt", 256))
	if err != nil {
		t.Fatal(err)
	}
	pub.SetStore(p.Store())
	wg.Add(3)
	go func() { defer wg.Done(); p.Run(ctx) }()
	go func() { defer wg.Done(); pub.Run(ctx) }()
	go func() {
		defer wg.Done()
		tick := time.NewTicker(50 * time.Millisecond)
		defer tick.Stop()
		for v := 150e3; ; v += 10 {
			select {
			case <-ctx.Done():
				return
			case <-tick.C:
				p.Put(pipeline.Sample{Channel: id, Value: v, Time: time.Now(), Quality: pipeline.OK})
			}
		}
	}()
	return &car{p: p, id: id}
}

// TestFollowTwoVehiclesThroughMosquitto runs two fake vehicles, each a
// pipeline with a real publisher, through one real mosquitto; the follower
// shows both with their snapshots and a warning raised and cleared; then
// one goes quiet and turns stale while still online, and once its
// connection drops, its will marks it offline.
func TestFollowTwoVehiclesThroughMosquitto(t *testing.T) {
	paths := interop.Need(t, "mosquitto", "mosquitto")
	addr := interop.StartMosquitto(t, paths[0], "allow_anonymous true\n").Addr

	ctx, cancel := context.WithCancel(context.Background())
	var wg sync.WaitGroup
	defer func() { cancel(); wg.Wait() }()

	var logs syncBuf
	f, err := New(Config{Broker: "tcp://" + addr, Self: "workshop-pc", StaleAfter: 1500 * time.Millisecond,
		Logger: slog.New(slog.NewTextHandler(&logs, nil))})
	if err != nil {
		t.Fatal(err)
	}
	wg.Add(1)
	go func() {
		defer wg.Done()
		if err := f.Run(ctx); err != nil && !errors.Is(err, context.Canceled) {
			t.Errorf("follower: %v", err)
		}
	}()

	g := interop.NewProxy(t, addr)
	a := startCar(t, ctx, "car-a", "tcp://"+addr, &wg)
	startCar(t, ctx, "car-b", g.URL(), &wg)

	// Both vehicles, online and fresh, with their values.
	waitChange(t, f, "both vehicles online, fresh, with a manifold pressure", func(vs []Vehicle) bool {
		if len(vs) != 2 {
			return false
		}
		for i, want := range []string{"car-a", "car-b"} {
			v := vs[i]
			if v.Name != want || v.State != "online" || v.Stale || v.Version != "test" || v.Snapshot["manifold_pressure"].V < 150e3 {
				return false
			}
		}
		return true
	})

	// A warning raised on car-a shows, and clears.
	a.p.Emit(pipeline.Event{Kind: "warning_raised", Name: "boost_high", Start: time.Now(), Fields: map[string]float64{"value": 250e3, "limit": 240e3}})
	waitChange(t, f, "car-a's warning", func(vs []Vehicle) bool {
		return len(vs) == 2 && len(vs[0].Warnings) == 1 && vs[0].Warnings[0].Rule == "boost_high" && vs[0].Warnings[0].Event.Fields["limit"] == 240e3
	})
	a.p.Emit(pipeline.Event{Kind: "warning_cleared", Name: "boost_high", Start: time.Now()})
	waitChange(t, f, "car-a's warning cleared, both events kept", func(vs []Vehicle) bool {
		if len(vs) != 2 || len(vs[0].Warnings) != 0 || len(vs[0].Events) != 2 {
			return false
		}
		return vs[0].Events[0].Kind == "warning_raised" && vs[0].Events[1].Kind == "warning_cleared"
	})

	// car-b goes quiet: stale, still online, while car-a stays fresh.
	g.Freeze()
	waitChange(t, f, "car-b stale while still online", func(vs []Vehicle) bool {
		return len(vs) == 2 && !vs[0].Stale && vs[1].Stale && vs[1].State == "online"
	})
	// Its connection drops: the broker sends its will.
	g.Cut()
	waitChange(t, f, "car-b offline by its will", func(vs []Vehicle) bool {
		return len(vs) == 2 && vs[1].State == "offline" && vs[1].Stale && !vs[0].Stale && vs[0].State == "online"
	})

	r := f.Report()
	if !r.Up || gauge(r, "vehicles") != 2 || gauge(r, "stale_vehicles") != 1 || counter(r, "messages") < 10 || counter(r, "malformed_messages") != 0 {
		t.Fatalf("report %+v", r)
	}
}

// waitChange waits on the follower's change notices until cond holds for
// its vehicles; it fails the test after 20 s.
func waitChange(t *testing.T, f *Follower, what string, cond func([]Vehicle) bool) {
	t.Helper()
	deadline := time.After(20 * time.Second)
	for {
		ch := f.Changes()
		vs := f.Vehicles()
		if cond(vs) {
			return
		}
		select {
		case <-ch:
		case <-deadline:
			t.Fatalf("timed out waiting for %s; vehicles: %+v", what, vs)
		}
	}
}
