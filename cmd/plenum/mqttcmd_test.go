package main

import (
	"context"
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	paho "github.com/eclipse/paho.mqtt.golang"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline/record"
	"github.com/plenum-engine/plenum/pipeline/runs"
)

// Runs start and stop on MQTT commands from a user with command rights;
// a read-only client cannot, and a wrong token is refused. Entered and
// measured conditions go into run.json.
func TestMQTTRunCommands(t *testing.T) {
	recDir := t.TempDir()
	pwDir := t.TempDir()
	for name, pw := range map[string]string{"cell": "cell-pass", "wall": "wall-pass"} {
		if err := os.WriteFile(filepath.Join(pwDir, name), []byte(pw+"\n"), 0o600); err != nil {
			t.Fatal(err)
		}
	}
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	_, mqttAddr, done := startDemo(t, ctx, 4, func(c *config.Config) {
		c.Record.Dir = recDir
		c.Record.Manual = true
		c.Record.ControlToken = "tok-7"
		c.MQTT.Commands = true
		c.MQTT.Users = []config.MQTTUser{
			{Name: "cell", PasswordFile: filepath.Join(pwDir, "cell"), Commands: true},
			{Name: "wall", PasswordFile: filepath.Join(pwDir, "wall")},
		}
	})
	connect := func(user, pw string) paho.Client {
		c := paho.NewClient(paho.NewClientOptions().AddBroker("tcp://" + mqttAddr).SetClientID("cmd-" + user).
			SetUsername(user).SetPassword(pw).SetAutoReconnect(false))
		if tok := c.Connect(); !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
			t.Fatalf("connect %s: %v", user, tok.Error())
		}
		return c
	}
	var mu sync.Mutex
	var replies []runs.Reply
	cell := connect("cell", "cell-pass")
	defer cell.Disconnect(100)
	if tok := cell.Subscribe("plenum/brackenfell-rs/reply/#", 1, func(_ paho.Client, m paho.Message) {
		var r runs.Reply
		if err := json.Unmarshal(m.Payload(), &r); err != nil {
			t.Errorf("reply %q: %v", m.Payload(), err)
		}
		mu.Lock()
		replies = append(replies, r)
		mu.Unlock()
	}); !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		t.Fatal(tok.Error())
	}
	waitReply := func(request string) runs.Reply {
		t.Helper()
		deadline := time.Now().Add(10 * time.Second)
		for time.Now().Before(deadline) {
			mu.Lock()
			for _, r := range replies {
				if r.Request == request {
					mu.Unlock()
					return r
				}
			}
			mu.Unlock()
			time.Sleep(20 * time.Millisecond)
		}
		t.Fatalf("no reply to %s", request)
		return runs.Reply{}
	}
	send := func(c paho.Client, topic string, payload string) {
		t.Helper()
		tok := c.Publish(topic, 1, false, payload)
		tok.WaitTimeout(5 * time.Second)
	}
	// Give the daemon time to subscribe and the sensors time to be fresh.
	time.Sleep(1500 * time.Millisecond)

	// A read-only user's command never reaches the daemon.
	wall := connect("wall", "wall-pass")
	send(wall, "plenum/brackenfell-rs/cmd/run/start", `{"request":"w1","token":"tok-7"}`)
	wall.Disconnect(100)
	// A wrong token is refused with a reply.
	send(cell, "plenum/brackenfell-rs/cmd/run/start", `{"request":"c0","token":"wrong"}`)
	if r := waitReply("c0"); r.OK || !strings.Contains(r.Error, "unauthorized") {
		t.Fatalf("wrong token: %+v", r)
	}
	send(cell, "plenum/brackenfell-rs/cmd/run/start", `{"request":"c1","token":"tok-7","label":"pull 3","notes":"new intercooler",
		"conditions":{"temperature_c":18.5,"relative_humidity":0.62}}`)
	start := waitReply("c1")
	if !start.OK || start.Run == "" {
		t.Fatalf("start: %+v", start)
	}
	mu.Lock()
	for _, r := range replies {
		if r.Request == "w1" {
			t.Errorf("the read-only user's command was obeyed: %+v", r)
		}
	}
	mu.Unlock()
	send(cell, "plenum/brackenfell-rs/cmd/run/start", `{"request":"c2","token":"tok-7"}`)
	if r := waitReply("c2"); r.OK || !strings.Contains(r.Error, "already") {
		t.Fatalf("second start: %+v", r)
	}
	time.Sleep(time.Second)
	send(cell, "plenum/brackenfell-rs/cmd/run/stop", `{"request":"c3","token":"tok-7"}`)
	stop := waitReply("c3")
	if !stop.OK || stop.Run != start.Run || stop.Summary == nil || stop.Summary.Samples < 500 {
		t.Fatalf("stop: %+v", stop)
	}
	if c := stop.Summary.Conditions; c == nil || c.PressurePa == nil || *c.PressurePa < 95000 || *c.PressurePa > 106000 {
		t.Errorf("summary conditions %+v: want the mean barometric pressure of the demo (100.8 kPa)", c)
	}
	b, err := os.ReadFile(filepath.Join(recDir, start.Run, "run.json"))
	if err != nil {
		t.Fatal(err)
	}
	var meta record.Meta
	if err := json.Unmarshal(b, &meta); err != nil {
		t.Fatal(err)
	}
	c := meta.Conditions
	if meta.Label != "pull 3" || meta.Notes != "new intercooler" || c == nil || c.Source != "sensors+entered" ||
		c.TemperatureC == nil || *c.TemperatureC != 18.5 || c.RelativeHumidity == nil || *c.RelativeHumidity != 0.62 ||
		c.PressurePa == nil || *c.PressurePa < 95000 || *c.PressurePa > 106000 {
		t.Fatalf("run.json: %s", b)
	}
	cancel()
	if err := <-done; err != nil {
		t.Fatal(err)
	}
}
