package derived

import "github.com/plenum-engine/plenum/pipeline"

// emitter is embedded by derivations that emit events; it makes them a
// pipeline.EventSink.
type emitter struct{ emit func(pipeline.Event) }

// SetEmitter receives the pipeline's event fan-out.
func (e *emitter) SetEmitter(f func(pipeline.Event)) { e.emit = f }

func (e *emitter) send(ev pipeline.Event) {
	if e.emit != nil {
		e.emit(ev)
	}
}
