package main

import (
	"context"
	"testing"
	"time"

	paho "github.com/eclipse/paho.mqtt.golang"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
)

// The daemon's embedded broker keeps the publisher's client ID for it: a
// client connecting with it is refused, and live values keep coming.
func TestDaemonClientIDReserved(t *testing.T) {
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	_, mqttAddr, _ := startDemo(t, ctx, 4, nil)
	dial := func(id, user, pw string) (paho.Client, error) {
		c := paho.NewClient(paho.NewClientOptions().AddBroker("tcp://" + mqttAddr).SetClientID(id).
			SetUsername(user).SetPassword(pw).SetAutoReconnect(false).SetProtocolVersion(4))
		tok := c.Connect()
		if !tok.WaitTimeout(5 * time.Second) {
			t.Fatal("connect timed out")
		}
		return c, tok.Error()
	}
	if c, err := dial("plenum-brackenfell-rs", "", ""); err == nil {
		c.Disconnect(50)
		t.Fatal("an anonymous client connected with the daemon's client ID")
	}
	reader, err := dial("reader", "", "")
	if err != nil {
		t.Fatal(err)
	}
	defer reader.Disconnect(50)
	live := make(chan string, 16)
	reader.Subscribe("plenum/brackenfell-rs/ch/#", 0, func(_ paho.Client, m paho.Message) {
		select {
		case live <- m.Topic():
		default:
		}
	})
	select {
	case <-live:
	case <-time.After(10 * time.Second):
		t.Fatal("no live values after the refused takeover")
	}
}

// With mqtt.anonymous_read off, the embedded broker admits no client
// without credentials.
func TestAnonymousReadOff(t *testing.T) {
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	off := false
	_, mqttAddr, _ := startDemo(t, ctx, 4, func(c *config.Config) { c.MQTT.Anonymous = &off })
	c := paho.NewClient(paho.NewClientOptions().AddBroker("tcp://" + mqttAddr).SetClientID("anon").
		SetAutoReconnect(false).SetProtocolVersion(4))
	tok := c.Connect()
	if !tok.WaitTimeout(5 * time.Second) {
		t.Fatal("connect timed out")
	}
	if tok.Error() == nil {
		c.Disconnect(50)
		t.Fatal("anonymous client admitted with anonymous_read: false")
	}
}
