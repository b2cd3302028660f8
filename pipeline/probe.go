package pipeline

import (
	"context"
	"errors"
)

// ErrStopped is returned by Probe once the ingest loop has returned.
var ErrStopped = errors.New("pipeline: the ingest loop has stopped")

// Probe returns nil once the ingest loop has taken the probe between two
// frames: proof that the loop that processes frames is turning, not only
// that the process is alive. It returns ctx's error if the loop does not
// take it first (a derivation or the fan-out stuck inside a frame), and
// ErrStopped once Run has returned. The service manager's watchdog is
// pinged only after an answered probe.
func (p *Pipeline) Probe(ctx context.Context) error {
	select {
	case p.probe <- struct{}{}:
		return nil
	case <-ctx.Done():
		return ctx.Err()
	case <-p.done:
		return ErrStopped
	}
}
