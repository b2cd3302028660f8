package obd

import (
	"strings"
	"testing"
	"time"
)

type recorder struct {
	n     map[string]int
	last  map[string]float64
	times map[string][]time.Time
}

func newRecorder() *recorder {
	return &recorder{n: map[string]int{}, last: map[string]float64{}, times: map[string][]time.Time{}}
}

func (r *recorder) name(ch ChannelIndex) string {
	c, _, ok := StandardChannel(ch)
	if !ok {
		return "signal"
	}
	return c.Name
}

func (r *recorder) emit(_ Addr, t time.Time, rs []Reading) {
	for _, x := range rs {
		n := r.name(x.Channel)
		r.n[n]++
		r.last[n] = x.Value
		r.times[n] = append(r.times[n], t)
	}
}

var t0 = time.Date(2026, 1, 2, 3, 4, 5, 0, time.UTC)

// newTestSched builds the scheduler of one fake ECU from a Poller config.
func newTestSched(t *testing.T, f *fakeECU, cfg Config) (*ecuSched, *recorder) {
	t.Helper()
	rec := newRecorder()
	cfg.Transport = newFakeBus(f)
	cfg.Emit = rec.emit
	p, err := NewPoller(cfg)
	if err != nil {
		t.Fatal(err)
	}
	return newECUSched(f.addr, &p.sc, p.items, t0), rec
}

// simulate drives e against f in virtual time from now for dur: requests go
// out when next allows, replies arrive after the ECU's delay, deadlines expire.
// Replies later than the deadline are lost. It returns the end time.
func simulate(e *ecuSched, f *fakeECU, now time.Time, dur time.Duration) time.Time {
	end := now.Add(dur)
	for now.Before(end) {
		req, wake, ok := e.next(now)
		if !ok {
			if wake.IsZero() || wake.After(end) {
				return end
			}
			if wake.After(now) {
				now = wake
			}
			continue
		}
		sent := now
		e.sent(now)
		reps := f.respond(req, false)
		k := 0
		for e.busy {
			if k < len(reps) && !sent.Add(reps[k].after).After(e.out.deadline) {
				now = sent.Add(reps[k].after)
				e.handle(now, reps[k].payload)
				k++
			} else {
				now = e.out.deadline
				e.timeout(now)
			}
		}
		now = now.Add(time.Millisecond) // bus and tester turnaround
	}
	return now
}

func fill(f *fakeECU, pids ...PID) {
	for _, p := range pids {
		n, _ := PIDLength(p)
		f.data[p] = make([]byte, n)
		for i := range f.data[p] {
			f.data[p][i] = byte(p) + byte(i)
		}
	}
}

var sixChannels = []PollChannel{
	{Name: "ecu_engine_speed", Interval: 100 * time.Millisecond},
	{Name: "ecu_vehicle_speed", Interval: 100 * time.Millisecond},
	{Name: "ecu_coolant_temperature", Interval: 100 * time.Millisecond},
	{Name: "ecu_manifold_pressure", Interval: 100 * time.Millisecond},
	{Name: "ecu_intake_air_temperature", Interval: 100 * time.Millisecond},
	{Name: "ecu_throttle_position", Interval: 100 * time.Millisecond},
}

func TestSchedMultiPIDAccepted(t *testing.T) {
	f := newFakeECU(Addr{}, 10*time.Millisecond)
	fill(f, 0x0C, 0x0D, 0x05, 0x0B, 0x0F, 0x11)
	f.multi = multiReverse // any order is fine
	e, rec := newTestSched(t, f, Config{Channels: sixChannels})
	simulate(e, f, t0, 2*time.Second)
	if e.multi != MultiYes {
		t.Fatalf("multi = %v, want yes", e.multi)
	}
	reqs := e.c.requests.Load()
	for _, c := range sixChannels {
		if n := rec.n[c.Name]; n < 18 || n > 22 {
			t.Errorf("%s: %d readings in 2 s at 100 ms, want ≈20", c.Name, n)
		}
	}
	// 1 bitmap request + about one 6-PID request per 100 ms.
	if reqs > 25 {
		t.Errorf("%d requests: PIDs were not packed", reqs)
	}
	if got := rec.last["ecu_engine_speed"]; got != float64(0x0C*256+0x0D)/4 {
		t.Errorf("engine speed %v", got)
	}
}

// TestSchedOneFramePerAnswer: the values of one response message reach
// EmitFunc in one call, with one time, in the message's order.
func TestSchedOneFramePerAnswer(t *testing.T) {
	f := newFakeECU(Addr{}, time.Millisecond)
	var got [][]Reading
	var times []time.Time
	e, _ := newTestSched(t, f, Config{Channels: sixChannels})
	e.cfg.emit = func(_ Addr, t time.Time, rs []Reading) {
		got = append(got, append([]Reading(nil), rs...))
		times = append(times, t)
	}
	e.bitmapBase = -1
	now := t0.Add(time.Second)
	if _, _, ok := e.next(now); !ok {
		t.Fatal("nothing due")
	}
	e.sent(now)
	at := now.Add(3 * time.Millisecond)
	e.handle(at, []byte{0x41, 0x0C, 0x1A, 0xF8, 0x0D, 0x32, 0x05, 0x5A, 0x0B, 0x65, 0x0F, 0x40, 0x11, 0x80})
	if len(got) != 1 {
		t.Fatalf("%d EmitFunc calls for one answer, want 1", len(got))
	}
	if !times[0].Equal(at) {
		t.Errorf("frame time %v, want %v", times[0], at)
	}
	var names []string
	for _, r := range got[0] {
		c, _, _ := StandardChannel(r.Channel)
		names = append(names, c.Name)
	}
	want := []string{"ecu_engine_speed", "ecu_vehicle_speed", "ecu_coolant_temperature", "ecu_manifold_pressure",
		"ecu_intake_air_temperature", "ecu_throttle_position"}
	if strings.Join(names, ",") != strings.Join(want, ",") {
		t.Errorf("frame channels %v, want %v", names, want)
	}
	if v := got[0][0].Value; v != float64(0x1A*256+0xF8)/4 { // (256A+B)/4 rpm
		t.Errorf("engine speed %v", v)
	}
}

func TestSchedLearnsMultiPIDOff(t *testing.T) {
	for _, mode := range []multiMode{multiFirst, multiNRC, multiSilent} {
		f := newFakeECU(Addr{}, 10*time.Millisecond)
		fill(f, 0x0C, 0x0D, 0x05, 0x0B, 0x0F, 0x11)
		f.multi = mode
		e, rec := newTestSched(t, f, Config{Channels: sixChannels})
		simulate(e, f, t0, 3*time.Second)
		if e.multi != MultiNo {
			t.Errorf("mode %d: multi = %v, want learned no", mode, e.multi)
		}
		multi := 0
		for _, r := range f.requests() {
			if r.NumPIDs() > 1 {
				multi++
			}
		}
		if multi != 1 {
			t.Errorf("mode %d: %d multi-PID requests, want exactly the first one", mode, multi)
		}
		for _, c := range sixChannels { // 6 single requests of ≈11 ms fit in 100 ms
			if n := rec.n[c.Name]; n < 25 {
				t.Errorf("mode %d: %s: %d readings in 3 s", mode, c.Name, n)
			}
		}
		if mode == multiNRC && e.c.nrcs.Load() != 1 {
			t.Errorf("NRCs = %d, want 1", e.c.nrcs.Load())
		}
		if mode == multiSilent && e.c.timeouts.Load() != 1 {
			t.Errorf("timeouts = %d, want 1", e.c.timeouts.Load())
		}
	}
}

// TestSchedSlowChannelNotStarved: six high-priority channels demand far more
// than the bus gives (each single-PID exchange takes 41 ms, they want one every
// 10 ms); a priority-0 channel at 1 s must still be polled about once a second.
func TestSchedSlowChannelNotStarved(t *testing.T) {
	f := newFakeECU(Addr{}, 40*time.Millisecond)
	fill(f, 0x0C, 0x0D, 0x05, 0x0B, 0x0F, 0x11, 0x46)
	var chans []PollChannel
	for _, c := range sixChannels {
		c.Interval, c.Priority = 10*time.Millisecond, MaxPriority
		chans = append(chans, c)
	}
	chans = append(chans, PollChannel{Name: "ecu_ambient_air_temperature", Interval: time.Second, Priority: 0})
	e, rec := newTestSched(t, f, Config{Channels: chans, SinglePID: true})
	simulate(e, f, t0, 20*time.Second)
	slow := rec.times["ecu_ambient_air_temperature"]
	if len(slow) < 18 {
		t.Fatalf("slow channel polled %d times in 20 s, want ≈20", len(slow))
	}
	for i := 1; i < len(slow); i++ {
		if gap := slow[i].Sub(slow[i-1]); gap > 1500*time.Millisecond {
			t.Errorf("slow channel gap %v", gap)
		}
	}
	for _, c := range sixChannels {
		if n := rec.n[c.Name]; n < 60 {
			t.Errorf("%s: %d readings, fast channels should share the rest", c.Name, n)
		}
	}
}

func TestSchedPriorityBreaksTies(t *testing.T) {
	f := newFakeECU(Addr{}, 40*time.Millisecond)
	fill(f, 0x0C, 0x0D)
	e, rec := newTestSched(t, f, Config{SinglePID: true, PriorityStep: 50 * time.Millisecond, Channels: []PollChannel{
		{Name: "ecu_engine_speed", Interval: 10 * time.Millisecond, Priority: 9},
		{Name: "ecu_vehicle_speed", Interval: 10 * time.Millisecond, Priority: 0}}})
	simulate(e, f, t0, 10*time.Second)
	hi, lo := rec.n["ecu_engine_speed"], rec.n["ecu_vehicle_speed"]
	if hi <= lo || lo < 10 {
		t.Errorf("high priority %d, low %d: want high > low > 0", hi, lo)
	}
}

func TestSchedResponsePending(t *testing.T) {
	f := newFakeECU(Addr{}, 2*time.Second) // final answer after 2 s, far beyond the 150 ms timeout
	fill(f, 0x0C)
	f.pending[0x0C] = 1
	f.pidDelay[0x0C] = 2 * time.Second
	e, rec := newTestSched(t, f, Config{Channels: sixChannels[:1]})
	e.bitmapBase = -1 // skip bitmaps: the ECU is slow for everything
	simulate(e, f, t0, 2001*time.Millisecond)
	if rec.n["ecu_engine_speed"] != 1 || !rec.times["ecu_engine_speed"][0].Equal(t0.Add(2*time.Second)) {
		t.Errorf("readings %d, want 1 after NRC 0x78", rec.n["ecu_engine_speed"])
	}
	if e.c.pendingNRCs.Load() != 1 || e.c.timeouts.Load() != 0 || e.c.nrcs.Load() != 0 {
		t.Errorf("pending %d timeouts %d nrcs %d", e.c.pendingNRCs.Load(), e.c.timeouts.Load(), e.c.nrcs.Load())
	}
	if e.haveRTT {
		t.Error("a response-pending exchange must not feed the response-time estimate")
	}
	// 0x78 and then nothing: the request times out after P2* = 5 s.
	f2 := newFakeECU(Addr{}, 10*time.Millisecond)
	fill(f2, 0x0C)
	f2.pending[0x0C] = 1
	f2.silent[0x0C] = true
	e2, _ := newTestSched(t, f2, Config{Channels: sixChannels[:1]})
	e2.bitmapBase = -1
	req, _, _ := e2.next(t0)
	e2.sent(t0)
	e2.handle(t0.Add(30*time.Millisecond), []byte{0x7F, 0x01, 0x78})
	if !e2.out.deadline.Equal(t0.Add(30*time.Millisecond + 5*time.Second)) {
		t.Errorf("deadline after 0x78: %v", e2.out.deadline.Sub(t0))
	}
	_ = req
	e2.timeout(e2.out.deadline)
	if e2.c.timeouts.Load() != 1 || e2.busy {
		t.Error("timeout after P2* not counted")
	}
}

func TestSchedTimeoutsCountedAndAdapted(t *testing.T) {
	f := newFakeECU(Addr{}, 20*time.Millisecond)
	fill(f, 0x0C, 0x0D)
	f.silent[0x0D] = true
	e, rec := newTestSched(t, f, Config{SinglePID: true, Channels: sixChannels[:2]})
	simulate(e, f, t0, 10*time.Second)
	if to := e.c.timeouts.Load(); to < 3 || to > 15 {
		t.Errorf("timeouts %d: want counted, with backoff (interval doubling to 5 s)", to)
	}
	if rec.n["ecu_vehicle_speed"] != 0 || rec.n["ecu_engine_speed"] < 80 {
		t.Errorf("readings: %v", rec.n)
	}
	if e.srtt < 19*time.Millisecond || e.srtt > 21*time.Millisecond {
		t.Errorf("response time EWMA %v, want ≈20 ms", e.srtt)
	}
	// A slower ECU gets a longer timeout: 300 ms responses exceed the 150 ms start.
	f2 := newFakeECU(Addr{}, 300*time.Millisecond)
	fill(f2, 0x0C)
	e2, rec2 := newTestSched(t, f2, Config{Channels: sixChannels[:1], InitialTimeout: 400 * time.Millisecond})
	simulate(e2, f2, t0, 10*time.Second)
	if e2.rto < 300*time.Millisecond || rec2.n["ecu_engine_speed"] < 25 || e2.c.timeouts.Load() != 0 {
		t.Errorf("rto %v readings %d timeouts %d", e2.rto, rec2.n["ecu_engine_speed"], e2.c.timeouts.Load())
	}
}

func TestSchedUnsupported(t *testing.T) {
	f := newFakeECU(Addr{}, 10*time.Millisecond)
	fill(f, 0x0C, 0x0D)
	f.nrc[0x0D] = NRCRequestOutOfRange
	e, rec := newTestSched(t, f, Config{SinglePID: true, Channels: []PollChannel{
		{Name: "ecu_engine_speed", Interval: 50 * time.Millisecond},
		{Name: "ecu_vehicle_speed", Interval: 50 * time.Millisecond},
		{Name: "ecu_oil_temperature", Interval: 50 * time.Millisecond}}}) // not in the bitmap
	simulate(e, f, t0, time.Second)
	asked := map[PID]int{}
	for _, r := range f.requests() {
		asked[r.PID(0)]++
	}
	if asked[0x0D] != 1 || asked[0x5C] != 0 || asked[0x0C] < 15 {
		t.Errorf("requests per PID %v: 0x0D once (then NRC 0x31), 0x5C never (bitmap)", asked)
	}
	if rec.n["ecu_vehicle_speed"] != 0 || e.c.nrcs.Load() != 1 {
		t.Errorf("readings %v nrcs %d", rec.n, e.c.nrcs.Load())
	}
}

func TestSchedSignalsAndStaleAnswers(t *testing.T) {
	f := newFakeECU(Addr{}, 10*time.Millisecond)
	fill(f, 0x0C)
	f.dids[0x1234] = []byte{0x01, 0xF4}
	e, rec := newTestSched(t, f, Config{Channels: sixChannels[:1], Signals: []PollSignal{{
		Signal:   Signal{Name: "user_boost", DID: 0x1234, Length: 2, BigEndian: true, Scale: 100, Unit: "pascals"},
		Interval: 100 * time.Millisecond}}})
	simulate(e, f, t0, time.Second)
	if rec.n["signal"] < 9 || rec.last["signal"] != 50000 {
		t.Errorf("signal readings %d last %v", rec.n["signal"], rec.last["signal"])
	}
	// A late answer for another PID while 0x0C is outstanding is ignored.
	now := t0.Add(5 * time.Second)
	req, _, ok := e.next(now)
	for ok && req.Service() != 0x01 {
		e.sent(now)
		e.handle(now, []byte{0x62, 0x12, 0x34, 0, 0})
		req, _, ok = e.next(now)
	}
	e.sent(now)
	before := rec.n["ecu_engine_speed"]
	if done := e.handle(now, []byte{0x41, 0x0D, 0x10}); done || !e.busy {
		t.Error("stale answer finished the request")
	}
	if done := e.handle(now, []byte{0x41, 0x0C, 0x00, 0x04}); !done || rec.n["ecu_engine_speed"] != before+1 {
		t.Error("real answer not taken")
	}
	if e.c.unsolicited.Load() == 0 {
		t.Error("stale answer not counted")
	}
}
