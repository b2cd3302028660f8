package tsdbpush

import (
	"bytes"
	"compress/gzip"
	"context"
	"fmt"
	"io"
	"log/slog"
	"math/rand/v2"
	"net/http"
	"strconv"
	"sync/atomic"
	"time"

	"github.com/plenum-engine/plenum/pipeline/tsdbpush/backlog"
)

// queue is what the sender drains: the backlog.
type queue interface {
	Next(maxBytes, maxLines int) (backlog.Batch, bool, error)
	Ack(end int64) error
	SetAside(b backlog.Batch) (string, error)
}

// sender cuts batches from the queue and POSTs them until each is accepted
// (2xx) or refused for its content (set aside), then acknowledges it. It
// runs in one goroutine; its counters are atomics read by Stats.
type sender struct {
	cfg    Config // defaults applied
	client *http.Client
	sleep  func(context.Context, time.Duration) error
	log    *slog.Logger
	q      queue
	ready  <-chan struct{} // new bytes in the queue
	errs   *lastError

	sentLines, sentBytes atomic.Uint64
	batches, retries     atomic.Uint64
	rejB, rejL, rejBytes atomic.Uint64
	failing              atomic.Bool // the last request failed and is being retried
}

// run sends batches until ctx is done; with drain, it then goes on until
// the queue is empty once flushed has been closed (the writer's last flush),
// or until sctx, which outlives ctx, is done. Requests run under sctx.
func (s *sender) run(ctx, sctx context.Context, flushed <-chan struct{}, drain bool) {
	t := time.NewTicker(s.cfg.FlushEvery)
	defer t.Stop()
	last := false // the writer's last flush is on disk
	for sctx.Err() == nil && (drain || ctx.Err() == nil) {
		b, ok, err := s.q.Next(s.cfg.BatchBytes, s.cfg.BatchLines)
		if err != nil {
			s.errs.set(err)
			s.log.Error("tsdbpush: backlog read failed", "err", err)
			if s.sleep(sctx, s.cfg.MaxBackoff) != nil || ctx.Err() != nil {
				return
			}
			continue
		}
		if !ok {
			if last {
				return // drained
			}
			// With a drain, ctx ending is no reason to stop: the last flush is.
			ctxDone := ctx.Done()
			if drain {
				ctxDone = nil
			}
			select {
			case <-ctxDone:
				return
			case <-sctx.Done():
				return
			case <-flushed:
				last, flushed = true, nil
			case <-s.ready:
			case <-t.C:
			}
			continue
		}
		if err := s.send(sctx, b); err != nil {
			return // sctx done
		}
	}
}

// outcome of one request.
type outcome int

const (
	accepted outcome = iota
	retry
	reject
)

// send posts b until it is accepted or set aside; it returns an error only
// when ctx is done.
func (s *sender) send(ctx context.Context, b backlog.Batch) error {
	body := b.Data
	if s.cfg.Gzip {
		var zb bytes.Buffer
		zw := gzip.NewWriter(&zb)
		zw.Write(b.Data) // writes to a bytes.Buffer do not fail
		zw.Close()
		body = zb.Bytes()
	}
	for attempt := 0; ; attempt++ {
		if attempt > 0 {
			s.retries.Add(1)
		}
		out, wait, msg, err := s.post(ctx, body)
		switch {
		case out == retry && ctx.Err() != nil:
			return ctx.Err()
		case out == retry:
		case out == accepted:
			if s.failing.Swap(false) {
				s.log.Info("tsdbpush: server accepts writes again", "attempts", attempt+1)
			}
			s.sentLines.Add(uint64(b.Lines))
			s.sentBytes.Add(uint64(len(b.Data)))
			s.batches.Add(1)
			s.ack(b)
			return nil
		default:
			s.failing.Store(false)
			s.setAside(b, msg)
			s.ack(b)
			return nil
		}
		s.errs.set(err)
		if !s.failing.Swap(true) {
			s.log.Warn("tsdbpush: write failed, retrying with backoff", "err", err, "offset", b.Start)
		} else {
			s.log.Debug("tsdbpush: write failed again", "err", err, "attempt", attempt+1)
		}
		if wait <= 0 {
			wait = s.backoff(attempt)
		}
		if err := s.sleep(ctx, wait); err != nil {
			return err
		}
	}
}

// backoff is the wait after the attempt-th failure (0-based): exponential,
// capped, with equal jitter (d/2 plus a random part of up to d/2).
func (s *sender) backoff(attempt int) time.Duration {
	d := s.cfg.MinBackoff
	for i := 0; i < attempt && d < s.cfg.MaxBackoff; i++ {
		d *= 2
	}
	d = min(d, s.cfg.MaxBackoff)
	half := d / 2
	return half + rand.N(half+1)
}

// inFlightGrace is how long a request in flight may still take once Run's
// context has ended, when there is no drain.
const inFlightGrace = 2 * time.Second

// post makes one request under ctx (the sender's context, which outlives
// Run's by the drain or the in-flight grace: cut off, the server may have
// stored a batch without our knowing, and it would be sent again after a
// restart, harmless where writes are idempotent but needless). For retry it
// returns the server's Retry-After (0 if none) and the error to report.
func (s *sender) post(ctx context.Context, body []byte) (outcome, time.Duration, string, error) {
	rctx, cancel := context.WithTimeout(ctx, s.cfg.Timeout)
	defer cancel()
	req, err := http.NewRequestWithContext(rctx, http.MethodPost, s.cfg.URL, bytes.NewReader(body))
	if err != nil {
		return retry, 0, "", fmt.Errorf("tsdbpush: request: %w", err)
	}
	req.Header.Set("Content-Type", "text/plain; charset=utf-8")
	if s.cfg.Gzip {
		req.Header.Set("Content-Encoding", "gzip")
	}
	switch {
	case s.cfg.Token != "":
		req.Header.Set("Authorization", "Token "+s.cfg.Token)
	case s.cfg.Username != "":
		req.SetBasicAuth(s.cfg.Username, s.cfg.Password)
	}
	resp, err := s.client.Do(req)
	if err != nil {
		return retry, 0, "", fmt.Errorf("tsdbpush: post: %w", err)
	}
	defer resp.Body.Close()
	msgb, _ := io.ReadAll(io.LimitReader(resp.Body, 2048))
	io.Copy(io.Discard, io.LimitReader(resp.Body, 1<<20)) // let the connection be reused
	msg := string(bytes.TrimSpace(msgb))
	code := resp.StatusCode
	switch {
	case code >= 200 && code < 300:
		return accepted, 0, "", nil
	case code == http.StatusTooManyRequests || code == http.StatusServiceUnavailable:
		wait, _ := parseRetryAfter(resp.Header.Get("Retry-After"), time.Now())
		return retry, min(wait, s.cfg.MaxRetryAfter), msg, fmt.Errorf("tsdbpush: server answered %d: %s", code, msg)
	case code == http.StatusUnauthorized || code == http.StatusForbidden ||
		code == http.StatusNotFound || code == http.StatusRequestTimeout:
		return retry, 0, msg, fmt.Errorf("tsdbpush: server answered %d (check URL, database and credentials): %s", code, msg)
	case code >= 400 && code < 500:
		return reject, 0, fmt.Sprintf("%d: %s", code, msg), nil
	default:
		return retry, 0, msg, fmt.Errorf("tsdbpush: server answered %d: %s", code, msg)
	}
}

// setAside keeps a refused batch under rejected/ and counts it.
func (s *sender) setAside(b backlog.Batch, msg string) {
	s.rejB.Add(1)
	s.rejL.Add(uint64(b.Lines))
	s.rejBytes.Add(uint64(len(b.Data)))
	path, err := s.q.SetAside(b)
	if err != nil {
		s.log.Error("tsdbpush: cannot keep rejected batch", "path", path, "err", err)
	}
	s.log.Warn("tsdbpush: server refused a batch; set aside", "answer", msg, "lines", b.Lines,
		"path", path, "rejected_batches_total", s.rejB.Load())
	s.errs.set(fmt.Errorf("tsdbpush: batch at %d refused: %s", b.Start, msg))
}

// ack moves the cursor past b.
func (s *sender) ack(b backlog.Batch) {
	if err := s.q.Ack(b.End); err != nil {
		s.errs.set(err)
		s.log.Error("tsdbpush: cursor write failed (lines may be resent after a restart)", "err", err)
	}
}

// parseRetryAfter reads a Retry-After value: delay seconds or an HTTP date.
func parseRetryAfter(v string, now time.Time) (time.Duration, bool) {
	if v == "" {
		return 0, false
	}
	if n, err := strconv.ParseInt(v, 10, 64); err == nil {
		if n < 0 {
			return 0, false
		}
		return time.Duration(min(n, 1<<31)) * time.Second, true
	}
	if t, err := http.ParseTime(v); err == nil {
		return max(t.Sub(now), 0), true
	}
	return 0, false
}

// lastError is the latest failure and its time, safe for concurrent use.
type lastError struct {
	p atomic.Pointer[errAt]
}

type errAt struct {
	msg string
	at  time.Time
}

func (e *lastError) set(err error) {
	e.p.Store(&errAt{msg: err.Error(), at: time.Now()})
}

func (e *lastError) get() (string, time.Time) {
	if v := e.p.Load(); v != nil {
		return v.msg, v.at
	}
	return "", time.Time{}
}
