package isotp

import (
	"context"
	"errors"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/drivers/can"
	"github.com/plenum-engine/plenum/drivers/clock"
)

// stepClock is a manual clock that counts the durations asked of After. When
// hold is set, the first After(hold) call blocks until release is closed: it
// models a sending goroutine that is slow to resume while frames pour in.
type stepClock struct {
	*clock.Manual
	hold    time.Duration
	release chan struct{}

	mu    sync.Mutex
	held  bool
	asked map[time.Duration]int
}

func newStepClock(hold time.Duration) *stepClock {
	return &stepClock{Manual: clock.NewManual(time.Unix(1_700_000_000, 0)), hold: hold,
		release: make(chan struct{}), asked: map[time.Duration]int{}}
}

// After counts d once the manual clock has the deadline, so that a test that
// saw the count can Advance past it.
func (c *stepClock) After(d time.Duration) <-chan time.Time {
	c.mu.Lock()
	hold := c.hold > 0 && d == c.hold && !c.held
	c.held = c.held || hold
	c.mu.Unlock()
	if hold {
		<-c.release
	}
	ch := c.Manual.After(d)
	c.mu.Lock()
	c.asked[d]++
	c.mu.Unlock()
	return ch
}

// askedFor returns how many After(d) deadlines are set.
func (c *stepClock) askedFor(d time.Duration) int {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.asked[d]
}

// waitFor polls cond until it holds, failing the test after 5 s.
func waitFor(t *testing.T, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(5 * time.Second)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting for %s", what)
		}
		time.Sleep(time.Millisecond)
	}
}

// sendResult returns what a send goroutine reported, failing the test after 5 s.
func sendResult(t *testing.T, errc <-chan error) error {
	t.Helper()
	select {
	case err := <-errc:
		return err
	case <-time.After(5 * time.Second):
		t.Fatal("send did not return")
		return nil
	}
}

// pcis reads n frames from a monitoring node and returns their first data
// bytes (the PCI byte) in wire order.
func pcis(t *testing.T, mon can.Bus, n int) []byte {
	t.Helper()
	out := make([]byte, n)
	for i := range out {
		out[i] = rawRecv(t, mon).Data[0]
	}
	return out
}

// An FC that arrives in the middle of a block (here a duplicate of the FC
// that opened the block, sent back to back with it) is ignored and counted:
// ISO 15765-2's handling of an unexpected N_PDU ignores an FC that the sender
// is not waiting for (from memory of the unexpected-arrival table, §9.8.3 in
// the 2016 edition). The block still ends after BS CFs and the next block
// needs an FC of its own.
func TestSendIgnoresFlowControlInTheMiddleOfABlock(t *testing.T) {
	const nbs = time.Second
	for _, tc := range []struct {
		name    string
		blockFC bool // the peer answers the first block with an FC
	}{
		{"duplicate FC and no FC after the block: N_Bs", false},
		{"duplicate FC and the block's own FC: sent", true},
	} {
		t.Run(tc.name, func(t *testing.T) {
			b := vbus(t, can.VirtualConfig{})
			clk := newStepClock(0)
			c := newConn(t, b.NewNode(), Config{TxID: 0x7E0, RxID: 0x7E8, Clock: clk, NBs: nbs})
			peer, mon := b.NewNode(), b.NewNode()
			errc := make(chan error, 1)
			go func() { errc <- c.Send(context.Background(), payload(6+7*3)) }() // FF + 3 CFs
			rawRecv(t, peer)                                                     // FF
			rawSend(t, peer, 0x7E8, 0x30, 2, 10)                                 // CTS, BS 2, STmin 10 ms
			rawSend(t, peer, 0x7E8, 0x30, 2, 10)                                 // the same FC again
			if cf := rawRecv(t, peer); cf.Data[0] != 0x21 {
				t.Fatalf("first CF %v", cf)
			}
			// The sender holds STmin on the manual clock: it is in the middle of the block.
			waitFor(t, "the duplicate FC counted as unexpected", func() bool { return c.Stats().UnexpectedFC == 1 })
			waitFor(t, "the sender waiting STmin", func() bool { return clk.askedFor(10*time.Millisecond) == 1 })
			clk.Advance(10 * time.Millisecond)
			if cf := rawRecv(t, peer); cf.Data[0] != 0x22 {
				t.Fatalf("second CF %v", cf)
			}
			// The block is over: the sender waits for an FC, N_Bs running.
			waitFor(t, "the sender waiting for the next FC", func() bool { return clk.askedFor(nbs) == 2 })
			want := []byte{0x10, 0x30, 0x21, 0x22} // without the duplicate FC
			if tc.blockFC {
				rawSend(t, peer, 0x7E8, 0x30, 0, 0)
				if cf := rawRecv(t, peer); cf.Data[0] != 0x23 {
					t.Fatalf("third CF %v", cf)
				}
				if err := sendResult(t, errc); err != nil {
					t.Fatalf("send: %v", err)
				}
				want = append(want, 0x30, 0x23)
			} else {
				clk.Advance(nbs)
				if err := sendResult(t, errc); !errors.Is(err, ErrTimeout) {
					t.Fatalf("send with only a duplicate FC for the second block: %v, want N_Bs %v", err, ErrTimeout)
				}
			}
			// On the wire the duplicate is the second FC, before or after the
			// first CF as arbitration had it; no CF precedes the FC that allowed it.
			got := pcis(t, mon, len(want)+1)
			dup := strings.IndexByte(string(got[2:]), 0x30) + 2
			if dup < 2 || dup > 3 || string(append(got[:dup:dup], got[dup+1:]...)) != string(want) {
				t.Errorf("wire PCI bytes % X, want % X with a duplicate FC after the first", got, want)
			}
			st := c.Stats()
			if st.UnexpectedFC != 1 || st.FramesOut != uint64(len(want)-strings.Count(string(want), "\x30")) {
				t.Errorf("stats %+v, want 1 unexpected FC", st)
			}
		})
	}
}

// A burst of FC Wait frames followed at once by a CTS, all back to back while
// the sender is slow to look, loses nothing: up to MaxWaits Waits the message
// goes through; one more Wait fails the send with ErrWaitLimit and the CTS
// that follows is counted as unexpected.
func TestSendWaitBurstThenCTS(t *testing.T) {
	const nbs = time.Second
	for _, tc := range []struct {
		waits    int
		want     error
		unexpect uint64
	}{
		{1, nil, 0},
		{4, nil, 0},
		{9, nil, 0},
		{10, nil, 0}, // the configured limit
		{11, ErrWaitLimit, 1},
	} {
		b := vbus(t, can.VirtualConfig{})
		clk := newStepClock(nbs)
		c := newConn(t, b.NewNode(), Config{TxID: 0x7E0, RxID: 0x7E8, Clock: clk, NBs: nbs, MaxWaits: 10})
		peer := b.NewNode()
		errc := make(chan error, 1)
		go func() { errc <- c.Send(context.Background(), payload(6+7*2)) }()
		rawRecv(t, peer) // FF
		for i := 0; i < tc.waits; i++ {
			rawSend(t, peer, 0x7E8, 0x31, 0, 0)
		}
		rawSend(t, peer, 0x7E8, 0x30, 0, 0)
		waitFor(t, "every FC read", func() bool { return c.Stats().FramesIn == uint64(tc.waits+1) })
		close(clk.release)
		if tc.want == nil {
			for sn := byte(1); sn <= 2; sn++ {
				if cf := rawRecv(t, peer); cf.Data[0] != 0x20|sn {
					t.Fatalf("%d waits: CF %d: %v", tc.waits, sn, cf)
				}
			}
		}
		if err := sendResult(t, errc); !errors.Is(err, tc.want) || (tc.want == nil && err != nil) {
			t.Errorf("%d waits then CTS: send %v, want %v", tc.waits, err, tc.want)
		}
		waitFor(t, "the CTS after the limit counted", func() bool { return c.Stats().UnexpectedFC == tc.unexpect })
		if st := c.Stats(); st.Ignored != 0 {
			t.Errorf("%d waits: stats %+v", tc.waits, st)
		}
	}
}

// A new message from the same sender interrupts the one in progress: the
// interrupted reception is reported (ErrInterrupted) and counted, and so is a
// new FF that is too long (ErrTooLong, FC Overflow). ISO 15765-2's handling
// of an unexpected FF during a reception ends the reception with
// N_UNEXP_PDU and starts the new one (from memory of the unexpected-arrival
// table); an FF_DL beyond the buffer is then refused with FC Overflow.
func TestReceiveInterruptedReception(t *testing.T) {
	ff20 := []byte{0x10, 20, 1, 2, 3, 4, 5, 6}
	cf1 := []byte{0x21, 7, 8, 9, 10, 11, 12, 13}
	for _, tc := range []struct {
		name        string
		frames      [][]byte
		fcs         []byte  // FC PCI bytes the peer receives
		results     []error // Receive results in order; nil is a message
		msg         []byte  // the message, if any
		aborted     uint64
		interrupted uint64
	}{
		{"too-long FF during a reception", [][]byte{ff20, cf1, {0x10, 0x41, 1, 2, 3, 4, 5, 6}},
			[]byte{0x30, 0x32}, []error{ErrInterrupted, ErrTooLong}, nil, 2, 1},
		{"too-long FF, nothing in progress", [][]byte{{0x10, 0x41, 1, 2, 3, 4, 5, 6}},
			[]byte{0x32}, []error{ErrTooLong}, nil, 1, 0},
		{"SF during a reception", [][]byte{ff20, cf1, {0x02, 0x41, 0x0D}},
			[]byte{0x30}, []error{ErrInterrupted, nil}, []byte{0x41, 0x0D}, 1, 1},
		{"FF during a reception", [][]byte{ff20, cf1, {0x10, 8, 9, 9, 9, 9, 9, 9}, {0x21, 8, 7}},
			[]byte{0x30, 0x30}, []error{ErrInterrupted, nil}, []byte{9, 9, 9, 9, 9, 9, 8, 7}, 1, 1},
	} {
		t.Run(tc.name, func(t *testing.T) {
			b := vbus(t, can.VirtualConfig{})
			c := newConn(t, b.NewNode(), Config{TxID: 0x7E0, RxID: 0x7E8, MaxLength: 64})
			peer := b.NewNode()
			for _, f := range tc.frames {
				rawSend(t, peer, 0x7E8, f...)
			}
			for i, want := range tc.fcs {
				if fc := rawRecv(t, peer); fc.ID != 0x7E0 || fc.Data[0] != want {
					t.Fatalf("FC %d: %v, want PCI %#02x", i, fc, want)
				}
			}
			for i, want := range tc.results {
				m, err := c.Receive(ctxT(t, 2*time.Second))
				switch {
				case want == nil && (err != nil || string(m.Payload) != string(tc.msg)):
					t.Fatalf("result %d: %v % X, want % X", i, err, m.Payload, tc.msg)
				case want != nil && (!errors.Is(err, want) || m.ID != 0x7E8):
					t.Fatalf("result %d: %v from %X, want %v from 7E8", i, err, m.ID, want)
				}
			}
			// Nothing else is queued: an SF now is the next result.
			rawSend(t, peer, 0x7E8, 0x01, 0x55)
			if m, err := c.Receive(ctxT(t, 2*time.Second)); err != nil || string(m.Payload) != "\x55" {
				t.Fatalf("after: %v % X", err, m.Payload)
			}
			if st := c.Stats(); st.Aborted != tc.aborted || st.Interrupted != tc.interrupted {
				t.Errorf("stats %+v, want %d aborted, %d interrupted", st, tc.aborted, tc.interrupted)
			}
		})
	}
}
