package pipeline

import (
	"context"
	"math"
	"runtime"
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
// on the complete frame, whether processed directly or queued with PutFrame.
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

	// Through Run: 3 frames of 3 samples each, queued before Run starts,
	// from one reused slice.
	d1.calls, d2.calls = 0, 0
	frame := make([]Sample, 3)
	for i := 1; i <= 3; i++ {
		ti := t0.Add(time.Duration(i) * 10 * time.Millisecond)
		for j, ch := range []ChannelID{a, b, c} {
			frame[j] = Sample{Channel: ch, Value: float64(i), Time: ti}
		}
		p.PutFrame(frame)
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

// A slow producer cannot split a frame: the ingest loop takes what PutFrame
// handed over as one unit, however the producer's calls interleave with the
// loop. The control case hands the same samples one by one, pausing until
// the loop has taken each, as a driver queueing a frame sample by sample
// would when it is preempted: the derivations then run on partly updated
// states and write one channel twice at one instant, which is what frames
// exist to prevent.
func TestSlowProducerCannotSplitFrames(t *testing.T) {
	for _, tc := range []struct {
		name      string
		whole     bool
		wantCalls int // d1 calls over the 20 moments
		wantDups  int // (abc, time) keys written more than once
	}{
		{"PutFrame", true, 20, 0},
		// Each sample triggers d1, except the first two: d1 needs all three.
		{"sample by sample (control)", false, 3*20 - 2, 3*20 - 2 - 20},
	} {
		t.Run(tc.name, func(t *testing.T) {
			reg := newReg(t, "a", "b", "c")
			d1 := &sumDeriv{name: "d1", in: []Input{{Name: "a"}, {Name: "b"}, {Name: "c"}}, out: "abc"}
			g, err := BuildGraph(reg, []Derivation{d1})
			if err != nil {
				t.Fatal(err)
			}
			p := New(reg, g, Options{})
			sub := p.Subscribe("rec", 1<<12)
			ctx, cancel := context.WithCancel(context.Background())
			done := make(chan struct{})
			go func() { p.Run(ctx); close(done) }()
			ids := []ChannelID{0, 1, 2}
			taken := func(n uint64) {
				for p.Counters().Accepted < n {
					runtime.Gosched()
				}
			}
			const moments = 20
			t0 := time.Unix(1000, 0)
			var sent uint64
			for i := 0; i < moments; i++ {
				ti := t0.Add(time.Duration(i) * time.Millisecond)
				frame := make([]Sample, len(ids))
				for j, id := range ids {
					frame[j] = Sample{Channel: id, Value: float64(i), Time: ti}
				}
				if tc.whole {
					p.PutFrame(frame)
					sent += uint64(len(frame))
					taken(sent)
					continue
				}
				for _, s := range frame {
					p.Put(s)
					sent++
					taken(sent) // the slow producer: the loop drains between samples
				}
			}
			cancel()
			<-done
			if d1.calls != tc.wantCalls {
				t.Errorf("d1 ran %d times for %d moments, want %d", d1.calls, moments, tc.wantCalls)
			}
			abc, _ := reg.Lookup("abc")
			buf, _ := sub.Drain(nil, nil)
			seen := map[int64]int{}
			for _, s := range buf {
				if s.Channel == abc {
					seen[s.Time.UnixNano()]++
				}
			}
			dups := 0
			for _, n := range seen {
				dups += n - 1
			}
			if dups != tc.wantDups {
				t.Errorf("%d duplicate (abc, time) samples, want %d", dups, tc.wantDups)
			}
		})
	}
}

// BenchmarkPutFrame measures the live path: a driver hands frames of 15
// samples (one serial line of the demo) to a running ingest loop, which
// stores them, runs the derivations once a frame and fans them out.
func BenchmarkPutFrame(b *testing.B) {
	names := make([]string, 15)
	for i := range names {
		names[i] = "in" + strconv.Itoa(i)
	}
	reg := newReg(b, names...)
	ds := []Derivation{
		&sumDeriv{name: "d1", in: []Input{{Name: "in0"}, {Name: "in1"}}, out: "s01"},
		&sumDeriv{name: "d2", in: []Input{{Name: "s01"}, {Name: "in2"}}, out: "s012"},
	}
	g, err := BuildGraph(reg, ds)
	if err != nil {
		b.Fatal(err)
	}
	p := New(reg, g, Options{})
	sub := p.Subscribe("recorder", 1<<16)
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan struct{})
	go func() { p.Run(ctx); close(done) }()
	drained := make(chan struct{})
	go func() {
		var buf []Sample
		for {
			select {
			case <-sub.C():
				buf, _ = sub.Drain(buf[:0], nil)
			case <-done:
				close(drained)
				return
			}
		}
	}()
	frame := make([]Sample, 15)
	t0 := time.Unix(0, 0)
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		ti := t0.Add(time.Duration(i) * time.Millisecond)
		for j := range frame {
			frame[j] = Sample{Channel: ChannelID(j), Value: float64(i + j), Time: ti}
		}
		p.PutFrame(frame)
	}
	cancel()
	<-done
	b.StopTimer()
	<-drained
	b.ReportMetric(float64(b.N*15)/b.Elapsed().Seconds(), "samples/s")
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N*15), "ns/sample")
}
