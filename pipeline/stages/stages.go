// Package stages runs a daemon's parts in stages: started in order, each
// under a context of its own, and stopped in reverse order once the
// daemon's context ends or a part fails, so that the parts that feed others
// stop first and what they took last still flows through.
package stages

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"net/http"
	"sync"
	"time"
)

// Part is one running piece of a daemon: Run runs until its context ends.
type Part struct {
	Name string
	Run  func(context.Context) error
}

// Stage is parts that start together and stop together.
type Stage []Part

// Run starts the stages in order, each under a context of its own, and
// runs them until ctx ends or a part fails. It then stops them in reverse
// order, each stage once the later ones have returned (or grace has passed
// for one: the parts still running are named in a warning), and returns
// every part's error. A part that returns nil before its stage is stopped
// has simply finished.
func Run(ctx context.Context, log *slog.Logger, grace time.Duration, stages ...Stage) error {
	failed := make(chan struct{})
	var failOnce sync.Once
	var mu sync.Mutex
	var errs []error
	cancels := make([]context.CancelFunc, len(stages))
	dones := make([]*sync.WaitGroup, len(stages))
	for i, st := range stages {
		// Not derived from ctx: a stage stops when runStages says so, in
		// order, not all at once when ctx ends.
		sctx, cancel := context.WithCancel(context.WithoutCancel(ctx))
		cancels[i] = cancel
		dones[i] = new(sync.WaitGroup)
		for _, pt := range st {
			dones[i].Add(1)
			go func() {
				defer dones[i].Done()
				err := pt.Run(sctx)
				if err == nil || sctx.Err() != nil && errors.Is(err, context.Canceled) {
					return
				}
				log.Error("part stopped", "part", pt.Name, "err", err)
				mu.Lock()
				errs = append(errs, fmt.Errorf("%s: %w", pt.Name, err))
				mu.Unlock()
				if sctx.Err() == nil {
					failOnce.Do(func() { close(failed) })
				}
			}()
		}
	}
	select {
	case <-ctx.Done():
	case <-failed:
	}
	log.Info("shutting down")
	for i := len(stages) - 1; i >= 0; i-- {
		cancels[i]()
		done := make(chan struct{})
		go func() { dones[i].Wait(); close(done) }()
		t := time.NewTimer(grace)
		select {
		case <-done:
		case <-t.C:
			var names []string
			for _, pt := range stages[i] {
				names = append(names, pt.Name)
			}
			log.Warn("parts did not stop in time; going on without them", "parts", names, "waited", grace)
		}
		t.Stop()
	}
	mu.Lock()
	defer mu.Unlock()
	return errors.Join(errs...)
}

// ServeHTTP serves srv on ln until ctx ends, then shuts the server down,
// giving requests in flight a second: the Run of an HTTP part.
func ServeHTTP(ctx context.Context, srv *http.Server, ln net.Listener) error {
	errc := make(chan error, 1)
	go func() { errc <- srv.Serve(ln) }()
	select {
	case err := <-errc:
		return fmt.Errorf("http: %w", err)
	case <-ctx.Done():
	}
	sctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), time.Second)
	defer cancel()
	srv.Shutdown(sctx)
	return nil
}
