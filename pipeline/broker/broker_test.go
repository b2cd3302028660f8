package broker

import (
	"context"
	"sync"
	"testing"
	"time"

	paho "github.com/eclipse/paho.mqtt.golang"
)

func connect(t *testing.T, addr, id, user, pass string) (paho.Client, error) {
	t.Helper()
	c := paho.NewClient(paho.NewClientOptions().AddBroker("tcp://" + addr).SetClientID(id).
		SetUsername(user).SetPassword(pass).SetAutoReconnect(false).SetConnectRetry(false))
	tok := c.Connect()
	if !tok.WaitTimeout(5 * time.Second) {
		t.Fatal("connect timed out")
	}
	return c, tok.Error()
}

func TestAccessRules(t *testing.T) {
	b, err := Start(context.Background(), Config{Addr: "127.0.0.1:0", Anonymous: true, Prefix: "plenum",
		Users: []User{{Name: "dash", Password: "pw"}, {Name: "op", Password: "pw2", Commands: true}}})
	if err != nil {
		t.Fatal(err)
	}
	defer b.Close()
	addr := b.Addr().String()

	reader, err := connect(t, addr, "reader", "", "")
	if err != nil {
		t.Fatalf("anonymous reader refused: %v", err)
	}
	defer reader.Disconnect(50)
	var mu sync.Mutex
	got := map[string]string{}
	reader.Subscribe("plenum/#", 1, func(_ paho.Client, m paho.Message) {
		mu.Lock()
		got[m.Topic()] = string(m.Payload())
		mu.Unlock()
	}).WaitTimeout(2 * time.Second)

	user, pass := b.Credentials()
	daemon, err := connect(t, addr, "daemon", user, pass)
	if err != nil {
		t.Fatalf("daemon refused: %v", err)
	}
	defer daemon.Disconnect(50)
	daemon.Publish("plenum/car/ch/lambda", 1, false, "from-daemon").WaitTimeout(2 * time.Second)

	if _, err := connect(t, addr, "badpw", user, "wrong"); err == nil {
		t.Error("daemon user with a wrong password accepted")
	}
	if _, err := connect(t, addr, "dash-bad", "dash", "nope"); err == nil {
		t.Error("configured user with a wrong password accepted")
	}
	dash, err := connect(t, addr, "dash", "dash", "pw")
	if err != nil {
		t.Fatal(err)
	}
	dash.Publish("plenum/car/ch/lambda", 1, false, "from-dash").WaitTimeout(time.Second)
	op, err := connect(t, addr, "op", "op", "pw2")
	if err != nil {
		t.Fatal(err)
	}
	defer op.Disconnect(50)
	op.Publish("plenum/car/cmd/run", 1, false, "start").WaitTimeout(2 * time.Second)
	op.Publish("plenum/car/ch/lambda", 1, false, "from-op").WaitTimeout(time.Second)

	time.Sleep(300 * time.Millisecond)
	mu.Lock()
	defer mu.Unlock()
	if got["plenum/car/ch/lambda"] != "from-daemon" {
		t.Errorf("lambda topic = %q: only the daemon may publish data", got["plenum/car/ch/lambda"])
	}
	if got["plenum/car/cmd/run"] != "start" {
		t.Errorf("a user with command rights could not publish a command: %v", got)
	}
}

func TestAnonymousOff(t *testing.T) {
	b, err := Start(context.Background(), Config{Addr: "127.0.0.1:0"})
	if err != nil {
		t.Fatal(err)
	}
	defer b.Close()
	if _, err := connect(t, b.Addr().String(), "anon", "", ""); err == nil {
		t.Fatal("anonymous client accepted with Anonymous off")
	}
	if err := b.Close(); err != nil {
		t.Fatal(err)
	}
	if err := b.Close(); err != nil {
		t.Fatal("second Close:", err)
	}
}
