package pipeline

import (
	"context"
	"errors"
	"testing"
	"time"
)

// blockDeriv blocks inside Derive while its gate is held: the ingest loop
// is stuck inside a frame.
type blockDeriv struct {
	entered chan struct{}
	gate    chan struct{}
}

func (d *blockDeriv) Name() string       { return "block" }
func (d *blockDeriv) Inputs() []Input    { return []Input{{Name: "a"}} }
func (d *blockDeriv) Outputs() []Channel { return nil }
func (d *blockDeriv) Derive(time.Time, []float64, []float64) uint64 {
	d.entered <- struct{}{}
	<-d.gate
	return 0
}

// The probe is answered by the ingest loop between frames: not while a
// frame is stuck in a derivation, at once when it is released, and with
// ErrStopped once the loop has returned.
func TestProbeAnsweredByIngestLoop(t *testing.T) {
	reg := newReg(t, "a")
	d := &blockDeriv{entered: make(chan struct{}), gate: make(chan struct{})}
	g, err := BuildGraph(reg, []Derivation{d})
	if err != nil {
		t.Fatal(err)
	}
	p := New(reg, g, Options{})
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- p.Run(ctx) }()

	if err := p.Probe(context.Background()); err != nil { // idle loop: answered
		t.Fatalf("Probe on an idle loop = %v", err)
	}
	id, _ := reg.Lookup("a")
	p.Put(Sample{Channel: id, Value: 1, Time: time.Unix(1, 0)})
	<-d.entered // the loop is inside the frame now
	pctx, pcancel := context.WithTimeout(context.Background(), 50*time.Millisecond)
	err = p.Probe(pctx)
	pcancel()
	if !errors.Is(err, context.DeadlineExceeded) {
		t.Fatalf("Probe while a derivation blocks = %v, want the deadline", err)
	}
	close(d.gate)
	if err := p.Probe(context.Background()); err != nil {
		t.Fatalf("Probe after the release = %v", err)
	}
	cancel()
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	if err := p.Probe(context.Background()); !errors.Is(err, ErrStopped) {
		t.Fatalf("Probe after Run returned = %v, want ErrStopped", err)
	}
}
