package replay

import "io"

// asyncWriter writes to w from its own goroutine, so that the replay
// computes the next megabyte while the kernel takes the last one.
type asyncWriter struct {
	w    io.Writer
	size int
	cur  []byte
	full chan []byte // buffers to write, in order
	free chan []byte // written buffers, for reuse
	done chan error  // the writer goroutine's first error, at the end
}

// newAsyncWriter starts the writer goroutine; Close ends it.
func newAsyncWriter(w io.Writer, size int) *asyncWriter {
	a := &asyncWriter{w: w, size: size, full: make(chan []byte, 3), free: make(chan []byte, 4), done: make(chan error, 1)}
	for range 3 {
		a.free <- make([]byte, 0, size)
	}
	a.cur = make([]byte, 0, size)
	go func() {
		var err error
		for b := range a.full {
			if err == nil {
				_, err = w.Write(b)
			}
			a.free <- b[:0]
		}
		a.done <- err
	}()
	return a
}

// Write copies p; a failure of an earlier write is returned at Close.
func (a *asyncWriter) Write(p []byte) (int, error) {
	a.cur = append(a.cur, p...)
	if len(a.cur) >= a.size {
		a.full <- a.cur
		a.cur = <-a.free
	}
	return len(p), nil
}

// Close writes what is left, waits for the writer and returns its error.
func (a *asyncWriter) Close() error {
	if len(a.cur) > 0 {
		a.full <- a.cur
	}
	close(a.full)
	return <-a.done
}
