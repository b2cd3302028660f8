package obd

import (
	"sync/atomic"
	"time"
)

// MultiPID is what a Poller has learned about an ECU's multi-PID support.
type MultiPID uint8

const (
	// MultiUnknown: not yet tried; the next service 01 request may carry several PIDs.
	MultiUnknown MultiPID = iota
	// MultiYes: the ECU answered a multi-PID request completely.
	MultiYes
	// MultiNo: a multi-PID answer was missing PIDs, rejected or absent; one PID per request.
	MultiNo
)

// String returns "unknown", "yes" or "no".
func (m MultiPID) String() string {
	switch m {
	case MultiYes:
		return "yes"
	case MultiNo:
		return "no"
	}
	return "unknown"
}

type itemKind uint8

const (
	pidItem itemKind = iota // a standard service 01 PID
	sigItem                 // a user-defined signal (own request, never packed)
)

// item is one thing polled from one ECU at a target interval.
type item struct {
	kind        itemKind
	pid         PID
	sig         int
	interval    time.Duration
	prio        int
	due         time.Time
	unsupported bool
	backoff     time.Duration
	polls       uint64
}

// pending is the one outstanding request of an ECU.
type pending struct {
	req      Request
	items    [MaxPIDsPerRequest]int // indexes into items; -1 for a bitmap request
	n        int
	sent     time.Time
	deadline time.Time
	waited   bool // NRC 0x78 seen: the round trip is not a clean RTT sample
}

// ecuCounters are read by Stats while the worker runs.
type ecuCounters struct {
	requests, responses, timeouts, nrcs, pendingNRCs, malformed, unsolicited, sendErrors atomic.Uint64
	srtt, rto                                                                            atomic.Int64
	multi                                                                                atomic.Uint32
}

// schedConfig is the resolved, read-only configuration shared by schedulers.
type schedConfig struct {
	initialTimeout, minTimeout, maxTimeout, pendingTimeout time.Duration
	priorityStep                                           time.Duration
	maxBackoff                                             time.Duration
	noMulti                                                bool
	wanted                                                 []bool // by standard ChannelIndex
	signals                                                []Signal
	emit                                                   EmitFunc
}

// ecuSched is the polling state machine of one ECU. It does no I/O and reads
// no clock: the worker (or a test) feeds it the time. Only the owning worker
// touches it, except the atomic counters.
type ecuSched struct {
	addr        Addr
	cfg         *schedConfig
	items       []item
	supported   PIDSet
	bitmapBase  int // next supported-PID bitmap to ask for; -1 when done
	bitmapTries int
	knowSupport bool
	multi       MultiPID
	srtt        time.Duration
	rttvar      time.Duration
	rto         time.Duration
	haveRTT     bool
	busy        bool
	out         pending
	frame       []Reading // the readings of the answer being decoded
	c           ecuCounters
}

func newECUSched(addr Addr, cfg *schedConfig, items []item, now time.Time) *ecuSched {
	e := &ecuSched{addr: addr, cfg: cfg, items: append([]item(nil), items...), bitmapBase: 0x00, rto: cfg.initialTimeout,
		frame: make([]Reading, 0, 16)}
	if cfg.noMulti {
		e.multi = MultiNo
	}
	for i := range e.items {
		e.items[i].due = now
	}
	e.publish()
	return e
}

// learnBitmap feeds a supported-PID bitmap seen outside the scheduler (during
// functional discovery) into it.
func (e *ecuSched) learnBitmap(base PID, b []byte) {
	next, err := e.supported.AddBitmap(base, b)
	if err != nil || int(base) != e.bitmapBase {
		return
	}
	e.knowSupport = true
	if next {
		e.bitmapBase = int(base) + 0x20
	} else {
		e.finishBitmaps()
	}
}

func (e *ecuSched) finishBitmaps() {
	e.bitmapBase = -1
	if !e.knowSupport {
		return
	}
	for i := range e.items {
		if it := &e.items[i]; it.kind == pidItem && !e.supported.Has(it.pid) {
			it.unsupported = true
		}
	}
}

func (e *ecuSched) key(it *item) time.Time {
	return it.due.Add(-time.Duration(it.prio) * e.cfg.priorityStep)
}

// next returns the request to send at now, or ok=false and the time at which
// to ask again. Scheduling is earliest-deadline-first on due time minus a
// bounded priority credit (priority × priorityStep): an overdue channel's key
// falls further behind now every instant, so after at most the largest credit
// it beats every channel that is not yet due, and no channel starves.
func (e *ecuSched) next(now time.Time) (req Request, wake time.Time, ok bool) {
	if e.busy {
		return Request{}, e.out.deadline, false
	}
	if e.bitmapBase >= 0 {
		r, _ := CurrentData(PID(e.bitmapBase))
		e.out = pending{req: r, n: 1}
		e.out.items[0] = -1
		return r, time.Time{}, true
	}
	best := -1
	var earliest time.Time
	for i := range e.items {
		it := &e.items[i]
		if it.unsupported {
			continue
		}
		if earliest.IsZero() || it.due.Before(earliest) {
			earliest = it.due
		}
		if it.due.After(now) {
			continue
		}
		if best < 0 || e.key(it).Before(e.key(&e.items[best])) {
			best = i
		}
	}
	if best < 0 {
		return Request{}, earliest, false
	}
	e.out = pending{n: 1}
	e.out.items[0] = best
	b := &e.items[best]
	if b.kind == sigItem {
		e.out.req = e.cfg.signals[b.sig].Request()
		return e.out.req, time.Time{}, true
	}
	var pids [MaxPIDsPerRequest]PID
	pids[0] = b.pid
	if e.multi != MultiNo {
		for e.out.n < MaxPIDsPerRequest {
			c := -1
			for i := range e.items {
				it := &e.items[i]
				if it.unsupported || it.kind != pidItem || e.chosen(i) || it.due.After(now.Add(it.interval/2)) {
					continue
				}
				if c < 0 || e.key(it).Before(e.key(&e.items[c])) {
					c = i
				}
			}
			if c < 0 {
				break
			}
			pids[e.out.n] = e.items[c].pid
			e.out.items[e.out.n] = c
			e.out.n++
		}
	}
	r, err := CurrentData(pids[:e.out.n]...)
	if err != nil { // duplicate PIDs across items cannot happen: items are one per PID
		e.out.n = 1
		r, _ = CurrentData(b.pid)
	}
	e.out.req = r
	return r, time.Time{}, true
}

func (e *ecuSched) chosen(i int) bool {
	for _, j := range e.out.items[:e.out.n] {
		if j == i {
			return true
		}
	}
	return false
}

// sent records that the request from next went out at now.
func (e *ecuSched) sent(now time.Time) {
	e.busy = true
	e.out.sent = now
	e.out.deadline = now.Add(e.rto)
	e.c.requests.Add(1)
	for _, i := range e.out.items[:e.out.n] {
		if i >= 0 {
			e.items[i].polls++
		}
	}
}

// sendFailed records that the request from next could not be sent.
func (e *ecuSched) sendFailed(now time.Time) {
	e.c.sendErrors.Add(1)
	e.fail(now)
}

// fail reschedules the outstanding items with backoff.
func (e *ecuSched) fail(now time.Time) {
	e.busy = false
	for _, i := range e.out.items[:e.out.n] {
		if i < 0 {
			continue
		}
		it := &e.items[i]
		if it.backoff == 0 {
			it.backoff = it.interval
		} else if it.backoff < e.cfg.maxBackoff {
			it.backoff *= 2
		}
		it.backoff = min(it.backoff, max(e.cfg.maxBackoff, it.interval))
		it.due = now.Add(it.backoff)
	}
	e.out.n = 0
}

// timeout handles expiry of the outstanding request's deadline.
func (e *ecuSched) timeout(now time.Time) {
	if !e.busy {
		return
	}
	e.c.timeouts.Add(1)
	e.rto = min(2*e.rto, e.cfg.maxTimeout) // back off, as RFC 6298 §5.5 does (from memory)
	if e.out.items[0] < 0 {
		e.busy = false
		e.bitmapTries++
		if e.bitmapTries >= 3 { // give up on bitmaps: poll everything, learn from NRCs
			e.finishBitmaps()
		}
		e.publish()
		return
	}
	if e.out.n > 1 && e.multi == MultiUnknown {
		e.multi = MultiNo // no answer at all to a multi-PID request: fall back
		e.busy = false    // items stay due and are asked for singly now
		e.out.n = 0
		e.publish()
		return
	}
	e.fail(now)
	e.publish()
}

// observeRTT updates the response-time estimate and timeout with the
// smoothing of RFC 6298 §2 (α = 1/8, β = 1/4, RTO = SRTT + 4·RTTVAR; from memory).
func (e *ecuSched) observeRTT(r time.Duration) {
	if !e.haveRTT {
		e.srtt, e.rttvar, e.haveRTT = r, r/2, true
	} else {
		d := e.srtt - r
		if d < 0 {
			d = -d
		}
		e.rttvar = (3*e.rttvar + d) / 4
		e.srtt = (7*e.srtt + r) / 8
	}
	e.rto = min(max(e.srtt+4*e.rttvar, e.cfg.minTimeout), e.cfg.maxTimeout)
}

func (e *ecuSched) publish() {
	e.c.srtt.Store(int64(e.srtt))
	e.c.rto.Store(int64(e.rto))
	e.c.multi.Store(uint32(e.multi))
}

// handle processes one message from this ECU at now. It reports whether the
// outstanding request is finished (answered, rejected or given up).
func (e *ecuSched) handle(now time.Time, payload []byte) bool {
	if !e.busy {
		e.c.unsolicited.Add(1)
		return false
	}
	defer e.publish()
	resp, err := ParseResponse(payload)
	if err != nil {
		e.c.malformed.Add(1)
		return false // keep waiting for the real answer until the deadline
	}
	svc := e.out.req.Service()
	if resp.Service != svc {
		e.c.unsolicited.Add(1) // a late answer to an earlier request
		return false
	}
	if resp.Negative {
		return e.negative(now, resp.NRC)
	}
	if svc == byte(svcCurrentData) && !e.answersOutstanding(resp.Data) {
		e.c.unsolicited.Add(1)
		return false
	}
	e.c.responses.Add(1)
	if !e.out.waited {
		e.observeRTT(now.Sub(e.out.sent))
	}
	e.busy = false
	if e.out.items[0] < 0 {
		return e.bitmapAnswer(now, resp.Data)
	}
	first := &e.items[e.out.items[0]]
	if first.kind == sigItem {
		e.signalAnswer(now, first, resp)
		return true
	}
	e.currentAnswer(now, resp.Data)
	return true
}

// answersOutstanding reports whether service 01 data carries at least one of
// the requested PIDs and only requested PIDs (else it is a stale answer).
func (e *ecuSched) answersOutstanding(data []byte) bool {
	if len(data) == 0 {
		return false
	}
	for i := 0; i < e.out.req.NumPIDs(); i++ {
		if e.out.req.PID(i) == PID(data[0]) {
			return true
		}
	}
	return false
}

func (e *ecuSched) negative(now time.Time, nrc NRC) bool {
	if nrc == NRCRequestCorrectlyReceivedResponsePending {
		e.c.pendingNRCs.Add(1)
		e.out.waited = true
		e.out.deadline = now.Add(e.cfg.pendingTimeout) // P2* (ISO 14229-2 / ISO 15765-3 timing table)
		return false
	}
	e.c.nrcs.Add(1)
	e.busy = false
	if e.out.items[0] < 0 { // bitmap rejected: stop asking, poll what is configured
		e.finishBitmaps()
		return true
	}
	if e.out.n > 1 && (nrc.Unsupported() || nrc == NRCIncorrectMessageLengthOrInvalidFormat) {
		e.multi = MultiNo // the ECU rejects multi-PID requests; items stay due
		e.out.n = 0
		return true
	}
	if nrc.Unsupported() {
		for _, i := range e.out.items[:e.out.n] {
			e.items[i].unsupported = true
		}
		e.out.n = 0
		return true
	}
	e.fail(now) // busy, conditions not correct, …: retry later
	return true
}

func (e *ecuSched) bitmapAnswer(now time.Time, data []byte) bool {
	base := PID(e.bitmapBase)
	if len(data) != 5 || PID(data[0]) != base {
		e.c.malformed.Add(1)
		e.bitmapTries++
		if e.bitmapTries >= 3 {
			e.finishBitmaps()
		}
		return true
	}
	before := e.bitmapBase
	e.learnBitmap(base, data[1:])
	if e.bitmapBase == before { // AddBitmap refused it
		e.finishBitmaps()
	}
	return true
}

func (e *ecuSched) currentAnswer(now time.Time, data []byte) {
	// First pass: validate the whole message without emitting anything.
	werr := WalkCurrentData(data, func(PID, []byte) {})
	if werr != nil {
		e.c.malformed.Add(1)
		if e.out.n > 1 {
			e.multi = MultiNo
			e.out.n = 0
			return
		}
		e.fail(now)
		return
	}
	t := now
	e.frame = e.frame[:0]
	var done [MaxPIDsPerRequest]bool
	_ = WalkCurrentData(data, func(pid PID, b []byte) {
		for k := 0; k < e.out.n; k++ {
			if !done[k] && e.items[e.out.items[k]].pid == pid {
				done[k] = true // first occurrence only
				_ = DecodePID(pid, b, func(p PID, ch ChannelIndex, v float64) {
					if int(ch) < len(e.cfg.wanted) && e.cfg.wanted[ch] {
						e.frame = append(e.frame, Reading{Channel: ch, Value: v})
					}
				})
				e.reschedule(now, e.out.items[k])
			}
		}
	})
	if len(e.frame) > 0 {
		e.cfg.emit(e.addr, t, e.frame)
	}
	missing := false
	for k := 0; k < e.out.n; k++ {
		if !done[k] {
			missing = true
		}
	}
	if e.out.n > 1 {
		if missing {
			e.multi = MultiNo // missing PIDs stay due and are asked for singly
		} else if e.multi == MultiUnknown {
			e.multi = MultiYes
		}
	}
	e.out.n = 0
}

func (e *ecuSched) reschedule(now time.Time, i int) {
	it := &e.items[i]
	it.backoff = 0
	it.due = it.due.Add(it.interval)
	if it.due.Before(now) { // fell behind: do not burst to catch up
		it.due = now
	}
}

func (e *ecuSched) signalAnswer(now time.Time, it *item, resp Response) {
	s := &e.cfg.signals[it.sig]
	rec := resp.Data
	var err error
	if s.UsePID {
		if len(rec) == 0 || PID(rec[0]) != s.PID {
			err = errShortOrWrong
		} else {
			rec = rec[1:]
		}
	} else {
		rec, err = DecodeDID(rec, s.DID)
	}
	if err == nil {
		var v float64
		if v, err = s.Decode(rec); err == nil {
			e.frame = append(e.frame[:0], Reading{Channel: NumStandardChannels() + ChannelIndex(it.sig), Value: v})
			e.cfg.emit(e.addr, now, e.frame)
		}
	}
	if err != nil {
		e.c.malformed.Add(1)
	}
	e.reschedule(now, e.out.items[0])
	e.out.n = 0
}
