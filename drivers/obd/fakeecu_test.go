package obd

import (
	"context"
	"sync"
	"time"
)

// reply is one response message a fake ECU sends, after a delay from the request.
type reply struct {
	after   time.Duration
	payload []byte
}

// multiMode says how a fake ECU treats multi-PID service 01 requests.
type multiMode int

const (
	multiFull    multiMode = iota // answers every PID in one message
	multiFirst                    // answers only the first PID (extra PIDs missing)
	multiNRC                      // rejects with NRC 0x12
	multiSilent                   // does not answer
	multiReverse                  // answers all, in reverse order
)

// fakeECU answers requests from a table of PID data. It is safe for concurrent use.
type fakeECU struct {
	mu       sync.Mutex
	addr     Addr
	data     map[PID][]byte    // service 01 data per PID (without echo)
	dids     map[uint16][]byte // service 22 records
	delay    time.Duration     // response time
	pidDelay map[PID]time.Duration
	multi    multiMode
	silent   map[PID]bool // PIDs that never get an answer
	nrc      map[PID]NRC  // PIDs answered with this NRC
	pending  map[PID]int  // PIDs first answered with this many NRC 0x78
	log      []Request
}

func newFakeECU(addr Addr, delay time.Duration) *fakeECU {
	return &fakeECU{addr: addr, delay: delay, data: map[PID][]byte{}, dids: map[uint16][]byte{},
		pidDelay: map[PID]time.Duration{}, silent: map[PID]bool{}, nrc: map[PID]NRC{}, pending: map[PID]int{}}
}

func (f *fakeECU) requests() []Request {
	f.mu.Lock()
	defer f.mu.Unlock()
	return append([]Request(nil), f.log...)
}

// bitmap builds the supported-PID bitmap for base from the data table.
func (f *fakeECU) bitmap(base PID) []byte {
	b := make([]byte, 4)
	for p := range f.data {
		if int(p) > int(base) && int(p) <= int(base)+0x20 {
			i := int(p) - int(base) - 1
			b[i/8] |= 0x80 >> (i % 8)
		}
		if int(p) > int(base)+0x20 {
			b[3] |= 1
		}
	}
	return b
}

func (f *fakeECU) respond(req Request, functional bool) []reply {
	f.mu.Lock()
	defer f.mu.Unlock()
	f.log = append(f.log, req)
	d := f.delay
	switch req.Service() {
	case 0x22:
		rec, ok := f.dids[req.DID()]
		if !ok {
			return []reply{{d, []byte{0x7F, 0x22, 0x31}}}
		}
		return []reply{{d, append([]byte{0x62, byte(req.DID() >> 8), byte(req.DID())}, rec...)}}
	case 0x01:
	default:
		return []reply{{d, []byte{0x7F, req.Service(), 0x11}}}
	}
	n := req.NumPIDs()
	if n > 1 {
		switch f.multi {
		case multiNRC:
			return []reply{{d, []byte{0x7F, 0x01, 0x12}}}
		case multiSilent:
			return nil
		case multiFirst:
			n = 1
		}
	}
	var out []reply
	msg := []byte{0x41}
	answered, quiet := false, false
	for k := 0; k < n; k++ {
		i := k
		if f.multi == multiReverse {
			i = n - 1 - k
		}
		p := req.PID(i)
		if IsBitmapPID(p) {
			msg = append(append(msg, byte(p)), f.bitmap(p)...)
			answered = true
			continue
		}
		if f.silent[p] {
			quiet = true
			continue
		}
		if nrc, ok := f.nrc[p]; ok && n == 1 {
			if functional {
				return nil
			}
			return []reply{{d, []byte{0x7F, 0x01, byte(nrc)}}}
		}
		v, ok := f.data[p]
		if !ok {
			continue // unsupported PID: no answer for it
		}
		if dd, ok := f.pidDelay[p]; ok && dd > d {
			d = dd
		}
		if c := f.pending[p]; c > 0 && n == 1 {
			f.pending[p] = c - 1
			out = append(out, reply{30 * time.Millisecond, []byte{0x7F, 0x01, 0x78}})
		}
		msg = append(append(msg, byte(p)), v...)
		answered = true
	}
	if !answered {
		if functional || n > 1 || quiet {
			return out
		}
		return append(out, reply{d, []byte{0x7F, 0x01, 0x12}})
	}
	return append(out, reply{d, msg})
}

// fakeBus is an in-package Transport over fake ECUs with real-time delays.
type fakeBus struct {
	mu   sync.Mutex
	ecus []*fakeECU
	out  chan Message
	sent []Addr
}

func newFakeBus(ecus ...*fakeECU) *fakeBus {
	return &fakeBus{ecus: ecus, out: make(chan Message, 1024)}
}

func (b *fakeBus) Send(ctx context.Context, to Addr, req Request) error {
	if _, err := req.AppendPayload(nil); err != nil {
		return err
	}
	b.mu.Lock()
	b.sent = append(b.sent, to)
	b.mu.Unlock()
	for _, e := range b.ecus {
		if !to.Functional && to != e.addr {
			continue
		}
		for _, r := range e.respond(req, to.Functional) {
			m := Message{From: e.addr, Payload: r.payload}
			time.AfterFunc(r.after, func() {
				select {
				case b.out <- m:
				default:
				}
			})
		}
	}
	return nil
}

func (b *fakeBus) Receive(ctx context.Context) (Message, error) {
	select {
	case m := <-b.out:
		return m, nil
	case <-ctx.Done():
		return Message{}, ctx.Err()
	}
}
