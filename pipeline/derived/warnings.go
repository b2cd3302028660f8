package derived

import (
	"errors"
	"fmt"
	"math"
	"slices"
	"sync"
	"sync/atomic"
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
	sev     []warn.Severity // each rule's severity, in the engine's order

	// raised mirrors each rule's state for Acknowledge, which runs on
	// another goroutine than Derive.
	raised []atomic.Bool
	// Acknowledgements wait here until the next Derive applies them: the
	// engine belongs to the ingest goroutine.
	mu         sync.Mutex
	pending    []Ack
	hasPending atomic.Bool
	pendingBuf []Ack
}

// Ack is an acknowledgement of a raised warning: the rule, and who gave it
// by what path, both recorded in the warning_acknowledged event's tags.
type Ack struct {
	Rule string // the rule's name
	Via  string // the path it came by: "http", "mqtt"
	By   string // who gave it, as they said; may be empty
}

// ErrNotRaised is returned by Set.Acknowledge for a warning that is not
// raised: there is nothing to acknowledge.
var ErrNotRaised = errors.New("warning is not raised")

// ErrNoWarning is returned by Set.Acknowledge for a rule this setup does
// not evaluate.
var ErrNoWarning = errors.New("no such warning")

// acknowledge queues a for the next Derive.
func (w *warnings) acknowledge(a Ack) error {
	i := w.eng.Rule(a.Rule)
	if i < 0 {
		return fmt.Errorf("%w: %q (rules: %s)", ErrNoWarning, a.Rule, w.ruleList())
	}
	if !w.raised[i].Load() {
		return fmt.Errorf("%s: %w", a.Rule, ErrNotRaised)
	}
	w.mu.Lock()
	w.pending = append(w.pending, a)
	w.hasPending.Store(true)
	w.mu.Unlock()
	return nil
}

func (w *warnings) ruleList() string {
	names := make([]string, w.eng.Rules())
	for i := range names {
		names[i] = w.eng.RuleName(i)
	}
	return fmt.Sprint(names)
}

// takeAcks returns the queued acknowledgements, reusing a buffer.
func (w *warnings) takeAcks() []Ack {
	if !w.hasPending.Load() {
		return nil
	}
	w.mu.Lock()
	w.pendingBuf = append(w.pendingBuf[:0], w.pending...)
	w.pending = w.pending[:0]
	w.hasPending.Store(false)
	w.mu.Unlock()
	return w.pendingBuf
}

// WarningRule is a warning rule in use: its name and severity ("info",
// "warning" or "critical").
type WarningRule struct {
	Name, Severity string
}

// rules lists the rules in use, in the engine's order.
func (w *warnings) rules() []WarningRule {
	out := make([]WarningRule, len(w.sev))
	for i, s := range w.sev {
		out[i] = WarningRule{Name: w.ruleName(i), Severity: s.String()}
	}
	return out
}

// LeftOut is a built-in warning rule that Build left out because the setup
// neither measures nor derives channels it reads.
type LeftOut struct {
	Rule    string   // the rule's name
	Missing []string // the channels the setup lacks
}

// RuleChannelError is a configured warning rule (Config.Warnings[Index])
// that reads a channel the setup neither measures nor derives: it could
// never be raised, so Build refuses it.
type RuleChannelError struct {
	Index   int    // in Config.Warnings
	Rule    string // the rule's name
	Channel string // the first channel the setup lacks
	// Known tells whether the channel is in the channel catalogue (the
	// setup lacks it) or not (a misspelt name); Suggest is the catalogued
	// name nearest a misspelt one, or "".
	Known   bool
	Suggest string
}

// Error says what is wrong as a sentence.
func (e *RuleChannelError) Error() string {
	if !e.Known {
		s := fmt.Sprintf("warning rule %s reads %q, which is no channel Plenum knows", e.Rule, e.Channel)
		if e.Suggest != "" {
			s += fmt.Sprintf(" (did you mean %s?)", e.Suggest)
		}
		return s + "; the rule could never be raised."
	}
	return fmt.Sprintf("warning rule %s reads %s, which this setup neither measures nor derives, so it could never be raised: add an input for %s or remove the rule.", e.Rule, e.Channel, e.Channel)
}

// newWarnings parses the built-in rules merged with the configured ones
// (skipping warn.Off ones). A built-in rule on a channel has refuses is left
// out and listed in leftOut; a configured rule on such a channel is a
// *RuleChannelError, unless lenient, when it is left out too.
func newWarnings(user []warn.Text, has func(string) bool, lenient bool) (w *warnings, leftOut []LeftOut, err error) {
	configured := map[string]int{}
	for i, r := range user {
		configured[r.Name] = i
	}
	var parsed []warn.Rule
	for _, r := range warn.Merge(warn.Builtin(), user) {
		if r.Rule == warn.Off {
			continue
		}
		rule, err := warn.Parse(r.Name, r.Rule)
		if err != nil {
			return nil, nil, fmt.Errorf("warning %s: %w", r.Name, err)
		}
		var missing []string
		for _, ch := range rule.Channels() {
			if !has(ch) && !slices.Contains(missing, ch) {
				missing = append(missing, ch)
			}
		}
		if len(missing) == 0 {
			parsed = append(parsed, rule)
			continue
		}
		if i, ok := configured[r.Name]; ok && !lenient {
			_, known := pipeline.Catalogued(missing[0])
			e := &RuleChannelError{Index: i, Rule: r.Name, Channel: missing[0], Known: known}
			if !known {
				e.Suggest = nearestChannel(missing[0])
			}
			return nil, nil, e
		}
		leftOut = append(leftOut, LeftOut{Rule: r.Name, Missing: missing})
	}
	if len(parsed) == 0 {
		return nil, leftOut, nil
	}
	eng, err := warn.NewEngine(parsed)
	if err != nil {
		return nil, nil, fmt.Errorf("warnings: %w", err)
	}
	w = &warnings{eng: eng, names: eng.Channels()}
	for _, r := range parsed {
		if r.Severity == 0 {
			r.Severity = warn.Warning // the engine's default
		}
		w.sev = append(w.sev, r.Severity)
	}
	for _, n := range w.names {
		idx, _ := eng.Channel(n)
		w.chIdx = append(w.chIdx, idx)
	}
	w.last = make([]float64, len(w.names))
	for i := range w.last {
		w.last[i] = math.NaN()
	}
	w.active = make([]float64, eng.Rules())
	w.raised = make([]atomic.Bool, eng.Rules())
	return w, leftOut, nil
}

// nearestChannel returns the catalogued channel name nearest name by edit
// distance, when it is close enough to be a misspelling; else "".
func nearestChannel(name string) string {
	best, bestD := "", 4
	for _, c := range pipeline.Catalogue() {
		if d := editDistance(name, c.Name); d < bestD {
			best, bestD = c.Name, d
		}
	}
	return best
}

// editDistance is the Levenshtein distance between a and b, in bytes.
func editDistance(a, b string) int {
	prev := make([]int, len(b)+1)
	cur := make([]int, len(b)+1)
	for j := range prev {
		prev[j] = j
	}
	for i := 1; i <= len(a); i++ {
		cur[0] = i
		for j := 1; j <= len(b); j++ {
			cost := 1
			if a[i-1] == b[j-1] {
				cost = 0
			}
			cur[j] = min(prev[j]+1, cur[j-1]+1, prev[j-1]+cost)
		}
		prev, cur = cur, prev
	}
	return prev[len(b)]
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
	var acks []Ack
	for _, a := range w.takeAcks() {
		if i := w.eng.Rule(a.Rule); i >= 0 {
			n := len(w.trans)
			w.trans = w.eng.Acknowledge(i, t, w.trans)
			if len(w.trans) > n {
				acks = append(acks, a)
			}
		}
	}
	var mask uint64
	for _, tr := range w.trans {
		kind := "warning_raised"
		v := 1.0
		tags := map[string]string{"severity": tr.Severity.String()}
		switch tr.Kind {
		case warn.Cleared:
			kind, v = "warning_cleared", 0
		case warn.Acknowledged:
			kind = "warning_acknowledged"
			for _, a := range acks {
				if a.Rule == tr.Name {
					tags["via"] = a.Via
					if a.By != "" {
						tags["by"] = a.By
					}
					break
				}
			}
		}
		w.active[tr.Rule] = v
		w.raised[tr.Rule].Store(v == 1)
		mask |= 1 << uint(tr.Rule)
		w.send(pipeline.Event{Kind: kind, Name: tr.Name, Start: tr.Since, End: tr.Time,
			Tags: tags, Fields: map[string]float64{"active": v}})
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
