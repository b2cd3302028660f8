package broker

import (
	"context"
	"errors"
	"log/slog"
	"net"
	"sync"
	"time"

	mqtt "github.com/mochi-mqtt/server/v2"
	"github.com/mochi-mqtt/server/v2/packets"
)

// burstLog logs the first refusal of a kind by one user at once (who, from
// where, which topic, why), sums repeats within the interval and logs them
// in one line with the next refusal after it, or at Close. Safe for
// concurrent use: the broker's hooks run on every client's goroutine.
type burstLog struct {
	log   *slog.Logger
	every time.Duration
	now   func() time.Time
	mu    sync.Mutex
	open  map[burstKey]*burst
}

type burstKey struct{ kind, user string }

type burst struct {
	since    time.Time
	repeats  int
	lastWhy  string
	lastPath string // the last refused topic or client ID
}

func who(user string) string {
	if user == "" {
		return "anonymous"
	}
	return user
}

// refuse records one refusal of kind ("connection", "will", "publish",
// "subscription") for user's client cl on topic (may be empty).
func (b *burstLog) refuse(kind, user string, cl *mqtt.Client, topic, why string) {
	now := b.now()
	k := burstKey{kind, user}
	b.mu.Lock()
	defer b.mu.Unlock()
	if len(b.open) >= maxBursts {
		b.expire(now)
	}
	if o := b.open[k]; o != nil {
		if now.Sub(o.since) < b.every {
			o.repeats++
			o.lastWhy, o.lastPath = why, topic
			return
		}
		b.summary(k, o)
	}
	if b.open == nil {
		b.open = map[burstKey]*burst{}
	}
	b.open[k] = &burst{since: now}
	attrs := []any{"user", who(user), "client", cl.ID, "remote", cl.Net.Remote, "why", why}
	if topic != "" {
		attrs = append(attrs, "topic", topic)
	}
	b.log.Warn("broker refused a "+kind, attrs...)
}

// summary logs the repeats of a burst; b.mu is held.
func (b *burstLog) summary(k burstKey, o *burst) {
	if o.repeats == 0 {
		return
	}
	attrs := []any{"user", who(k.user), "repeats", o.repeats, "interval", b.every, "last_why", o.lastWhy}
	if o.lastPath != "" {
		attrs = append(attrs, "last_topic", o.lastPath)
	}
	b.log.Warn("broker refused a "+k.kind+" (repeated)", attrs...)
}

// maxBursts bounds the bursts kept open at once, so that a client trying
// many user names cannot grow the map without end.
const maxBursts = 256

// expire logs and forgets the bursts whose interval has passed, and if
// that is not enough, all of them; b.mu is held.
func (b *burstLog) expire(now time.Time) {
	for k, o := range b.open {
		if now.Sub(o.since) >= b.every {
			b.summary(k, o)
			delete(b.open, k)
		}
	}
	if len(b.open) >= maxBursts {
		for k, o := range b.open {
			b.summary(k, o)
		}
		b.open = nil
	}
}

// flush logs every open burst's repeats and forgets them.
func (b *burstLog) flush() {
	b.mu.Lock()
	defer b.mu.Unlock()
	for k, o := range b.open {
		b.summary(k, o)
	}
	b.open = nil
}

// refusalFilter drops the broker library's own line for each connection or
// publish the access rules refused: those are counted and logged once per
// burst by burstLog instead. It also drops the library's warning for a
// client connection the broker itself closed (a client's DISCONNECT, a
// takeover, Close at shutdown): "use of closed network connection" is no
// fault, and a clean shutdown logs no warning. The library's info chatter
// (hooks added, listeners attached, clients connecting) is dropped too: only
// its warnings and errors reach the daemon's log.
type refusalFilter struct{ slog.Handler }

// Enabled passes warnings and errors only.
func (f refusalFilter) Enabled(ctx context.Context, l slog.Level) bool {
	return l >= slog.LevelWarn && f.Handler.Enabled(ctx, l)
}

func (f refusalFilter) Handle(ctx context.Context, r slog.Record) error {
	refused := false
	r.Attrs(func(a slog.Attr) bool {
		if err, ok := a.Value.Any().(error); ok && a.Key == "error" {
			if errors.Is(err, net.ErrClosed) {
				refused = true
				return false
			}
			var code packets.Code
			if errors.As(err, &code) {
				switch code {
				case packets.ErrBadUsernameOrPassword, packets.ErrNotAuthorized, packets.ErrClientIdentifierNotValid:
					refused = true
				}
			}
		}
		return !refused
	})
	if refused {
		return nil
	}
	return f.Handler.Handle(ctx, r)
}

func (f refusalFilter) WithAttrs(as []slog.Attr) slog.Handler {
	return refusalFilter{f.Handler.WithAttrs(as)}
}

func (f refusalFilter) WithGroup(name string) slog.Handler {
	return refusalFilter{f.Handler.WithGroup(name)}
}
