// Package sdnotify speaks the service manager's readiness protocol
// (sd_notify): one datagram per state change to the socket that
// $NOTIFY_SOCKET names, and the watchdog interval that $WATCHDOG_USEC and
// $WATCHDOG_PID give. Without a socket every call is a no-op, so a daemon
// started by hand or in a test behaves the same with or without systemd.
//
// The protocol (sd_notify(3): one datagram of newline-separated KEY=VALUE
// assignments) is written out here rather than taken from a library: it is about
// twenty lines, and the daemon needs nothing else of the service manager.
package sdnotify

import (
	"errors"
	"fmt"
	"math"
	"net"
	"strconv"
	"strings"
	"sync"
	"time"
)

// Config is what the service manager passed in the environment. The zero
// value notifies nothing.
type Config struct {
	// Socket is $NOTIFY_SOCKET: a file system path, or an abstract socket
	// name starting with "@". Empty: notifications are off.
	Socket string
	// WatchdogUSec is $WATCHDOG_USEC, the watchdog timeout in microseconds
	// (empty or 0: no watchdog).
	WatchdogUSec string
	// WatchdogPID is $WATCHDOG_PID: when set, the watchdog is meant for that
	// process only.
	WatchdogPID string
	// PID is this process's id, compared with WatchdogPID.
	PID int
}

// FromEnv reads the configuration from getenv (os.Getenv in the binary)
// and pid (os.Getpid()).
func FromEnv(getenv func(string) string, pid int) Config {
	return Config{Socket: getenv("NOTIFY_SOCKET"), WatchdogUSec: getenv("WATCHDOG_USEC"), WatchdogPID: getenv("WATCHDOG_PID"), PID: pid}
}

// WatchdogInterval returns the watchdog timeout the service manager
// expects pings within, or 0 when there is none for this process (no
// socket, no or a bad WATCHDOG_USEC, or WATCHDOG_PID naming another
// process). A malformed value is an error naming the variable.
func (c Config) WatchdogInterval() (time.Duration, error) {
	if c.Socket == "" || c.WatchdogUSec == "" {
		return 0, nil
	}
	if c.WatchdogPID != "" {
		pid, err := strconv.Atoi(c.WatchdogPID)
		if err != nil {
			return 0, fmt.Errorf("WATCHDOG_PID=%q: %w", c.WatchdogPID, err)
		}
		if pid != c.PID {
			return 0, nil
		}
	}
	us, err := strconv.ParseUint(c.WatchdogUSec, 10, 63)
	if err == nil && us > uint64(math.MaxInt64/int64(time.Microsecond)) {
		err = errors.New("longer than a time.Duration holds")
	}
	if err != nil {
		return 0, fmt.Errorf("WATCHDOG_USEC=%q: %w", c.WatchdogUSec, err)
	}
	return time.Duration(us) * time.Microsecond, nil
}

// Notifier sends state changes to the service manager. The zero value and
// a nil *Notifier send nothing; safe for concurrent use.
type Notifier struct {
	addr *net.UnixAddr // nil: off
	mu   sync.Mutex
	conn *net.UnixConn // opened on first use
}

// New returns a notifier for c; without a socket it sends nothing.
func New(c Config) *Notifier {
	if c.Socket == "" {
		return &Notifier{}
	}
	name := c.Socket
	if strings.HasPrefix(name, "@") {
		name = "\x00" + name[1:] // Linux abstract namespace
	}
	return &Notifier{addr: &net.UnixAddr{Name: name, Net: "unixgram"}}
}

// Enabled reports whether notifications go anywhere.
func (n *Notifier) Enabled() bool { return n != nil && n.addr != nil }

// Send sends the assignments (e.g. "READY=1", "STATUS=running") in one
// datagram. Without a socket it does nothing and returns nil.
func (n *Notifier) Send(state ...string) error {
	if !n.Enabled() || len(state) == 0 {
		return nil
	}
	n.mu.Lock()
	defer n.mu.Unlock()
	if n.conn == nil {
		c, err := net.DialUnix("unixgram", nil, n.addr)
		if err != nil {
			return fmt.Errorf("sdnotify: NOTIFY_SOCKET %s: %w", n.addr.Name, err)
		}
		n.conn = c
	}
	// Newline-separated, without a final newline: what systemd-notify sends.
	if _, err := n.conn.Write([]byte(strings.Join(state, "\n"))); err != nil {
		n.conn.Close()
		n.conn = nil // the manager may have been restarted: dial again next time
		return fmt.Errorf("sdnotify: NOTIFY_SOCKET %s: %w", n.addr.Name, err)
	}
	return nil
}

// Ready says start-up is complete, with a status line for people.
func (n *Notifier) Ready(status string) error { return n.Send("READY=1", "STATUS="+oneLine(status)) }

// Reloading says the configuration is being reloaded; Ready follows.
func (n *Notifier) Reloading(status string) error {
	return n.Send("RELOADING=1", "STATUS="+oneLine(status))
}

// Stopping says the shutdown has begun.
func (n *Notifier) Stopping(status string) error {
	return n.Send("STOPPING=1", "STATUS="+oneLine(status))
}

// Status sets the status line for people (systemctl status).
func (n *Notifier) Status(status string) error { return n.Send("STATUS=" + oneLine(status)) }

// oneLine keeps a status to one assignment: a newline would start another.
func oneLine(s string) string { return strings.ReplaceAll(s, "\n", " ") }

// Ping is the watchdog's keep-alive.
func (n *Notifier) Ping() error { return n.Send("WATCHDOG=1") }

// Close closes the socket, if one was opened.
func (n *Notifier) Close() error {
	if !n.Enabled() {
		return nil
	}
	n.mu.Lock()
	defer n.mu.Unlock()
	if n.conn == nil {
		return nil
	}
	err := n.conn.Close()
	n.conn = nil
	return err
}
