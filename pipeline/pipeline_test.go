package pipeline

import (
	"context"
	"math"
	"strconv"
	"strings"
	"testing"
	"time"
)

// sumDeriv writes a+b (and, if present, the optional c) to its output.
type sumDeriv struct {
	name   string
	in     []Input
	out    string
	calls  int
	lastIn []float64
}

func (d *sumDeriv) Name() string    { return d.name }
func (d *sumDeriv) Inputs() []Input { return d.in }
func (d *sumDeriv) Outputs() []Channel {
	return []Channel{{Name: d.out, Quantity: "test", Unit: None}}
}
func (d *sumDeriv) Derive(_ time.Time, in, out []float64) uint64 {
	d.calls++
	d.lastIn = append(d.lastIn[:0], in...)
	s := 0.0
	for _, v := range in {
		if !math.IsNaN(v) {
			s += v
		}
	}
	out[0] = s
	return 1
}

func newReg(t testing.TB, names ...string) *Registry {
	t.Helper()
	r := NewRegistry()
	for _, n := range names {
		if _, err := r.Register(Channel{Name: n, Quantity: "test", Source: "test", MaxAge: time.Second}); err != nil {
			t.Fatal(err)
		}
	}
	return r
}

func TestGraphOrdersAndPropagates(t *testing.T) {
	reg := newReg(t, "a", "b")
	// Declared out of order: d2 reads d1's output.
	d2 := &sumDeriv{name: "d2", in: []Input{{Name: "ab"}, {Name: "a"}}, out: "ab_a"}
	d1 := &sumDeriv{name: "d1", in: []Input{{Name: "a"}, {Name: "b"}}, out: "ab"}
	// d2 is declared first but its input comes from d1, so d1 must be built first
	// for the lookup to succeed: BuildGraph registers all outputs before resolving inputs.
	g, err := BuildGraph(reg, []Derivation{d2, d1})
	if err != nil {
		t.Fatal(err)
	}
	if got := strings.Join(g.Names(), ","); got != "d1,d2" {
		t.Fatalf("order = %s, want d1,d2", got)
	}
	p := New(reg, g, Options{})
	t0 := time.Unix(1000, 0)
	a, _ := reg.Lookup("a")
	b, _ := reg.Lookup("b")
	abA, _ := reg.Lookup("ab_a")
	p.Process(Sample{Channel: a, Value: 2, Time: t0})
	if v := p.Store().Get(abA); v.Set {
		t.Fatalf("ab_a set before b arrived: %+v", v)
	}
	p.Process(Sample{Channel: b, Value: 3, Time: t0})
	if v := p.Store().Get(abA); !v.Set || v.Value != 7 {
		t.Fatalf("ab_a = %+v, want 7 (2+3+2)", v)
	}
	// b goes stale (older than 1 s): a new a yields no new value.
	p.Process(Sample{Channel: a, Value: 10, Time: t0.Add(2 * time.Second)})
	if v := p.Store().Get(abA); v.Value != 7 {
		t.Fatalf("ab_a recomputed from a stale input: %+v", v)
	}
	// A faulty input suppresses the derivation too.
	p.Process(Sample{Channel: b, Value: 1, Time: t0.Add(2 * time.Second), Quality: SensorFault})
	if v := p.Store().Get(abA); v.Value != 7 {
		t.Fatalf("ab_a recomputed from a faulty input: %+v", v)
	}
}

func TestGraphErrors(t *testing.T) {
	cases := []struct {
		name string
		ds   []Derivation
		want string
	}{
		{"unknown input", []Derivation{&sumDeriv{name: "x", in: []Input{{Name: "nope"}}, out: "o"}}, `input "nope"`},
		{"cycle", []Derivation{
			&sumDeriv{name: "x", in: []Input{{Name: "y_out"}}, out: "x_out"},
			&sumDeriv{name: "y", in: []Input{{Name: "x_out"}}, out: "y_out"},
		}, "cycle"},
		{"double writer", []Derivation{
			&sumDeriv{name: "x", in: []Input{{Name: "a"}}, out: "o"},
			&sumDeriv{name: "y", in: []Input{{Name: "a"}}, out: "o"},
		}, "already written"},
		{"self loop", []Derivation{&sumDeriv{name: "x", in: []Input{{Name: "o"}}, out: "o"}}, "its own output"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			_, err := BuildGraph(newReg(t, "a"), c.ds)
			if err == nil || !strings.Contains(err.Error(), c.want) {
				t.Fatalf("err = %v, want it to contain %q", err, c.want)
			}
		})
	}
}

func TestOptionalInputIsNaN(t *testing.T) {
	reg := newReg(t, "a")
	d := &sumDeriv{name: "d", in: []Input{{Name: "a"}, {Name: "missing", Optional: true}}, out: "o"}
	g, err := BuildGraph(reg, []Derivation{d})
	if err != nil {
		t.Fatal(err)
	}
	p := New(reg, g, Options{})
	a, _ := reg.Lookup("a")
	p.Process(Sample{Channel: a, Value: 4, Time: time.Unix(1, 0)})
	if d.calls != 1 || !math.IsNaN(d.lastIn[1]) || d.lastIn[0] != 4 {
		t.Fatalf("calls=%d in=%v, want one call with [4 NaN]", d.calls, d.lastIn)
	}
}

func TestRangeAndNaNAreFlagged(t *testing.T) {
	reg := NewRegistry()
	id, _ := reg.Register(Channel{Name: "p", Quantity: "pressure", Unit: Pascal, Min: 0, Max: 400000})
	p := New(reg, nil, Options{})
	p.Process(Sample{Channel: id, Value: 500000, Time: time.Unix(1, 0)})
	if q := p.Store().Get(id).Quality; q != OutOfRange {
		t.Fatalf("quality = %v, want out_of_range", q)
	}
	p.Process(Sample{Channel: id, Value: math.NaN(), Time: time.Unix(1, 0)})
	if q := p.Store().Get(id).Quality; q != SensorFault {
		t.Fatalf("quality = %v, want sensor_fault", q)
	}
	if c := p.Counters(); c.Flagged != 2 || c.Accepted != 2 {
		t.Fatalf("counters = %+v", c)
	}
	p.Process(Sample{Channel: 99, Value: 1})
	if c := p.Counters(); c.Rejected != 1 {
		t.Fatalf("unknown channel not rejected: %+v", c)
	}
}

func TestSlowConsumerDropsNotBlocks(t *testing.T) {
	reg := newReg(t, "a")
	p := New(reg, nil, Options{})
	slow := p.Subscribe("slow", 4)
	for i := 0; i < 10; i++ {
		p.Process(Sample{Channel: 0, Value: float64(i), Time: time.Unix(int64(i), 0)})
	}
	got, _ := slow.Drain(nil, nil)
	if len(got) != 4 || slow.Dropped() != 6 {
		t.Fatalf("got %d samples, dropped %d; want 4 and 6", len(got), slow.Dropped())
	}
	for i, s := range got {
		if s.Value != float64(i) {
			t.Fatalf("sample %d = %v: queue must keep order and drop the newest", i, s.Value)
		}
	}
}

func TestRunDrainsOnCancel(t *testing.T) {
	reg := newReg(t, "a")
	p := New(reg, nil, Options{QueueSize: 100})
	sub := p.Subscribe("all", 1000)
	for i := 0; i < 50; i++ {
		p.Put(Sample{Channel: 0, Value: float64(i), Time: time.Unix(1, 0)})
	}
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	if err := p.Run(ctx); err != nil {
		t.Fatal(err)
	}
	got, _ := sub.Drain(nil, nil)
	if len(got) != 50 {
		t.Fatalf("drained %d samples after cancel, want 50", len(got))
	}
	if p.Put(Sample{}) {
		t.Fatal("Put after stop reported success")
	}
}

func BenchmarkIngest(b *testing.B) {
	reg := newReg(b, "map", "iat", "rpm", "baro")
	ds := []Derivation{
		&sumDeriv{name: "d1", in: []Input{{Name: "map"}, {Name: "iat"}, {Name: "rpm"}}, out: "flow"},
		&sumDeriv{name: "d2", in: []Input{{Name: "map"}, {Name: "baro"}}, out: "boost"},
		&sumDeriv{name: "d3", in: []Input{{Name: "boost"}, {Name: "flow"}}, out: "combo"},
	}
	g, err := BuildGraph(reg, ds)
	if err != nil {
		b.Fatal(err)
	}
	p := New(reg, g, Options{})
	sub := p.Subscribe("recorder", 1<<16)
	t0 := time.Unix(0, 0)
	buf := make([]Sample, 0, 1<<16)
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		p.Process(Sample{Channel: ChannelID(i & 3), Value: float64(i), Time: t0.Add(time.Duration(i) * time.Microsecond)})
		if i&0x3fff == 0 {
			buf, _ = sub.Drain(buf[:0], nil)
		}
	}
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "samples/s")
}

// A frame (samples of one moment) evaluates each dependent derivation once,
// on the complete frame; Run gathers queued samples of one time into frames.
func TestFrameEvaluatesOnce(t *testing.T) {
	reg := newReg(t, "a", "b", "c")
	d1 := &sumDeriv{name: "d1", in: []Input{{Name: "a"}, {Name: "b"}}, out: "ab"}
	d2 := &sumDeriv{name: "d2", in: []Input{{Name: "ab"}, {Name: "c"}}, out: "abc"}
	g, err := BuildGraph(reg, []Derivation{d1, d2})
	if err != nil {
		t.Fatal(err)
	}
	p := New(reg, g, Options{})
	sub := p.Subscribe("rec", 1024)
	a, _ := reg.Lookup("a")
	b, _ := reg.Lookup("b")
	c, _ := reg.Lookup("c")
	abc, _ := reg.Lookup("abc")
	t0 := time.Unix(1000, 0)
	p.ProcessFrame([]Sample{{Channel: a, Value: 1, Time: t0}, {Channel: b, Value: 2, Time: t0}, {Channel: c, Value: 4, Time: t0}})
	if d1.calls != 1 || d2.calls != 1 {
		t.Fatalf("calls d1 %d d2 %d, want 1 each", d1.calls, d2.calls)
	}
	if v := p.Store().Get(abc); v.Value != 7 || !v.Time.Equal(t0) {
		t.Fatalf("abc = %+v, want 7 at t0", v)
	}
	buf, _ := sub.Drain(nil, nil)
	if len(buf) != 5 { // 3 inputs, ab, abc
		t.Fatalf("%d samples fanned out, want 5: %+v", len(buf), buf)
	}

	// Through Run: 3 frames of 3 samples each, queued before Run starts.
	d1.calls, d2.calls = 0, 0
	for i := 1; i <= 3; i++ {
		ti := t0.Add(time.Duration(i) * 10 * time.Millisecond)
		for _, ch := range []ChannelID{a, b, c} {
			p.Put(Sample{Channel: ch, Value: float64(i), Time: ti})
		}
	}
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	p.Run(ctx)
	if d1.calls != 3 || d2.calls != 3 {
		t.Fatalf("through Run: calls d1 %d d2 %d, want 3 each", d1.calls, d2.calls)
	}
	if v := p.Store().Get(abc); v.Value != 9 {
		t.Fatalf("abc = %v, want 9", v.Value)
	}
}

// Events emitted while Run is returning, or after, are never lost.
func TestEmitAroundStopLosesNothing(t *testing.T) {
	for round := 0; round < 200; round++ {
		reg := newReg(t, "a")
		p := New(reg, nil, Options{})
		sub := p.SubscribeEvents("ev")
		ctx, cancel := context.WithCancel(context.Background())
		done := make(chan struct{})
		go func() { p.Run(ctx); close(done) }()
		const n = 50
		emitted := make(chan struct{})
		go func() {
			for i := 0; i < n; i++ {
				p.Emit(Event{Kind: "k", Name: strconv.Itoa(i)})
			}
			close(emitted)
		}()
		cancel()
		<-done
		<-emitted
		_, evs := sub.Drain(nil, nil)
		if len(evs) != n {
			t.Fatalf("round %d: %d of %d events arrived", round, len(evs), n)
		}
	}
}
