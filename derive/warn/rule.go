// Package warn is Plenum's warning rules engine: conditions on channel
// values (above, below, outside a band, rate of change), combined with and /
// or, raised only after a minimum duration, cleared past a separate clear
// level (hysteresis), with a severity and optional latching until
// acknowledged. Rules are Go structs (Rule) or text in Plenum's own rule
// syntax (Parse). The engine is streaming and does not allocate per sample.
package warn

import (
	"errors"
	"fmt"
	"math"
	"strconv"
	"strings"
	"time"
)

// Op is a condition's comparison.
type Op uint8

// The comparisons.
const (
	// Above is true when the value exceeds Level; it clears when the value
	// falls below Clear.
	Above Op = iota + 1
	// Below is true when the value is under Level; it clears when the value
	// rises above Clear.
	Below
	// Outside is true when the value leaves the band [Level, High]; it
	// clears when the value is strictly inside [Clear, ClearHigh].
	Outside
	// RateAbove is true when the rate of change (unit per second, over
	// Window) exceeds Level; it clears when the rate falls below Clear.
	RateAbove
	// RateBelow is true when the rate of change is under Level (a fall, for
	// a negative Level); it clears when the rate rises above Clear.
	RateBelow
)

// String returns the operator's name.
func (o Op) String() string {
	switch o {
	case Above:
		return "above"
	case Below:
		return "below"
	case Outside:
		return "outside"
	case RateAbove:
		return "rate_above"
	case RateBelow:
		return "rate_below"
	}
	return fmt.Sprintf("Op(%d)", int(o))
}

// DefaultWindow is the rate-of-change window when a condition gives none.
const DefaultWindow = 100 * time.Millisecond

// Condition compares one channel's value (or its rate of change) with a
// level. Without HasClear the clear level equals the raise level (Level,
// High), so the condition still needs to move past it to change state.
type Condition struct {
	Channel   string        // channel name
	Op        Op            // comparison
	Level     float64       // raise level; band low for Outside
	High      float64       // band high for Outside
	HasClear  bool          // Clear/ClearHigh are set
	Clear     float64       // clear level; clear band low for Outside
	ClearHigh float64       // clear band high for Outside
	Window    time.Duration // rate window for RateAbove/RateBelow; 0 = DefaultWindow
}

// Kind says what an Expr node is.
type Kind uint8

// The node kinds.
const (
	Leaf Kind = iota + 1 // Cond
	All                  // every Arg (and)
	Any                  // at least one Arg (or)
)

// Expr is a condition tree.
type Expr struct {
	Kind Kind      // node kind
	Cond Condition // for Leaf
	Args []Expr    // for All and Any
}

// Severity ranks a warning.
type Severity uint8

// The severities.
const (
	Info Severity = iota + 1
	Warning
	Critical
)

// String returns the severity's name.
func (s Severity) String() string {
	switch s {
	case Info:
		return "info"
	case Warning:
		return "warning"
	case Critical:
		return "critical"
	}
	return fmt.Sprintf("Severity(%d)", int(s))
}

// ParseSeverity returns the severity for "info", "warning" or "critical".
func ParseSeverity(s string) (Severity, error) {
	switch s {
	case "info":
		return Info, nil
	case "warning":
		return Warning, nil
	case "critical":
		return Critical, nil
	}
	return 0, fmt.Errorf("unknown severity %q (known: info, warning, critical)", s)
}

// Rule is one warning.
type Rule struct {
	Name     string        // unique within an engine
	When     Expr          // the condition
	For      time.Duration // the condition must hold this long before the warning is raised
	ClearFor time.Duration // and be false this long before it clears
	Severity Severity      // 0 means Warning
	Latch    bool          // stay raised, once raised, until acknowledged
}

// MaxDepth bounds the nesting of a rule's condition tree.
const MaxDepth = 32

// Validate checks a rule and names the offending part.
func (r *Rule) Validate() error {
	if r.Name == "" {
		return errors.New("warn: rule has no name")
	}
	if r.For < 0 || r.ClearFor < 0 {
		return fmt.Errorf("warn: rule %q: negative duration", r.Name)
	}
	if r.Severity > Critical {
		return fmt.Errorf("warn: rule %q: unknown severity %d", r.Name, r.Severity)
	}
	if err := r.When.validate("when", 0); err != nil {
		return fmt.Errorf("warn: rule %q: %w", r.Name, err)
	}
	return nil
}

func (e *Expr) validate(path string, depth int) error {
	if depth > MaxDepth {
		return fmt.Errorf("%s: nested deeper than %d", path, MaxDepth)
	}
	switch e.Kind {
	case Leaf:
		return e.Cond.validate(path)
	case All, Any:
		if len(e.Args) == 0 {
			return fmt.Errorf("%s: empty %s", path, map[Kind]string{All: "and", Any: "or"}[e.Kind])
		}
		for i := range e.Args {
			if err := e.Args[i].validate(fmt.Sprintf("%s[%d]", path, i), depth+1); err != nil {
				return err
			}
		}
		return nil
	}
	return fmt.Errorf("%s: unknown node kind %d", path, e.Kind)
}

func finite(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }

func (c *Condition) validate(path string) error {
	if c.Channel == "" {
		return fmt.Errorf("%s: no channel", path)
	}
	if !finite(c.Level) || !finite(c.High) || !finite(c.Clear) || !finite(c.ClearHigh) {
		return fmt.Errorf("%s (%s): level not finite", path, c.Channel)
	}
	if c.Window < 0 {
		return fmt.Errorf("%s (%s): negative rate window", path, c.Channel)
	}
	switch c.Op {
	case Above, Below, RateAbove, RateBelow:
	case Outside:
		if !(c.Level < c.High) {
			return fmt.Errorf("%s (%s): band %g..%g is empty", path, c.Channel, c.Level, c.High)
		}
	default:
		return fmt.Errorf("%s (%s): unknown comparison %d", path, c.Channel, c.Op)
	}
	if !c.HasClear {
		return nil
	}
	switch c.Op {
	case Above, RateAbove:
		if c.Clear > c.Level {
			return fmt.Errorf("%s (%s): clear level %g above raise level %g", path, c.Channel, c.Clear, c.Level)
		}
	case Below, RateBelow:
		if c.Clear < c.Level {
			return fmt.Errorf("%s (%s): clear level %g below raise level %g", path, c.Channel, c.Clear, c.Level)
		}
	case Outside:
		if !(c.Clear >= c.Level && c.ClearHigh <= c.High && c.Clear < c.ClearHigh) {
			return fmt.Errorf("%s (%s): clear band %g..%g not inside band %g..%g", path, c.Channel, c.Clear, c.ClearHigh, c.Level, c.High)
		}
	}
	return nil
}

// String formats the rule body in the rule syntax that Parse reads (the
// name is not part of it).
func (r Rule) String() string {
	var b strings.Builder
	r.When.format(&b, false)
	if r.For != 0 {
		b.WriteString(" for ")
		b.WriteString(r.For.String())
	}
	if r.ClearFor != 0 {
		b.WriteString(" clear_for ")
		b.WriteString(r.ClearFor.String())
	}
	if r.Severity != 0 {
		b.WriteString(" severity ")
		b.WriteString(r.Severity.String())
	}
	if r.Latch {
		b.WriteString(" latch")
	}
	return b.String()
}

func num(v float64) string { return strconv.FormatFloat(v, 'g', -1, 64) }

func (e *Expr) format(b *strings.Builder, paren bool) {
	switch e.Kind {
	case Leaf:
		e.Cond.format(b)
	case All, Any:
		if paren {
			b.WriteByte('(')
		}
		for i := range e.Args {
			if i > 0 {
				if e.Kind == All {
					b.WriteString(" and ")
				} else {
					b.WriteString(" or ")
				}
			}
			e.Args[i].format(b, true)
		}
		if paren {
			b.WriteByte(')')
		}
	}
}

func (c *Condition) format(b *strings.Builder) {
	switch c.Op {
	case Above:
		fmt.Fprintf(b, "%s > %s", c.Channel, num(c.Level))
	case Below:
		fmt.Fprintf(b, "%s < %s", c.Channel, num(c.Level))
	case Outside:
		fmt.Fprintf(b, "%s outside %s..%s", c.Channel, num(c.Level), num(c.High))
	case RateAbove:
		fmt.Fprintf(b, "rate(%s) > %s", c.Channel, num(c.Level))
	case RateBelow:
		fmt.Fprintf(b, "rate(%s) < %s", c.Channel, num(c.Level))
	}
	if c.HasClear {
		b.WriteString(" clear ")
		b.WriteString(num(c.Clear))
		if c.Op == Outside {
			b.WriteString("..")
			b.WriteString(num(c.ClearHigh))
		}
	}
	if c.Window != 0 {
		b.WriteString(" window ")
		b.WriteString(c.Window.String())
	}
}
