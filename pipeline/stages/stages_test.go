package stages

import (
	"bytes"
	"context"
	"errors"
	"io"
	"log/slog"
	"net"
	"net/http"
	"strings"
	"sync"
	"testing"
	"time"
)

// Stages stop in reverse order of their start, each once the later ones
// have returned; a failing part stops them all and its error comes back.
func TestRunStopsInReverseOrder(t *testing.T) {
	var mu sync.Mutex
	var order []string
	started := make(chan string, 3)
	part := func(name string, fail error) Part {
		return Part{Name: name, Run: func(ctx context.Context) error {
			started <- name
			if fail != nil {
				return fail
			}
			<-ctx.Done()
			mu.Lock()
			order = append(order, name)
			mu.Unlock()
			return ctx.Err()
		}}
	}
	boom := errors.New("device gone for good")
	failing := Part{Name: "driver", Run: func(ctx context.Context) error {
		for i := 0; i < 2; i++ { // fail once the others have started
			<-started
		}
		return boom
	}}
	var log bytes.Buffer
	err := Run(context.Background(), slog.New(slog.NewTextHandler(&log, nil)), time.Second,
		Stage{part("http", nil)}, Stage{part("pipeline", nil)}, Stage{failing})
	if !errors.Is(err, boom) || !strings.Contains(err.Error(), "driver: ") {
		t.Fatalf("Run = %v, want the driver's error", err)
	}
	if strings.Join(order, ",") != "pipeline,http" {
		t.Fatalf("stopped in order %v, want pipeline then http", order)
	}
	if !strings.Contains(log.String(), "part stopped") {
		t.Errorf("the failure was not logged:\n%s", log.String())
	}
}

// A part that does not stop within the grace is named in a warning, and
// the stages before it still stop.
func TestRunGoesOnAfterGrace(t *testing.T) {
	ctx, cancel := context.WithCancel(context.Background())
	stuck := make(chan struct{})
	defer close(stuck)
	stopped := make(chan struct{})
	var log bytes.Buffer
	done := make(chan error, 1)
	go func() {
		done <- Run(ctx, slog.New(slog.NewTextHandler(&log, nil)), 10*time.Millisecond,
			Stage{{Name: "first", Run: func(ctx context.Context) error { <-ctx.Done(); close(stopped); return nil }}},
			Stage{{Name: "stuck", Run: func(context.Context) error { <-stuck; return nil }}})
	}()
	cancel()
	if err := <-done; err != nil {
		t.Fatalf("Run = %v", err)
	}
	<-stopped
	if !strings.Contains(log.String(), "parts did not stop in time") || !strings.Contains(log.String(), "stuck") {
		t.Errorf("no warning naming the stuck part:\n%s", log.String())
	}
}

// ServeHTTP serves until its context ends, then shuts the server down.
func TestServeHTTP(t *testing.T) {
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	srv := &http.Server{Handler: http.HandlerFunc(func(w http.ResponseWriter, _ *http.Request) { io.WriteString(w, "up") })}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- ServeHTTP(ctx, srv, ln) }()
	resp, err := http.Get("http://" + ln.Addr().String())
	if err != nil {
		t.Fatal(err)
	}
	b, _ := io.ReadAll(resp.Body)
	resp.Body.Close()
	if string(b) != "up" {
		t.Fatalf("served %q", b)
	}
	cancel()
	if err := <-done; err != nil {
		t.Fatalf("ServeHTTP = %v after its context ended", err)
	}
	if _, err := http.Get("http://" + ln.Addr().String()); err == nil {
		t.Fatal("still serving after the shutdown")
	}
}
