package warn

import (
	"fmt"
	"time"
)

// TransitionKind says what happened to a warning.
type TransitionKind uint8

// The transitions.
const (
	Raised TransitionKind = iota + 1
	Cleared
	Acknowledged
)

// String returns the transition's name.
func (k TransitionKind) String() string {
	switch k {
	case Raised:
		return "raised"
	case Cleared:
		return "cleared"
	case Acknowledged:
		return "acknowledged"
	}
	return fmt.Sprintf("TransitionKind(%d)", int(k))
}

// Transition is a change of one warning's state.
type Transition struct {
	Rule     int            // index of the rule in the engine's rule list
	Name     string         // the rule's name
	Severity Severity       // the rule's severity
	Kind     TransitionKind // what happened
	Time     time.Time      // when it happened (the time of the sample that caused it)
	Since    time.Time      // Raised: when the condition started to hold
}

// leaf is a compiled condition with its hysteresis and rate state.
type leaf struct {
	c        Condition
	ch       int
	window   float64 // s
	active   bool
	seen     bool
	refT     time.Time
	refV     float64
	rate     float64
	haveRate bool
}

// node is a compiled Expr: a leaf index, or children kids[first:first+n].
type node struct {
	kind     Kind
	leaf     int
	first, n int
}

type ruleState struct {
	r          Rule
	root       int
	holding    bool // condition true
	since      time.Time
	raised     bool
	acked      bool
	clearing   bool
	clearSince time.Time
}

// Engine evaluates a fixed set of rules over a stream of samples. Build it
// with NewEngine; feed it with Update. It allocates nothing per sample once
// the out slice passed in has grown to its working size. An Engine is not
// safe for concurrent use.
type Engine struct {
	rules    []ruleState
	leaves   []leaf
	nodes    []node
	kids     []int
	channels []string
	chIndex  map[string]int
	byCh     [][]int // channel → leaves
	rulesBy  [][]int // channel → rules
}

// NewEngine validates and compiles rules. Rule names must be unique.
func NewEngine(rules []Rule) (*Engine, error) {
	e := &Engine{chIndex: map[string]int{}}
	names := map[string]bool{}
	for i := range rules {
		r := rules[i]
		if err := r.Validate(); err != nil {
			return nil, fmt.Errorf("rule %d: %w", i, err)
		}
		if names[r.Name] {
			return nil, fmt.Errorf("rule %d: duplicate rule name %q", i, r.Name)
		}
		names[r.Name] = true
		if r.Severity == 0 {
			r.Severity = Warning
		}
		ri := len(e.rules)
		root := e.compile(&r.When, ri)
		e.rules = append(e.rules, ruleState{r: r, root: root})
	}
	return e, nil
}

func (e *Engine) compile(x *Expr, rule int) int {
	idx := len(e.nodes)
	e.nodes = append(e.nodes, node{kind: x.Kind})
	if x.Kind == Leaf {
		ch, ok := e.chIndex[x.Cond.Channel]
		if !ok {
			ch = len(e.channels)
			e.chIndex[x.Cond.Channel] = ch
			e.channels = append(e.channels, x.Cond.Channel)
			e.byCh = append(e.byCh, nil)
			e.rulesBy = append(e.rulesBy, nil)
		}
		w := x.Cond.Window
		if w == 0 {
			w = DefaultWindow
		}
		li := len(e.leaves)
		e.leaves = append(e.leaves, leaf{c: x.Cond, ch: ch, window: w.Seconds()})
		e.byCh[ch] = append(e.byCh[ch], li)
		if rs := e.rulesBy[ch]; len(rs) == 0 || rs[len(rs)-1] != rule {
			e.rulesBy[ch] = append(rs, rule)
		}
		e.nodes[idx].leaf = li
		return idx
	}
	child := make([]int, len(x.Args))
	for i := range x.Args {
		child[i] = e.compile(&x.Args[i], rule)
	}
	e.nodes[idx].first, e.nodes[idx].n = len(e.kids), len(child)
	e.kids = append(e.kids, child...)
	return idx
}

// Channels returns the channel names the rules read, indexed as Update
// expects.
func (e *Engine) Channels() []string { return append([]string(nil), e.channels...) }

// Channel returns the index of a channel name for Update.
func (e *Engine) Channel(name string) (int, bool) {
	i, ok := e.chIndex[name]
	return i, ok
}

// Rules returns the number of rules; transitions refer to them by index.
func (e *Engine) Rules() int { return len(e.rules) }

// RuleName returns the name of rule i.
func (e *Engine) RuleName(i int) string { return e.rules[i].r.Name }

// Rule returns the index of the rule named name, or -1.
func (e *Engine) Rule(name string) int {
	for i := range e.rules {
		if e.rules[i].r.Name == name {
			return i
		}
	}
	return -1
}

// Raised reports whether rule i is raised.
func (e *Engine) Raised(i int) bool { return i >= 0 && i < len(e.rules) && e.rules[i].raised }

// Update feeds one sample of channel ch at time t and appends the
// transitions it causes to out. A NaN or infinite value, an unknown channel
// or a time that does not advance for that channel is ignored (the
// caller flags bad samples; a warning does not change on them).
func (e *Engine) Update(ch int, t time.Time, v float64, out []Transition) []Transition {
	if ch < 0 || ch >= len(e.byCh) || !finite(v) {
		return out
	}
	for _, li := range e.byCh[ch] {
		e.leaves[li].update(t, v)
	}
	for _, ri := range e.rulesBy[ch] {
		out = e.step(ri, t, out)
	}
	return out
}

// Advance re-checks every rule's timers at time t without a new sample, so
// that a minimum duration can expire while inputs are quiet.
func (e *Engine) Advance(t time.Time, out []Transition) []Transition {
	for ri := range e.rules {
		out = e.step(ri, t, out)
	}
	return out
}

// Acknowledge acknowledges rule i at time t. A latched warning whose
// condition no longer holds clears now.
func (e *Engine) Acknowledge(i int, t time.Time, out []Transition) []Transition {
	if i < 0 || i >= len(e.rules) {
		return out
	}
	rs := &e.rules[i]
	if !rs.raised || rs.acked {
		return out
	}
	rs.acked = true
	out = append(out, Transition{Rule: i, Name: rs.r.Name, Severity: rs.r.Severity, Kind: Acknowledged, Time: t, Since: rs.since})
	return e.step(i, t, out)
}

func (l *leaf) update(t time.Time, v float64) {
	x := v
	if l.c.Op == RateAbove || l.c.Op == RateBelow {
		if !l.seen {
			l.seen, l.refT, l.refV = true, t, v
			return
		}
		dt := t.Sub(l.refT).Seconds()
		if dt <= 0 {
			return
		}
		if dt < l.window {
			if !l.haveRate {
				return
			}
			x = l.rate
		} else {
			l.rate, l.haveRate = (v-l.refV)/dt, true
			l.refT, l.refV = t, v
			x = l.rate
		}
	}
	l.seen = true
	lo, hi := l.c.Level, l.c.High
	clo, chi := lo, hi
	if l.c.HasClear {
		clo, chi = l.c.Clear, l.c.ClearHigh
	}
	switch l.c.Op {
	case Above, RateAbove:
		if !l.active && x > lo {
			l.active = true
		} else if l.active && x < clo {
			l.active = false
		}
	case Below, RateBelow:
		if !l.active && x < lo {
			l.active = true
		} else if l.active && x > clo {
			l.active = false
		}
	case Outside:
		if !l.active && (x < lo || x > hi) {
			l.active = true
		} else if l.active && x > clo && x < chi {
			l.active = false
		}
	}
}

func (e *Engine) eval(n int) bool {
	nd := &e.nodes[n]
	switch nd.kind {
	case Leaf:
		return e.leaves[nd.leaf].active
	case All:
		for _, k := range e.kids[nd.first : nd.first+nd.n] {
			if !e.eval(k) {
				return false
			}
		}
		return true
	case Any:
		for _, k := range e.kids[nd.first : nd.first+nd.n] {
			if e.eval(k) {
				return true
			}
		}
	}
	return false
}

func (e *Engine) step(ri int, t time.Time, out []Transition) []Transition {
	rs := &e.rules[ri]
	if e.eval(rs.root) {
		rs.clearing = false
		if !rs.holding {
			rs.holding, rs.since = true, t
		}
		if !rs.raised && t.Sub(rs.since) >= rs.r.For {
			rs.raised, rs.acked = true, false
			out = append(out, Transition{Rule: ri, Name: rs.r.Name, Severity: rs.r.Severity, Kind: Raised, Time: t, Since: rs.since})
		}
		return out
	}
	rs.holding = false
	if !rs.raised || (rs.r.Latch && !rs.acked) {
		return out
	}
	if !rs.clearing {
		rs.clearing, rs.clearSince = true, t
	}
	if t.Sub(rs.clearSince) >= rs.r.ClearFor {
		rs.raised, rs.clearing = false, false
		out = append(out, Transition{Rule: ri, Name: rs.r.Name, Severity: rs.r.Severity, Kind: Cleared, Time: t, Since: rs.since})
	}
	return out
}
