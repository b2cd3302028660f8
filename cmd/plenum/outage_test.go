package main

import (
	"bytes"
	"context"
	"encoding/json"
	"io"
	"net"
	"os"
	"path/filepath"
	"sync"
	"testing"
	"time"

	paho "github.com/eclipse/paho.mqtt.golang"
	"github.com/influxdata/line-protocol/v2/lineprotocol"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline/broker"
	"github.com/plenum-engine/plenum/pipeline/mqttpub"
	"github.com/plenum-engine/plenum/pipeline/record"
)

// gate is a TCP forwarder standing in for the network path to the broker:
// closed, the daemon's connections are refused as if the broker were down.
type gate struct {
	addr, to string
	mu       sync.Mutex
	ln       net.Listener
}

func (g *gate) open(t *testing.T) {
	t.Helper()
	ln, err := net.Listen("tcp", g.addr)
	if err != nil {
		t.Fatal(err)
	}
	g.mu.Lock()
	g.ln = ln
	g.mu.Unlock()
	go func() {
		for {
			c, err := ln.Accept()
			if err != nil {
				return
			}
			go func() {
				defer c.Close()
				u, err := net.Dial("tcp", g.to)
				if err != nil {
					return
				}
				defer u.Close()
				go io.Copy(u, c)
				io.Copy(c, u)
			}()
		}
	}()
}

func (g *gate) close() {
	g.mu.Lock()
	defer g.mu.Unlock()
	if g.ln != nil {
		g.ln.Close()
	}
}

type lpEvent struct {
	kind, name string
	start      int64
}

// recordedEvents reads the plenum_event points of a run, in file order.
func recordedEvents(t *testing.T, dir string) []lpEvent {
	t.Helper()
	b, err := record.ReadFile(filepath.Join(dir, "0001.lp")) // or its .lp.gz
	if err != nil {
		t.Fatal(err)
	}
	dec := lineprotocol.NewDecoderWithBytes(b)
	var out []lpEvent
	for dec.Next() {
		m, err := dec.Measurement()
		if err != nil {
			t.Fatal(err)
		}
		if string(m) != "plenum_event" {
			continue
		}
		var e lpEvent
		for {
			k, v, err := dec.NextTag()
			if err != nil {
				t.Fatal(err)
			}
			if k == nil {
				break
			}
			switch string(k) {
			case "kind":
				e.kind = string(v)
			case "name":
				e.name = string(v)
			}
		}
		for {
			k, _, err := dec.NextField()
			if err != nil {
				t.Fatal(err)
			}
			if k == nil {
				break
			}
		}
		ts, err := dec.Time(lineprotocol.Nanosecond, time.Time{})
		if err != nil {
			t.Fatal(err)
		}
		e.start = ts.UnixNano()
		out = append(out, e)
	}
	return out
}

// TestBrokerOutageForARun keeps the broker unreachable for a whole run and
// a daemon restart: once it is back, every event of the run and the run's
// summary arrive, in order.
func TestBrokerOutageForARun(t *testing.T) {
	if testing.Short() {
		t.Skip("records a 12 s run")
	}
	brk, err := broker.Start(context.Background(), broker.Config{Addr: "127.0.0.1:0", Anonymous: true, Prefix: "plenum", Secret: "daemon-pw"})
	if err != nil {
		t.Fatal(err)
	}
	defer brk.Close()
	reserve, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	g := &gate{addr: reserve.Addr().String(), to: brk.Addr().String()}
	reserve.Close() // the gate is closed: nothing listens there
	defer g.close()

	pwFile := filepath.Join(t.TempDir(), "pw")
	os.WriteFile(pwFile, []byte("daemon-pw\n"), 0o600)
	recDir, stateDir := t.TempDir(), t.TempDir()
	mutate := func(manual bool) func(*config.Config) {
		return func(c *config.Config) {
			c.MQTT.Broker = "tcp://" + g.addr
			user, _ := brk.Credentials()
			c.MQTT.Username, c.MQTT.PasswordFile = user, pwFile
			c.Record.Dir = recDir
			c.Record.Manual = manual
			c.StateDir = stateDir
		}
	}

	// The run, with the broker away.
	ctx, cancel := context.WithCancel(context.Background())
	_, _, done := startDemo(t, ctx, 4, mutate(false))
	time.Sleep(12 * time.Second)
	cancel()
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	ents, _ := os.ReadDir(recDir)
	if len(ents) != 1 {
		t.Fatalf("%d runs recorded", len(ents))
	}
	runDir := filepath.Join(recDir, ents[0].Name())
	want := recordedEvents(t, runDir)
	if len(want) < 3 {
		t.Fatalf("only %d events in the run: the demo cycle should raise more", len(want))
	}
	summary, err := os.ReadFile(filepath.Join(runDir, "summary.json"))
	if err != nil {
		t.Fatal(err)
	}

	// The broker comes back; a reader is there before the daemon.
	var mu sync.Mutex
	var got []mqttpub.EventPayload
	var gotSummary []byte
	reader := paho.NewClient(paho.NewClientOptions().AddBroker("tcp://" + brk.Addr().String()).SetClientID("outage-reader"))
	if tok := reader.Connect(); !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		t.Fatal(tok.Error())
	}
	defer reader.Disconnect(100)
	tok := reader.SubscribeMultiple(map[string]byte{"plenum/brackenfell-rs/events": 1, "plenum/brackenfell-rs/run/summary": 1},
		func(_ paho.Client, m paho.Message) {
			mu.Lock()
			defer mu.Unlock()
			if m.Topic() == "plenum/brackenfell-rs/run/summary" {
				gotSummary = m.Payload()
				return
			}
			var e mqttpub.EventPayload
			if err := json.Unmarshal(m.Payload(), &e); err != nil {
				t.Errorf("event %q: %v", m.Payload(), err)
			}
			got = append(got, e)
		})
	if !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		t.Fatal(tok.Error())
	}
	g.open(t)
	ctx2, cancel2 := context.WithCancel(context.Background())
	defer cancel2()
	_, _, done2 := startDemo(t, ctx2, 4, mutate(true)) // restarted, no new run
	deadline := time.Now().Add(30 * time.Second)
	for time.Now().Before(deadline) {
		mu.Lock()
		ok := gotSummary != nil
		for _, e := range got {
			ok = ok && e.Kind != "run_ended" // false once run_ended is in
		}
		ok = gotSummary != nil && !ok
		mu.Unlock()
		if ok {
			break
		}
		time.Sleep(50 * time.Millisecond)
	}
	time.Sleep(200 * time.Millisecond)
	cancel2()
	<-done2

	mu.Lock()
	defer mu.Unlock()
	if !bytes.Equal(gotSummary, summary) {
		t.Fatalf("summary over MQTT:\n%s\nsummary.json:\n%s", gotSummary, summary)
	}
	// Every recorded event arrived, in the order it was recorded.
	i := 0
	for _, e := range got {
		st, err := time.Parse(time.RFC3339Nano, e.Start)
		if err != nil {
			t.Fatalf("event start %q: %v", e.Start, err)
		}
		if i < len(want) && e.Kind == want[i].kind && e.Name == want[i].name && st.UnixNano() == want[i].start {
			i++
		}
	}
	if i != len(want) {
		t.Fatalf("%d of %d recorded events arrived in order; first missing %+v; got %d events", i, len(want), want[i], len(got))
	}
	ended := false
	for _, e := range got {
		ended = ended || e.Kind == "run_ended"
	}
	if !ended {
		t.Error("run_ended never arrived")
	}
	t.Logf("%d recorded events and the summary arrived after the outage (%d events in all)", len(want), len(got))
}
