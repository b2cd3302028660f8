package derived

import (
	"fmt"
	"math"
	"time"

	"github.com/plenum-engine/plenum/derive/warn"
	"github.com/plenum-engine/plenum/pipeline"
)

// warnings wraps derive/warn: rule evaluation with durations and hysteresis.
// It feeds the engine only the inputs that changed, then lets timers run.
type warnings struct {
	emitter
	eng     *warn.Engine
	names   []string
	chIdx   []int
	last    []float64
	trans   []warn.Transition
	active  []float64
	lastAll time.Time
}

// newWarnings parses rules (skipping warn.Off ones), leaves out those on a
// channel has refuses, and returns nil when no rule is left.
func newWarnings(rules []warn.Text, has func(string) bool) (*warnings, error) {
	var parsed []warn.Rule
	for _, r := range rules {
		if r.Rule == warn.Off {
			continue
		}
		rule, err := warn.Parse(r.Name, r.Rule)
		if err != nil {
			return nil, fmt.Errorf("warning %s: %w", r.Name, err)
		}
		ok := true
		for _, ch := range rule.Channels() {
			if !has(ch) {
				ok = false // a rule on a channel this setup lacks is left out
			}
		}
		if ok {
			parsed = append(parsed, rule)
		}
	}
	if len(parsed) == 0 {
		return nil, nil
	}
	eng, err := warn.NewEngine(parsed)
	if err != nil {
		return nil, fmt.Errorf("warnings: %w", err)
	}
	w := &warnings{eng: eng, names: eng.Channels()}
	for _, n := range w.names {
		idx, _ := eng.Channel(n)
		w.chIdx = append(w.chIdx, idx)
	}
	w.last = make([]float64, len(w.names))
	for i := range w.last {
		w.last[i] = math.NaN()
	}
	w.active = make([]float64, eng.Rules())
	return w, nil
}

// Name names the detector.
func (w *warnings) Name() string { return "warnings" }

// Inputs are every channel a rule reads, each optional.
func (w *warnings) Inputs() []pipeline.Input {
	in := make([]pipeline.Input, len(w.names))
	for i, n := range w.names {
		in[i] = pipeline.Input{Name: n, Optional: true}
	}
	return in
}

// Outputs are one warning_<rule> channel per rule, 1 while raised.
func (w *warnings) Outputs() []pipeline.Channel {
	out := make([]pipeline.Channel, w.eng.Rules())
	for i := range out {
		name := w.ruleName(i)
		out[i] = pipeline.DerivedOutputs("warning_" + name)[0]
	}
	return out
}

func (w *warnings) ruleName(i int) string { return w.eng.RuleName(i) }

// Derive feeds the changed inputs to the engine, emits an event per
// transition and writes the rules' states.
func (w *warnings) Derive(t time.Time, in, out []float64) uint64 {
	w.trans = w.trans[:0]
	for i, v := range in {
		if math.IsNaN(v) || v == w.last[i] {
			continue
		}
		w.last[i] = v
		w.trans = w.eng.Update(w.chIdx[i], t, v, w.trans)
	}
	w.trans = w.eng.Advance(t, w.trans)
	var mask uint64
	for _, tr := range w.trans {
		kind := "warning_raised"
		v := 1.0
		switch tr.Kind {
		case warn.Cleared:
			kind, v = "warning_cleared", 0
		case warn.Acknowledged:
			kind = "warning_acknowledged"
		}
		w.active[tr.Rule] = v
		mask |= 1 << uint(tr.Rule)
		w.send(pipeline.Event{Kind: kind, Name: tr.Name, Start: tr.Since, End: tr.Time,
			Tags: map[string]string{"severity": tr.Severity.String()}, Fields: map[string]float64{"active": v}})
	}
	// Publish every rule's state once a second even without transitions, so
	// that the gauges stay fresh.
	for i := range w.active {
		out[i] = w.active[i]
	}
	if mask == 0 && t.Sub(w.lastAll) >= time.Second {
		mask = 1<<uint(len(w.active)) - 1
		w.lastAll = t
	}
	return mask
}
