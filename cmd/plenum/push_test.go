package main

import (
	"bytes"
	"context"
	"io"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"sync"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/pipeline/record"
)

// The recorded lines reach an InfluxDB-compatible write endpoint exactly as
// they are in the run's file, in order and once, through failures of the
// endpoint and a daemon restart (what was not sent waits in the backlog).
func TestPushRecordedRun(t *testing.T) {
	var mu sync.Mutex
	var got bytes.Buffer // what was accepted, in order
	calls := 0
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		body, _ := io.ReadAll(r.Body)
		mu.Lock()
		defer mu.Unlock()
		calls++
		if r.URL.Path != "/write" || r.URL.Query().Get("precision") != "ns" || r.Header.Get("Authorization") != "Token t0k" {
			http.Error(w, "bad request line", http.StatusBadRequest)
			return
		}
		if calls%3 == 1 { // every third request fails before it is stored
			http.Error(w, "busy", http.StatusServiceUnavailable)
			return
		}
		got.Write(body)
		w.WriteHeader(http.StatusNoContent)
	}))
	defer srv.Close()
	tokFile := filepath.Join(t.TempDir(), "token")
	os.WriteFile(tokFile, []byte("t0k\n"), 0o600)
	recDir, stateDir := t.TempDir(), t.TempDir()
	mutate := func(manual bool) func(*config.Config) {
		return func(c *config.Config) {
			c.Record.Dir, c.Record.Manual, c.StateDir = recDir, manual, stateDir
			c.Record.Push = config.Push{URL: srv.URL + "/write?db=plenum&precision=ns", TokenFile: tokFile, FlushEvery: config.Duration(200 * time.Millisecond)}
		}
	}
	ctx, cancel := context.WithCancel(context.Background())
	_, _, done := startDemo(t, ctx, 4, mutate(false))
	time.Sleep(3 * time.Second)
	cancel()
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	ents, _ := os.ReadDir(recDir)
	if len(ents) != 1 {
		t.Fatalf("%d runs", len(ents))
	}
	want, err := record.ReadFile(filepath.Join(recDir, ents[0].Name(), "0001.lp")) // or its .lp.gz
	if err != nil || len(want) == 0 {
		t.Fatalf("run data: %v", err)
	}
	mu.Lock()
	if !bytes.HasPrefix(want, got.Bytes()) {
		t.Fatal("what the endpoint accepted is not the start of the recorded file")
	}
	mu.Unlock()

	// The restarted daemon sends the rest from the backlog; no new run.
	ctx2, cancel2 := context.WithCancel(context.Background())
	defer cancel2()
	_, _, done2 := startDemo(t, ctx2, 4, mutate(true))
	deadline := time.Now().Add(20 * time.Second)
	for time.Now().Before(deadline) {
		mu.Lock()
		n := got.Len()
		mu.Unlock()
		if n >= len(want) {
			break
		}
		time.Sleep(50 * time.Millisecond)
	}
	time.Sleep(300 * time.Millisecond) // anything extra would show now
	cancel2()
	<-done2
	mu.Lock()
	defer mu.Unlock()
	if !bytes.Equal(got.Bytes(), want) {
		t.Fatalf("the endpoint accepted %d bytes (%d lines), the run holds %d (%d lines): not the same lines, once each, in order",
			got.Len(), bytes.Count(got.Bytes(), []byte{'\n'}), len(want), bytes.Count(want, []byte{'\n'}))
	}
	t.Logf("%d lines pushed in %d requests (a third of them refused with 503 and retried)", bytes.Count(want, []byte{'\n'}), calls)
	// Every line acknowledged, across the restart: the run is marked
	// pushed (what retention waits for when pushing is on).
	if marked, complete := record.Pushed(filepath.Join(recDir, ents[0].Name())); !marked || !complete {
		t.Errorf("the run's pushed marker: there %v, complete %v", marked, complete)
	}
}
