package warn

import (
	"fmt"
	"strconv"
	"time"
)

// Parse reads a rule body in Plenum's rule syntax and names it:
//
//	rule      = expr { option }
//	option    = "for" DURATION | "clear_for" DURATION | "severity" SEVERITY
//	          | "latch" | "clear" NUMBER [ ".." NUMBER ]   (single-condition rules)
//	expr      = term { "or" term }
//	term      = factor { "and" factor }
//	factor    = "(" expr ")" | condition
//	condition = subject ( ">" NUMBER | "<" NUMBER | "outside" NUMBER ".." NUMBER )
//	            [ "clear" NUMBER [ ".." NUMBER ] ] [ "window" DURATION ]
//	subject   = CHANNEL | "rate" "(" CHANNEL ")"
//
// CHANNEL is a snake_case name, NUMBER a decimal in the channel's canonical
// unit (rate: unit per second), DURATION a Go duration such as 500ms or 2s,
// SEVERITY one of info, warning, critical. For example:
//
//	manifold_pressure > 250000 for 500ms clear 240000
//	lambda > 0.9 and manifold_pressure > 150000 for 300ms severity critical latch
//	rate(coolant_temperature) > 2 window 1s
//
// Syntax errors give the byte offset of the problem; a rule that parses but
// fails Validate returns Validate's error, which names the condition.
func Parse(name, src string) (Rule, error) {
	p := parser{src: src}
	p.next()
	r := Rule{Name: name}
	x, err := p.expr(0)
	if err != nil {
		return Rule{}, err
	}
	r.When = x
	seen := map[string]bool{}
	for p.tok.kind != tEOF {
		if p.tok.kind != tIdent {
			return Rule{}, p.errf("expected an option (for, clear_for, clear, severity, latch), found %s", p.tok)
		}
		opt := p.tok.text
		if seen[opt] {
			return Rule{}, p.errf("%s given twice", opt)
		}
		seen[opt] = true
		switch opt {
		case "for", "clear_for":
			p.next()
			d, err := p.duration()
			if err != nil {
				return Rule{}, err
			}
			if opt == "for" {
				r.For = d
			} else {
				r.ClearFor = d
			}
		case "severity":
			p.next()
			if p.tok.kind != tIdent {
				return Rule{}, p.errf("expected a severity, found %s", p.tok)
			}
			s, err := ParseSeverity(p.tok.text)
			if err != nil {
				return Rule{}, p.errf("%v", err)
			}
			r.Severity = s
			p.next()
		case "latch":
			r.Latch = true
			p.next()
		case "clear":
			if r.When.Kind != Leaf {
				return Rule{}, p.errf("a trailing clear needs a single condition; put clear after each condition")
			}
			if r.When.Cond.HasClear {
				return Rule{}, p.errf("clear given twice")
			}
			p.next()
			if err := p.clear(&r.When.Cond); err != nil {
				return Rule{}, err
			}
		default:
			return Rule{}, p.errf("unknown option %q", opt)
		}
	}
	if err := r.Validate(); err != nil {
		return Rule{}, err
	}
	return r, nil
}

type tokKind uint8

const (
	tEOF tokKind = iota
	tIdent
	tNumber
	tDuration
	tGT
	tLT
	tLParen
	tRParen
	tRange
	tBad
)

type token struct {
	kind tokKind
	text string
	pos  int
}

// String describes a token for error messages.
func (t token) String() string {
	if t.kind == tEOF {
		return "end of rule"
	}
	return strconv.Quote(t.text)
}

type parser struct {
	src string
	pos int
	tok token
}

func (p *parser) errf(format string, args ...any) error {
	return fmt.Errorf("offset %d: %s", p.tok.pos, fmt.Sprintf(format, args...))
}

func isLetter(c byte) bool { return c == '_' || c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z' }
func isDigit(c byte) bool  { return c >= '0' && c <= '9' }

func (p *parser) next() {
	s := p.src
	for p.pos < len(s) && (s[p.pos] == ' ' || s[p.pos] == '\t' || s[p.pos] == '\n' || s[p.pos] == '\r') {
		p.pos++
	}
	start := p.pos
	if p.pos >= len(s) {
		p.tok = token{tEOF, "", start}
		return
	}
	c := s[p.pos]
	switch {
	case isLetter(c):
		for p.pos < len(s) && (isLetter(s[p.pos]) || isDigit(s[p.pos])) {
			p.pos++
		}
		p.tok = token{tIdent, s[start:p.pos], start}
	case isDigit(c) || c == '-' || c == '+' || (c == '.' && p.pos+1 < len(s) && isDigit(s[p.pos+1])):
		p.number()
	case c == '>':
		p.pos++
		p.tok = token{tGT, ">", start}
	case c == '<':
		p.pos++
		p.tok = token{tLT, "<", start}
	case c == '(':
		p.pos++
		p.tok = token{tLParen, "(", start}
	case c == ')':
		p.pos++
		p.tok = token{tRParen, ")", start}
	case c == '.' && p.pos+1 < len(s) && s[p.pos+1] == '.':
		p.pos += 2
		p.tok = token{tRange, "..", start}
	default:
		p.pos++
		p.tok = token{tBad, s[start:p.pos], start}
	}
}

// number scans a decimal or a duration (a number followed by unit letters,
// possibly repeated as in 1m30s).
func (p *parser) number() {
	s, start := p.src, p.pos
	if s[p.pos] == '-' || s[p.pos] == '+' {
		p.pos++
	}
	digits := func() {
		for p.pos < len(s) && isDigit(s[p.pos]) {
			p.pos++
		}
	}
	digits()
	if p.pos+1 < len(s) && s[p.pos] == '.' && s[p.pos+1] != '.' {
		p.pos++
		digits()
	} else if p.pos+1 == len(s) && s[p.pos] == '.' {
		p.pos++
	}
	if p.pos < len(s) && (s[p.pos] == 'e' || s[p.pos] == 'E') {
		q := p.pos + 1
		if q < len(s) && (s[q] == '+' || s[q] == '-') {
			q++
		}
		if q < len(s) && isDigit(s[q]) {
			p.pos = q
			digits()
		}
	}
	if p.pos < len(s) && (isLetter(s[p.pos]) || s[p.pos] == 0xc2) { // µs starts with 0xC2 0xB5
		for p.pos < len(s) && (isLetter(s[p.pos]) || isDigit(s[p.pos]) || s[p.pos] == '.' || s[p.pos] == 0xc2 || s[p.pos] == 0xb5) {
			p.pos++
		}
		p.tok = token{tDuration, s[start:p.pos], start}
		return
	}
	p.tok = token{tNumber, s[start:p.pos], start}
}

func (p *parser) value() (float64, error) {
	if p.tok.kind != tNumber {
		return 0, p.errf("expected a number, found %s", p.tok)
	}
	v, err := strconv.ParseFloat(p.tok.text, 64)
	if err != nil || !finite(v) {
		return 0, p.errf("bad number %s", p.tok)
	}
	p.next()
	return v, nil
}

func (p *parser) duration() (time.Duration, error) {
	if p.tok.kind != tDuration && !(p.tok.kind == tNumber && p.tok.text == "0") {
		return 0, p.errf("expected a duration such as 500ms, found %s", p.tok)
	}
	d, err := time.ParseDuration(p.tok.text)
	if err != nil || d < 0 {
		return 0, p.errf("bad duration %s", p.tok)
	}
	p.next()
	return d, nil
}

func (p *parser) expr(depth int) (Expr, error) {
	return p.list(depth, Any, "or")
}

// list parses operands joined by word (or / and) into a node of kind k.
func (p *parser) list(depth int, k Kind, word string) (Expr, error) {
	if depth > MaxDepth {
		return Expr{}, p.errf("nested deeper than %d", MaxDepth)
	}
	operand := func() (Expr, error) {
		if k == Any {
			return p.list(depth, All, "and")
		}
		return p.factor(depth)
	}
	first, err := operand()
	if err != nil {
		return Expr{}, err
	}
	if !(p.tok.kind == tIdent && p.tok.text == word) {
		return first, nil
	}
	x := Expr{Kind: k, Args: []Expr{first}}
	for p.tok.kind == tIdent && p.tok.text == word {
		p.next()
		y, err := operand()
		if err != nil {
			return Expr{}, err
		}
		x.Args = append(x.Args, y)
	}
	return x, nil
}

func (p *parser) factor(depth int) (Expr, error) {
	if p.tok.kind == tLParen {
		p.next()
		x, err := p.expr(depth + 1)
		if err != nil {
			return Expr{}, err
		}
		if p.tok.kind != tRParen {
			return Expr{}, p.errf("expected \")\", found %s", p.tok)
		}
		p.next()
		return x, nil
	}
	c, err := p.condition()
	if err != nil {
		return Expr{}, err
	}
	return Expr{Kind: Leaf, Cond: c}, nil
}

func isKeyword(s string) bool {
	switch s {
	case "and", "or", "for", "clear_for", "clear", "severity", "latch", "outside", "window":
		return true
	}
	return false
}

func (p *parser) condition() (Condition, error) {
	var c Condition
	if p.tok.kind != tIdent || isKeyword(p.tok.text) {
		return c, p.errf("expected a channel name, found %s", p.tok)
	}
	rate := false
	if p.tok.text == "rate" {
		save := *p
		p.next()
		if p.tok.kind == tLParen {
			rate = true
			p.next()
			if p.tok.kind != tIdent || isKeyword(p.tok.text) {
				return c, p.errf("expected a channel name, found %s", p.tok)
			}
		} else {
			*p = save // a channel called rate
		}
	}
	c.Channel = p.tok.text
	p.next()
	if rate {
		if p.tok.kind != tRParen {
			return c, p.errf("expected \")\", found %s", p.tok)
		}
		p.next()
	}
	var err error
	switch {
	case p.tok.kind == tGT:
		c.Op = Above
		if rate {
			c.Op = RateAbove
		}
		p.next()
		c.Level, err = p.value()
	case p.tok.kind == tLT:
		c.Op = Below
		if rate {
			c.Op = RateBelow
		}
		p.next()
		c.Level, err = p.value()
	case p.tok.kind == tIdent && p.tok.text == "outside" && !rate:
		c.Op = Outside
		p.next()
		c.Level, c.High, err = p.band()
	default:
		return c, p.errf("expected >, < or outside after %q, found %s", c.Channel, p.tok)
	}
	if err != nil {
		return c, err
	}
	if p.tok.kind == tIdent && p.tok.text == "clear" {
		p.next()
		if err := p.clear(&c); err != nil {
			return c, err
		}
	}
	if p.tok.kind == tIdent && p.tok.text == "window" {
		if !rate {
			return c, p.errf("window applies to rate() conditions only")
		}
		p.next()
		if c.Window, err = p.duration(); err != nil {
			return c, err
		}
		if c.Window == 0 {
			return c, p.errf("window must be positive")
		}
	}
	return c, nil
}

func (p *parser) band() (lo, hi float64, err error) {
	if lo, err = p.value(); err != nil {
		return
	}
	if p.tok.kind != tRange {
		return 0, 0, p.errf("expected \"..\", found %s", p.tok)
	}
	p.next()
	hi, err = p.value()
	return
}

func (p *parser) clear(c *Condition) error {
	var err error
	c.HasClear = true
	if c.Op == Outside {
		c.Clear, c.ClearHigh, err = p.band()
		return err
	}
	c.Clear, err = p.value()
	return err
}
