package warn

// Text is a named rule in the rule syntax (see Parse), or Off to disable a
// rule of the same name.
type Text struct {
	Name string // unique snake_case name
	Rule string // rule source, or Off
}

// Off, as a Text's Rule, disables the rule of that name.
const Off = "off"

// Builtin returns the warnings Plenum raises unless configured otherwise.
// Limits are common practice, no source; each can be replaced (or turned
// Off) by a rule of the same name, see Merge.
func Builtin() []Text {
	return []Text{
		{Name: "lean_under_boost", Rule: "lambda > 0.92 clear 0.88 and boost_pressure > 40000 clear 30000 for 300ms severity critical"},
		{Name: "over_boost", Rule: "boost_pressure > 130000 clear 120000 for 200ms severity critical"},
		{Name: "hot_intake_air", Rule: "intake_air_temp > 60 clear 55 for 2s"},
		{Name: "hot_oil", Rule: "oil_temp > 130 clear 125 for 5s"},
		{Name: "hot_coolant", Rule: "coolant_temp > 110 clear 105 for 5s severity critical"},
		{Name: "low_oil_pressure", Rule: "oil_pressure < 100000 clear 120000 and engine_speed > 2500 clear 2400 for 500ms severity critical"},
		{Name: "cold_engine_high_load", Rule: "turbo_warmup_warning > 0.5 clear 0.4 for 200ms"},
		{Name: "switched_off_hot", Rule: "turbo_shutdown_hot > 0.5 clear 0.4 for 100ms latch"},
	}
}

// Merge returns base with each rule of over replacing the base rules of the
// same name in place, and the others appended in order. Neither argument is
// modified. Off rules are kept: the caller skips them when parsing.
func Merge(base, over []Text) []Text {
	out := append([]Text(nil), base...)
	for _, r := range over {
		replaced := false
		for i := range out {
			if out[i].Name == r.Name {
				out[i], replaced = r, true
			}
		}
		if !replaced {
			out = append(out, r)
		}
	}
	return out
}

// Channels returns the channel of every condition in r's condition tree,
// depth first, left to right; a channel used twice is listed twice.
func (r Rule) Channels() []string {
	var out []string
	var walk func(x Expr)
	walk = func(x Expr) {
		if x.Kind == Leaf {
			out = append(out, x.Cond.Channel)
		}
		for _, a := range x.Args {
			walk(a)
		}
	}
	walk(r.When)
	return out
}
