package warn

import (
	"reflect"
	"strings"
	"testing"
	"time"
)

func TestParse(t *testing.T) {
	cases := []struct {
		src  string
		want Rule
	}{
		{"manifold_pressure > 250000 for 500ms clear 240000", Rule{Name: "r",
			When: above("manifold_pressure", 250000, 240000), For: 500 * time.Millisecond}},
		{"oil_pressure < 1e5 clear 1.2e5 severity critical latch", Rule{Name: "r",
			When:     Expr{Kind: Leaf, Cond: Condition{Channel: "oil_pressure", Op: Below, Level: 1e5, HasClear: true, Clear: 1.2e5}},
			Severity: Critical, Latch: true}},
		{"lambda outside 0.7..1.3 clear 0.72..1.25", Rule{Name: "r",
			When: Expr{Kind: Leaf, Cond: Condition{Channel: "lambda", Op: Outside, Level: 0.7, High: 1.3, HasClear: true, Clear: 0.72, ClearHigh: 1.25}}}},
		{"rate(coolant_temperature) > 2 clear 1 window 1s clear_for 2s", Rule{Name: "r",
			When:     Expr{Kind: Leaf, Cond: Condition{Channel: "coolant_temperature", Op: RateAbove, Level: 2, HasClear: true, Clear: 1, Window: time.Second}},
			ClearFor: 2 * time.Second}},
		{"rate(map) < -50000", Rule{Name: "r", When: Expr{Kind: Leaf, Cond: Condition{Channel: "map", Op: RateBelow, Level: -50000}}}},
		{"a > 1 and b > 2 or c > 3", Rule{Name: "r", When: Expr{Kind: Any, Args: []Expr{
			{Kind: All, Args: []Expr{leafAbove("a", 1), leafAbove("b", 2)}}, leafAbove("c", 3)}}}},
		{"a > 1 and (b > 2 or c > 3) for 1m30s", Rule{Name: "r", When: Expr{Kind: All, Args: []Expr{
			leafAbove("a", 1), {Kind: Any, Args: []Expr{leafAbove("b", 2), leafAbove("c", 3)}}}}, For: 90 * time.Second}},
		{"rate > 5", Rule{Name: "r", When: leafAbove("rate", 5)}}, // a channel called rate
	}
	for _, c := range cases {
		got, err := Parse("r", c.src)
		if err != nil {
			t.Errorf("%q: %v", c.src, err)
			continue
		}
		if !reflect.DeepEqual(got, c.want) {
			t.Errorf("%q:\n got %+v\nwant %+v", c.src, got, c.want)
		}
		// Round trip through String.
		again, err := Parse("r", got.String())
		if err != nil || !reflect.DeepEqual(again, got) {
			t.Errorf("round trip %q → %q: %+v %v", c.src, got.String(), again, err)
		}
	}
}

func leafAbove(ch string, v float64) Expr {
	return Expr{Kind: Leaf, Cond: Condition{Channel: ch, Op: Above, Level: v}}
}

func TestParseErrors(t *testing.T) {
	cases := []struct{ src, want string }{
		{"", "offset 0: expected a channel name"},
		{"map >", "offset 5: expected a number"},
		{"map > abc", "offset 6: expected a number"},
		{"map >= 5", "offset 5: expected a number"},
		{"map > 5 for", "offset 11: expected a duration"},
		{"map > 5 for 5", "offset 12: expected a duration"},
		{"map > 5 for -1s", "offset 12: bad duration"},
		{"map > 5 sometimes", "offset 8: unknown option"},
		{"map > 5 for 1s for 2s", "offset 15: for given twice"},
		{"(map > 5", "offset 8: expected \")\""},
		{"map outside 1 2", "offset 14: expected \"..\""},
		{"a > 1 and b > 2 for 1s clear 0", "trailing clear needs a single condition"},
		{"map > 5 clear 6", "clear level 6 above raise level 5"},
		{"map > 1e999", "offset 6: bad number"},
		{"map > 5 severity loud", "unknown severity"},
		{"x > 1 window 1s", "window applies to rate() conditions only"},
		{"and > 1", "offset 0: expected a channel name"},
		{"map $ 5", "offset 4: expected >, < or outside"},
		{strings.Repeat("(", 40) + "a > 1" + strings.Repeat(")", 40), "nested deeper"},
	}
	for _, c := range cases {
		_, err := Parse("r", c.src)
		if err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%q: error %v, want it to contain %q", c.src, err, c.want)
		}
	}
}

// FuzzParse checks that Parse never panics, and that every rule it accepts
// formats back to text that parses to the same rule and builds an engine.
func FuzzParse(f *testing.F) {
	for _, s := range []string{
		"manifold_pressure > 250000 for 500ms clear 240000",
		"lambda > 0.9 clear 0.88 and manifold_pressure > 150000 clear 140000 for 300ms severity critical latch",
		"rate(coolant_temperature) > 2 window 1s clear_for 2s",
		"lambda outside 0.7..1.3 clear 0.72..1.25 for 1s severity info",
		"(a > 1 or b < -2.5e3) and rate(c) < -1 clear -0.5",
		"x > .5", "x > 5.", "x < +1e-3 for 1h2m3.5s", "rate > 1",
	} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, src string) {
		r, err := Parse("fuzz", src)
		if err != nil {
			return
		}
		text := r.String()
		again, err := Parse("fuzz", text)
		if err != nil {
			t.Fatalf("%q formatted as %q, which fails: %v", src, text, err)
		}
		if !reflect.DeepEqual(again, r) {
			t.Fatalf("%q → %q → %+v, want %+v", src, text, again, r)
		}
		if _, err := NewEngine([]Rule{r}); err != nil {
			t.Fatalf("%q parsed but the engine rejects it: %v", src, err)
		}
	})
}
