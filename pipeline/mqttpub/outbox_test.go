package mqttpub

import (
	"context"
	"fmt"
	"net"
	"strings"
	"sync"
	"testing"
	"time"

	paho "github.com/eclipse/paho.mqtt.golang"

	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/broker"
)

func freeAddr(t *testing.T) string {
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer ln.Close()
	return ln.Addr().String()
}

// TestBrokerOutageLosesNoEvent: events emitted while the broker is down stay
// in the outbox and all arrive, in order, once it is up.
func TestBrokerOutageLosesNoEvent(t *testing.T) {
	addr := freeAddr(t)
	ob, err := OpenOutbox(t.TempDir(), 100)
	if err != nil {
		t.Fatal(err)
	}
	defer ob.Close()
	reg := pipeline.NewRegistry()
	p := pipeline.New(reg, nil, pipeline.Options{})
	pub, err := New(Config{Broker: "tcp://" + addr, Vehicle: "v", Username: "plenum-daemon", Password: "s3cret", Outbox: ob}, reg, p.SubscribeEvents("mqtt"))
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	go p.Run(ctx)
	go pub.Run(ctx)
	for i := 0; i < 20; i++ {
		p.Emit(pipeline.Event{Kind: "turbo_lag", Name: fmt.Sprintf("e%02d", i), Start: time.Unix(int64(i), 0)})
	}
	deadline := time.Now().Add(5 * time.Second)
	for ob.Len() < 20 && time.Now().Before(deadline) {
		time.Sleep(20 * time.Millisecond)
	}
	if ob.Len() != 20 {
		t.Fatalf("outbox holds %d events while the broker is down, want 20", ob.Len())
	}
	b, err := broker.Start(context.Background(), broker.Config{Addr: addr, Anonymous: true, Prefix: "plenum", Secret: "s3cret"})
	if err != nil {
		t.Fatal(err)
	}
	defer b.Close()
	var mu sync.Mutex
	var got []string
	reader := paho.NewClient(paho.NewClientOptions().AddBroker("tcp://" + addr).SetClientID("reader"))
	if tok := reader.Connect(); !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		t.Fatal(tok.Error())
	}
	defer reader.Disconnect(50)
	reader.Subscribe("plenum/v/events", 1, func(_ paho.Client, m paho.Message) {
		mu.Lock()
		got = append(got, string(m.Payload()))
		mu.Unlock()
	}).WaitTimeout(5 * time.Second)
	deadline = time.Now().Add(15 * time.Second)
	for time.Now().Before(deadline) {
		mu.Lock()
		n := len(got)
		mu.Unlock()
		if n >= 20 && ob.Len() == 0 {
			break
		}
		time.Sleep(50 * time.Millisecond)
	}
	mu.Lock()
	defer mu.Unlock()
	if len(got) < 20 {
		t.Fatalf("%d of 20 events arrived after the outage", len(got))
	}
	for i := 0; i < 20; i++ {
		want := fmt.Sprintf(`"name":"e%02d"`, i)
		if !strings.Contains(got[i], want) {
			t.Fatalf("event %d = %s, want %s: out of order", i, got[i], want)
		}
	}
}

// TestOutboxSurvivesRestart: what was not acknowledged is there again after
// reopening; what was is not; a full outbox drops the oldest and counts it.
func TestOutboxSurvivesRestart(t *testing.T) {
	dir := t.TempDir()
	ob, err := OpenOutbox(dir, 3)
	if err != nil {
		t.Fatal(err)
	}
	for i := 0; i < 4; i++ {
		if _, err := ob.Append("t", false, []byte{byte('a' + i)}); err != nil {
			t.Fatal(err)
		}
	}
	if ob.Len() != 3 || ob.Dropped() != 1 {
		t.Fatalf("len %d dropped %d, want 3 and 1", ob.Len(), ob.Dropped())
	}
	m, _ := ob.Head()
	if string(m.Payload) != "b" {
		t.Fatalf("head %q, want b (a was dropped)", m.Payload)
	}
	if err := ob.Ack(m.Seq); err != nil {
		t.Fatal(err)
	}
	ob.Close()
	ob2, err := OpenOutbox(dir, 3)
	if err != nil {
		t.Fatal(err)
	}
	defer ob2.Close()
	if ob2.Len() != 2 {
		t.Fatalf("after restart %d pending, want 2 (c, d)", ob2.Len())
	}
	m2, _ := ob2.Head()
	if string(m2.Payload) != "c" || m2.Seq <= m.Seq {
		t.Fatalf("head after restart %q seq %d", m2.Payload, m2.Seq)
	}
	s, _ := ob2.Append("t", false, []byte("e"))
	if s != 5 {
		t.Fatalf("sequence after restart %d, want 5", s)
	}
}
