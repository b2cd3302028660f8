package tsdbpush

import "sync"

// Staging chunks: put copies into 1 MiB chunks that are reused, so a steady
// stream allocates nothing and never moves staged bytes.
const (
	chunkBytes    = 1 << 20
	maxFreeChunks = 16
)

// staging is the in-memory buffer that Append copies into and the writer
// empties. Its one mutex is held only to copy bytes or swap chunk lists, so
// Append never waits on the disk or the network.
type staging struct {
	limit int // bytes staged at most; more is refused

	mu      sync.Mutex
	chunks  [][]byte // staged lines; each chunk ends at a line end
	n       int      // bytes in chunks
	free    [][]byte // empty chunks for reuse
	closed  bool
	dropped bool // refused lines since the last take
}

// putResult says what became of a put.
type putResult int

const (
	putOK putResult = iota
	putFull
	putClosed
)

// put copies lines (whole lines) into the staging buffer and returns the
// bytes now staged. It refuses them when they would exceed the limit.
func (s *staging) put(lines []byte) (putResult, int) {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.closed {
		return putClosed, s.n
	}
	if s.n+len(lines) > s.limit {
		s.dropped = true
		return putFull, s.n
	}
	last := len(s.chunks) - 1
	if last < 0 || len(s.chunks[last])+len(lines) > cap(s.chunks[last]) {
		var c []byte
		if n := len(s.free); n > 0 && len(lines) <= chunkBytes {
			c, s.free = s.free[n-1], s.free[:n-1]
		} else {
			c = make([]byte, 0, max(chunkBytes, len(lines)))
		}
		s.chunks = append(s.chunks, c)
		last++
	}
	s.chunks[last] = append(s.chunks[last], lines...)
	s.n += len(lines)
	return putOK, s.n
}

// take hands over everything staged, and whether lines were refused since
// the last take. Give the chunks back with recycle once written.
func (s *staging) take() (chunks [][]byte, n int, dropped bool) {
	s.mu.Lock()
	defer s.mu.Unlock()
	chunks, n, dropped = s.chunks, s.n, s.dropped
	s.chunks, s.n, s.dropped = nil, 0, false
	return chunks, n, dropped
}

// recycle keeps written chunks of the standard size for reuse.
func (s *staging) recycle(chunks [][]byte) {
	s.mu.Lock()
	defer s.mu.Unlock()
	for _, c := range chunks {
		if cap(c) == chunkBytes && len(s.free) < maxFreeChunks {
			s.free = append(s.free, c[:0])
		}
	}
}

// size returns the bytes staged.
func (s *staging) size() int {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.n
}

// close refuses every later put; it reports whether it was open.
func (s *staging) close() bool {
	s.mu.Lock()
	defer s.mu.Unlock()
	was := !s.closed
	s.closed = true
	return was
}

// isClosed reports whether close was called.
func (s *staging) isClosed() bool {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.closed
}
