package warn

import (
	"math/rand/v2"
	"testing"
	"time"
)

var t0 = time.Date(2026, 5, 1, 12, 0, 0, 0, time.UTC)

func ms(n int) time.Time { return t0.Add(time.Duration(n) * time.Millisecond) }

func mustEngine(t testing.TB, rules ...Rule) *Engine {
	t.Helper()
	e, err := NewEngine(rules)
	if err != nil {
		t.Fatal(err)
	}
	return e
}

func above(ch string, level, clear float64) Expr {
	return Expr{Kind: Leaf, Cond: Condition{Channel: ch, Op: Above, Level: level, HasClear: true, Clear: clear}}
}

func TestRaisesAfterExactlyMinimumDuration(t *testing.T) {
	e := mustEngine(t, Rule{Name: "overboost", When: above("manifold_pressure", 250000, 240000), For: 500 * time.Millisecond})
	ch, _ := e.Channel("manifold_pressure")
	var out []Transition
	// 10 ms samples: below until 1000 ms, above from 1000 ms on.
	for i := 0; i <= 2000; i += 10 {
		v := 200000.0
		if i >= 1000 {
			v = 260000
		}
		out = e.Update(ch, ms(i), v, out[:0])
		switch {
		case i < 1500 && len(out) != 0:
			t.Fatalf("raised early at %d ms: %+v", i, out)
		case i == 1500:
			if len(out) != 1 || out[0].Kind != Raised || !out[0].Time.Equal(ms(1500)) || !out[0].Since.Equal(ms(1000)) || out[0].Severity != Warning {
				t.Fatalf("at 1500 ms: %+v", out)
			}
		case i > 1500 && len(out) != 0:
			t.Fatalf("repeated at %d ms: %+v", i, out)
		}
	}
	// A dip below the raise level but above the clear level does not restart
	// anything, and does not clear.
	if out = e.Update(ch, ms(2010), 245000, out[:0]); len(out) != 0 || !e.Raised(0) {
		t.Fatalf("cleared above the clear level: %+v", out)
	}
	// Clears only past the clear level.
	if out = e.Update(ch, ms(2020), 240000, out[:0]); len(out) != 0 {
		t.Fatalf("cleared at the clear level itself: %+v", out)
	}
	if out = e.Update(ch, ms(2030), 239999, out[:0]); len(out) != 1 || out[0].Kind != Cleared {
		t.Fatalf("not cleared below the clear level: %+v", out)
	}
}

func TestInterruptedConditionRestartsTimer(t *testing.T) {
	e := mustEngine(t, Rule{Name: "r", When: above("x", 10, 5), For: 500 * time.Millisecond})
	var out []Transition
	out = e.Update(0, ms(0), 11, out)
	out = e.Update(0, ms(400), 4, out) // cleared past the clear level
	out = e.Update(0, ms(450), 11, out)
	out = e.Update(0, ms(900), 11, out) // 450 ms since restart
	if len(out) != 0 {
		t.Fatalf("%+v", out)
	}
	// Advance lets the timer expire without a new sample.
	if out = e.Advance(ms(950), out); len(out) != 1 || out[0].Kind != Raised || !out[0].Since.Equal(ms(450)) {
		t.Fatalf("%+v", out)
	}
}

func TestNoFlickerUnderNoise(t *testing.T) {
	// A signal sitting on the raise level with ±3 kPa noise: hysteresis
	// (clear 10 kPa lower) means one raise and no clear while it lasts,
	// then one clear once it drops well below.
	e := mustEngine(t, Rule{Name: "overboost", When: above("map", 250000, 240000), For: 200 * time.Millisecond})
	rng := rand.New(rand.NewPCG(7, 7))
	var raised, cleared int
	var out []Transition
	for i := 0; i < 10000; i++ {
		v := 250000 + 3000*(2*rng.Float64()-1)
		if i >= 9000 {
			v = 230000 + 3000*(2*rng.Float64()-1)
		}
		out = e.Update(0, ms(i*10), v, out[:0])
		for _, tr := range out {
			switch tr.Kind {
			case Raised:
				raised++
			case Cleared:
				cleared++
				if i < 9000 {
					t.Fatalf("cleared during noise at sample %d", i)
				}
			}
		}
	}
	if raised != 1 || cleared != 1 {
		t.Fatalf("raised %d cleared %d, want 1 and 1", raised, cleared)
	}
	// Without hysteresis the same noise makes it chatter: the test would
	// catch an engine that ignored the clear level.
	e2 := mustEngine(t, Rule{Name: "plain", When: Expr{Kind: Leaf, Cond: Condition{Channel: "map", Op: Above, Level: 250000}}})
	n := 0
	for i := 0; i < 1000; i++ {
		out = e2.Update(0, ms(i*10), 250000+3000*(2*rng.Float64()-1), out[:0])
		n += len(out)
	}
	if n < 10 {
		t.Fatalf("only %d transitions without hysteresis", n)
	}
}

func TestBelowOutsideRate(t *testing.T) {
	rules := []Rule{
		{Name: "low_oil", When: Expr{Kind: Leaf, Cond: Condition{Channel: "oil_pressure", Op: Below, Level: 100000, HasClear: true, Clear: 120000}}, Severity: Critical},
		{Name: "lambda_band", When: Expr{Kind: Leaf, Cond: Condition{Channel: "lambda", Op: Outside, Level: 0.75, High: 1.1, HasClear: true, Clear: 0.78, ClearHigh: 1.05}}},
		{Name: "ect_rising", When: Expr{Kind: Leaf, Cond: Condition{Channel: "coolant_temperature", Op: RateAbove, Level: 2, HasClear: true, Clear: 1, Window: time.Second}}},
	}
	e := mustEngine(t, rules...)
	feed := func(name string, i int, v float64) []Transition {
		ch, ok := e.Channel(name)
		if !ok {
			t.Fatalf("no channel %s", name)
		}
		return e.Update(ch, ms(i), v, nil)
	}
	if out := feed("oil_pressure", 0, 90000); len(out) != 1 || out[0].Severity != Critical {
		t.Fatalf("%+v", out)
	}
	if out := feed("oil_pressure", 10, 110000); len(out) != 0 {
		t.Fatalf("cleared inside hysteresis: %+v", out)
	}
	if out := feed("oil_pressure", 20, 121000); len(out) != 1 || out[0].Kind != Cleared {
		t.Fatalf("%+v", out)
	}
	if out := feed("lambda", 0, 1.12); len(out) != 1 {
		t.Fatalf("lean not raised: %+v", out)
	}
	if out := feed("lambda", 10, 1.07); len(out) != 0 {
		t.Fatalf("cleared between band and clear band: %+v", out)
	}
	if out := feed("lambda", 20, 0.9); len(out) != 1 || out[0].Kind != Cleared {
		t.Fatalf("%+v", out)
	}
	if out := feed("lambda", 30, 0.7); len(out) != 1 {
		t.Fatalf("rich not raised: %+v", out)
	}
	// Coolant rising 3 K/s, measured over 1 s windows.
	var out []Transition
	for i := 0; i <= 3000; i += 100 {
		out = append(out, feed("coolant_temperature", i, 80+3*float64(i)/1000)...)
	}
	if len(out) != 1 || out[0].Kind != Raised || !out[0].Time.Equal(ms(1000)) {
		t.Fatalf("rate: %+v", out)
	}
	// Steady: the rate falls to 0 and clears at the next window.
	out = out[:0]
	for i := 3100; i <= 5000; i += 100 {
		out = append(out, feed("coolant_temperature", i, 89)...)
	}
	if len(out) != 1 || out[0].Kind != Cleared {
		t.Fatalf("rate clear: %+v", out)
	}
}

func TestAndOr(t *testing.T) {
	// lean under boost: lambda > 0.9 and map > 150 kPa; or egt > 950 °C.
	when := Expr{Kind: Any, Args: []Expr{
		{Kind: All, Args: []Expr{above("lambda", 0.9, 0.88), above("map", 150000, 140000)}},
		above("egt", 950, 900),
	}}
	e := mustEngine(t, Rule{Name: "lean_boost", When: when})
	l, _ := e.Channel("lambda")
	m, _ := e.Channel("map")
	g, _ := e.Channel("egt")
	if len(e.Channels()) != 3 {
		t.Fatal(e.Channels())
	}
	var out []Transition
	out = e.Update(l, ms(0), 0.95, out)
	if len(out) != 0 {
		t.Fatal("and raised on one input")
	}
	out = e.Update(m, ms(10), 160000, out)
	if len(out) != 1 || out[0].Kind != Raised {
		t.Fatalf("%+v", out)
	}
	out = e.Update(m, ms(20), 100000, out[:0])
	if len(out) != 1 || out[0].Kind != Cleared {
		t.Fatalf("%+v", out)
	}
	out = e.Update(g, ms(30), 960, out[:0])
	if len(out) != 1 || out[0].Kind != Raised {
		t.Fatalf("or: %+v", out)
	}
}

func TestLatchAndAcknowledge(t *testing.T) {
	e := mustEngine(t, Rule{Name: "overboost", When: above("map", 250000, 240000), Latch: true, Severity: Critical})
	var out []Transition
	out = e.Update(0, ms(0), 260000, out)
	out = e.Update(0, ms(10), 200000, out)
	if len(out) != 1 || !e.Raised(0) {
		t.Fatalf("latched warning cleared: %+v", out)
	}
	// Acknowledged while the condition is gone: clears now.
	out = e.Acknowledge(0, ms(20), out[:0])
	if len(out) != 2 || out[0].Kind != Acknowledged || out[1].Kind != Cleared || e.Raised(0) {
		t.Fatalf("%+v", out)
	}
	// Acknowledged while still over: stays until the condition clears.
	out = e.Update(0, ms(30), 260000, out[:0])
	out = e.Acknowledge(0, ms(40), out)
	if len(out) != 2 || !e.Raised(0) {
		t.Fatalf("%+v", out)
	}
	out = e.Update(0, ms(50), 200000, out[:0])
	if len(out) != 1 || out[0].Kind != Cleared {
		t.Fatalf("%+v", out)
	}
	if out = e.Acknowledge(0, ms(60), out[:0]); len(out) != 0 {
		t.Fatalf("ack of a cleared warning: %+v", out)
	}
}

func TestClearFor(t *testing.T) {
	e := mustEngine(t, Rule{Name: "r", When: above("x", 10, 9), ClearFor: 300 * time.Millisecond})
	var out []Transition
	out = e.Update(0, ms(0), 11, out)
	out = e.Update(0, ms(100), 8, out[:0])
	out = e.Update(0, ms(399), 8, out)
	if len(out) != 0 {
		t.Fatalf("%+v", out)
	}
	if out = e.Update(0, ms(400), 8, out); len(out) != 1 || out[0].Kind != Cleared {
		t.Fatalf("%+v", out)
	}
}

func TestEngineRejects(t *testing.T) {
	bad := [][]Rule{
		{{Name: "", When: above("x", 1, 0)}},
		{{Name: "a", When: above("x", 1, 0)}, {Name: "a", When: above("y", 1, 0)}},
		{{Name: "a", When: above("x", 1, 2)}},
		{{Name: "a", When: Expr{Kind: All}}},
		{{Name: "a", When: Expr{Kind: Leaf, Cond: Condition{Channel: "x", Op: Outside, Level: 2, High: 1}}}},
		{{Name: "a", When: Expr{Kind: Leaf, Cond: Condition{Channel: "x", Op: Outside, Level: 0, High: 10, HasClear: true, Clear: -1, ClearHigh: 5}}}},
		{{Name: "a", When: Expr{Kind: Leaf, Cond: Condition{Channel: "x", Op: 99}}}},
		{{Name: "a", When: above("x", 1, 0), For: -time.Second}},
		{{Name: "a", When: Expr{Kind: Leaf, Cond: Condition{Op: Above}}}},
	}
	for i, rs := range bad {
		if _, err := NewEngine(rs); err == nil {
			t.Errorf("case %d accepted", i)
		}
	}
	// Bad samples are ignored, not panics.
	e := mustEngine(t, Rule{Name: "a", When: above("x", 1, 0)})
	if out := e.Update(5, ms(0), 2, nil); len(out) != 0 {
		t.Fatal(out)
	}
	if out := e.Update(-1, ms(0), 2, nil); len(out) != 0 {
		t.Fatal(out)
	}
}

func benchEngine(b testing.TB) *Engine {
	rules := []string{
		"manifold_pressure > 250000 for 500ms clear 240000",
		"lambda > 0.9 clear 0.88 and manifold_pressure > 150000 clear 140000 for 300ms severity critical latch",
		"intake_air_temperature > 60 for 2s clear 55",
		"rate(coolant_temperature) > 2 window 1s",
		"oil_pressure < 100000 clear 120000 and engine_speed > 1500 for 1s severity critical",
		"lambda outside 0.7..1.3 clear 0.72..1.25 for 1s severity info",
	}
	var rs []Rule
	for i, s := range rules {
		r, err := Parse(string(rune('a'+i)), s)
		if err != nil {
			b.Fatal(err)
		}
		rs = append(rs, r)
	}
	return mustEngine(b, rs...)
}

func TestEngineNoAllocs(t *testing.T) {
	e := benchEngine(t)
	out := make([]Transition, 0, 16)
	n := len(e.Channels())
	i := 0
	allocs := testing.AllocsPerRun(10000, func() {
		out = e.Update(i%n, ms(i), float64(i%1000)*300, out[:0])
		i++
	})
	if allocs != 0 {
		t.Fatalf("%v allocs per sample", allocs)
	}
}

func BenchmarkEngine(b *testing.B) {
	e := benchEngine(b)
	out := make([]Transition, 0, 16)
	n := len(e.Channels())
	b.ReportAllocs()
	i := 0
	for b.Loop() {
		out = e.Update(i%n, ms(i), float64(i%1000)*300, out[:0])
		i++
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N), "ns/sample")
}
