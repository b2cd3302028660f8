package tsdbpush

import (
	"bufio"
	"bytes"
	"fmt"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"sync"

	"github.com/plenum-engine/plenum/pipeline/durable"
)

// Marks tell when everything appended up to a point has reached the
// server. Mark(name) notes how many bytes Append has taken so far; the
// writer, once it has put those bytes into the backlog, gives the mark the
// logical offset that ends them (End) and the one where the lines since the
// previous mark begin (Start); once the cursor passes End, Config.OnPushed
// is told the name. A mark whose range lost lines unsent (staging full, a
// failed backlog write, the bound) is complete=false. Resolved marks are
// kept in <Dir>/marks until OnPushed has taken them, so that a restart
// before the server has taken the lines still tells them later.
//
//	<Dir>/marks   one line a mark: "<name> <start> <end> <lossy 0|1>"

// marks is the pusher's list of marks. One mutex; the file is rewritten
// (tmp, fsync, rename) when the resolved list changes.
type marks struct {
	path string

	mu       sync.Mutex
	pending  []pendingMark // not yet in the backlog
	resolved []resolvedMark
	lossNext bool   // lines were dropped since the last mark was made
	taken    uint64 // bytes the writer has taken from staging
	lastEnd  int64  // End of the last resolved mark, or the backlog's end at Open
}

type pendingMark struct {
	name  string
	at    uint64 // Append bytes taken before the mark
	lossy bool
}

type resolvedMark struct {
	name       string
	start, end int64
	lossy      bool
}

// loadMarks reads <dir>/marks; a missing file is no marks, a damaged line
// is skipped (its run is then never told pushed: kept rather than lost).
func loadMarks(dir string, end int64) (*marks, error) {
	m := &marks{path: filepath.Join(dir, "marks"), lastEnd: end}
	b, err := os.ReadFile(m.path)
	if os.IsNotExist(err) {
		return m, nil
	}
	if err != nil {
		return nil, fmt.Errorf("tsdbpush: marks: %w", err)
	}
	m.resolved = parseMarks(b)
	return m, nil
}

// parseMarks reads the lines of a marks file; a damaged line is skipped
// (its run is then never told pushed: kept rather than lost).
func parseMarks(b []byte) []resolvedMark {
	var out []resolvedMark
	sc := bufio.NewScanner(bytes.NewReader(b))
	sc.Buffer(nil, 1<<20)
	for sc.Scan() {
		f := strings.Fields(sc.Text())
		if len(f) != 4 {
			continue
		}
		start, err1 := strconv.ParseInt(f[1], 10, 64)
		e, err2 := strconv.ParseInt(f[2], 10, 64)
		if err1 != nil || err2 != nil || start < 0 || e < start || (f[3] != "0" && f[3] != "1") {
			continue
		}
		out = append(out, resolvedMark{name: f[0], start: start, end: e, lossy: f[3] == "1"})
	}
	return out
}

// formatMarks is the file's text for marks.
func formatMarks(marks []resolvedMark) []byte {
	var b bytes.Buffer
	for _, r := range marks {
		lossy := 0
		if r.lossy {
			lossy = 1
		}
		fmt.Fprintf(&b, "%s %d %d %d\n", r.name, r.start, r.end, lossy)
	}
	return b.Bytes()
}

// add notes a mark at the bytes appended so far.
func (m *marks) add(name string, appended uint64) {
	m.mu.Lock()
	defer m.mu.Unlock()
	m.pending = append(m.pending, pendingMark{name: name, at: appended, lossy: m.lossNext})
	m.lossNext = false
}

// dropped notes lines lost before they reached the backlog (staging full,
// a failed write): the next mark made is lossy, and so are the marks still
// pending (their lines may be among them).
func (m *marks) dropped() {
	m.mu.Lock()
	defer m.mu.Unlock()
	m.lossNext = true
	for i := range m.pending {
		m.pending[i].lossy = true
	}
}

// flushed notes that the writer has taken n more bytes from staging and
// put them in the backlog (or dropped them), which now ends at next, and
// that the bound removed the unsent bytes [from, to). It resolves the
// marks whose bytes are all in, and rewrites the file when anything
// changed. Only the writer calls flushed and settle, one at a time; the
// file is written outside the mutex, so Mark never waits on the disk.
func (m *marks) flushed(n int, next, from, to int64) error {
	m.mu.Lock()
	m.taken += uint64(n)
	changed := false
	for len(m.pending) > 0 && m.pending[0].at <= m.taken {
		p := m.pending[0]
		m.pending = m.pending[1:]
		m.resolved = append(m.resolved, resolvedMark{name: p.name, start: m.lastEnd, end: next, lossy: p.lossy})
		m.lastEnd = next
		changed = true
	}
	if to > from {
		for i := range m.resolved {
			r := &m.resolved[i]
			if !r.lossy && r.start < to && r.end > from {
				r.lossy, changed = true, true
			}
		}
		if to > m.lastEnd {
			// Bytes after the last resolved mark: every byte written since
			// it belongs to the next mark, pending or not yet made.
			if len(m.pending) > 0 {
				m.pending[0].lossy = true
			} else {
				m.lossNext = true
			}
		}
	}
	text := formatMarks(m.resolved)
	m.mu.Unlock()
	if !changed {
		return nil
	}
	return m.write(text)
}

// settle tells onPushed of every resolved mark the cursor has passed and
// forgets those it took; it returns the first error.
func (m *marks) settle(acked int64, onPushed func(name string, complete bool) error) error {
	if onPushed == nil {
		return nil
	}
	m.mu.Lock()
	var due []resolvedMark
	for _, r := range m.resolved {
		if r.end <= acked {
			due = append(due, r)
		}
	}
	m.mu.Unlock()
	if len(due) == 0 {
		return nil
	}
	var firstErr error
	told := map[resolvedMark]bool{}
	for _, r := range due {
		if err := onPushed(r.name, !r.lossy); err != nil {
			if firstErr == nil {
				firstErr = err
			}
			continue
		}
		told[r] = true
	}
	if len(told) == 0 {
		return firstErr
	}
	m.mu.Lock()
	keep := m.resolved[:0]
	for _, r := range m.resolved {
		if !told[r] {
			keep = append(keep, r)
		}
	}
	m.resolved = keep
	text := formatMarks(m.resolved)
	m.mu.Unlock()
	if err := m.write(text); err != nil && firstErr == nil {
		firstErr = err
	}
	return firstErr
}

// write replaces the file with text durably (pipeline/durable).
func (m *marks) write(text []byte) error {
	if err := durable.WriteFile(m.path, text, 0o644); err != nil {
		return fmt.Errorf("tsdbpush: marks: %w", err)
	}
	return nil
}

// Mark asks to be told, through Config.OnPushed, once every line appended
// before this call has been acknowledged by the server. name identifies the
// mark (a run id; no spaces). The lines of a mark are those appended since
// the previous mark; when some of them were dropped unsent, OnPushed is
// told complete=false. Marks survive a restart once the lines are in the
// backlog. A Mark made before anything is appended after Open covers what
// an earlier process left in the backlog (a run cut short).
func (p *Pusher) Mark(name string) {
	p.marks.add(name, p.appBytes.Load())
}
