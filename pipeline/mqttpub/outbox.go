package mqttpub

import (
	"bufio"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"sync"

	"github.com/plenum-engine/plenum/pipeline/durable"
)

// Message is one outbox entry: what must reach the broker at least once.
type Message struct {
	Seq     uint64 `json:"seq"`
	Topic   string `json:"topic"`
	Retain  bool   `json:"retain,omitempty"`
	Payload []byte `json:"payload"`
}

// Outbox is a bounded on-disk queue of messages that must be published at
// least once and in order: events, warnings and run summaries. Appends go to
// an append-only log, synced; acknowledgements record the last sequence
// number the broker confirmed. A restart resends what was not acknowledged.
// When the queue is full the oldest message is dropped and counted.
type Outbox struct {
	mu      sync.Mutex
	dir     string
	log     *os.File
	pending []Message
	next    uint64
	acked   uint64
	max     int
	dropped uint64
	notify  chan struct{}
}

// OpenOutbox opens (or creates) the outbox in dir, holding at most max
// unacknowledged messages.
func OpenOutbox(dir string, max int) (*Outbox, error) {
	if max <= 0 {
		max = 10000
	}
	if err := os.MkdirAll(dir, 0o755); err != nil {
		return nil, fmt.Errorf("outbox: %w", err)
	}
	o := &Outbox{dir: dir, max: max, notify: make(chan struct{}, 1), next: 1}
	if b, err := os.ReadFile(filepath.Join(dir, "acked")); err == nil {
		o.acked, _ = strconv.ParseUint(strings.TrimSpace(string(b)), 10, 64)
	}
	logPath := filepath.Join(dir, "outbox.log")
	if f, err := os.Open(logPath); err == nil {
		sc := bufio.NewScanner(f)
		sc.Buffer(make([]byte, 64<<10), 16<<20)
		for sc.Scan() {
			var m Message
			if err := json.Unmarshal(sc.Bytes(), &m); err != nil {
				continue // a torn last line from a power cut
			}
			if m.Seq >= o.next {
				o.next = m.Seq + 1
			}
			if m.Seq > o.acked {
				o.pending = append(o.pending, m)
			}
		}
		f.Close()
	}
	if o.next <= o.acked {
		o.next = o.acked + 1
	}
	// Start a fresh log with only what is pending: the acknowledged part is
	// never needed again.
	if err := o.rewrite(); err != nil {
		return nil, err
	}
	return o, nil
}

func (o *Outbox) rewrite() error {
	err := durable.Write(filepath.Join(o.dir, "outbox.log"), 0o644, func(w io.Writer) error {
		for _, m := range o.pending {
			b, _ := json.Marshal(m)
			if _, err := w.Write(append(b, '\n')); err != nil {
				return err
			}
		}
		return nil
	})
	if err != nil {
		return fmt.Errorf("outbox: %w", err)
	}
	if o.log != nil {
		o.log.Close()
	}
	o.log, err = os.OpenFile(filepath.Join(o.dir, "outbox.log"), os.O_WRONLY|os.O_APPEND, 0o644)
	if err != nil {
		return fmt.Errorf("outbox: %w", err)
	}
	return nil
}

// Append queues a message durably and returns its sequence number.
func (o *Outbox) Append(topic string, retain bool, payload []byte) (uint64, error) {
	o.mu.Lock()
	defer o.mu.Unlock()
	m := Message{Seq: o.next, Topic: topic, Retain: retain, Payload: payload}
	b, err := json.Marshal(m)
	if err != nil {
		return 0, fmt.Errorf("outbox: %w", err)
	}
	if _, err := o.log.Write(append(b, '\n')); err != nil {
		return 0, fmt.Errorf("outbox: %w", err)
	}
	if err := o.log.Sync(); err != nil {
		return 0, fmt.Errorf("outbox: %w", err)
	}
	o.next++
	o.pending = append(o.pending, m)
	if len(o.pending) > o.max {
		o.pending = o.pending[1:]
		o.dropped++
	}
	select {
	case o.notify <- struct{}{}:
	default:
	}
	return m.Seq, nil
}

// Head returns the oldest unacknowledged message.
func (o *Outbox) Head() (Message, bool) {
	o.mu.Lock()
	defer o.mu.Unlock()
	if len(o.pending) == 0 {
		return Message{}, false
	}
	return o.pending[0], true
}

// Ack records that the broker confirmed seq (and everything before it).
func (o *Outbox) Ack(seq uint64) error {
	o.mu.Lock()
	defer o.mu.Unlock()
	for len(o.pending) > 0 && o.pending[0].Seq <= seq {
		o.pending = o.pending[1:]
	}
	o.acked = seq
	if err := durable.WriteFile(filepath.Join(o.dir, "acked"), []byte(strconv.FormatUint(seq, 10)+"\n"), 0o644); err != nil {
		return fmt.Errorf("outbox: %w", err)
	}
	if len(o.pending) == 0 {
		return o.rewrite()
	}
	return nil
}

// Len returns the number of unacknowledged messages; Dropped how many were
// dropped because the outbox was full.
func (o *Outbox) Len() int {
	o.mu.Lock()
	defer o.mu.Unlock()
	return len(o.pending)
}

// Dropped returns how many messages were dropped because the outbox was full.
func (o *Outbox) Dropped() uint64 {
	o.mu.Lock()
	defer o.mu.Unlock()
	return o.dropped
}

// C is signalled when a message is appended.
func (o *Outbox) C() <-chan struct{} { return o.notify }

// Close closes the log.
func (o *Outbox) Close() error {
	o.mu.Lock()
	defer o.mu.Unlock()
	if o.log == nil {
		return errors.New("outbox: closed twice")
	}
	err := o.log.Close()
	o.log = nil
	return err
}
