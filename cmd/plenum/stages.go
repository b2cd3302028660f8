package main

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"sync"
	"time"
)

// part is one running piece of the daemon: it runs until its context ends.
type part struct {
	name string
	run  func(context.Context) error
}

// stage is parts that start together and stop together.
type stage []part

// runStages starts the stages in order, each under a context of its own,
// and runs them until ctx ends or a part fails. It then stops them in
// reverse order, each stage once the later ones have returned (or
// shutdownGrace has passed for one), and returns every part's error.
func runStages(ctx context.Context, log *slog.Logger, stages ...stage) error {
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
				err := pt.run(sctx)
				if err == nil || sctx.Err() != nil && errors.Is(err, context.Canceled) {
					return
				}
				log.Error("part stopped", "part", pt.name, "err", err)
				mu.Lock()
				errs = append(errs, fmt.Errorf("%s: %w", pt.name, err))
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
		t := time.NewTimer(shutdownGrace)
		select {
		case <-done:
		case <-t.C:
			var names []string
			for _, pt := range stages[i] {
				names = append(names, pt.name)
			}
			log.Warn("parts did not stop in time; going on without them", "parts", names, "waited", shutdownGrace)
		}
		t.Stop()
	}
	mu.Lock()
	defer mu.Unlock()
	return errors.Join(errs...)
}
