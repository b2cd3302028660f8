package broker

import (
	"bytes"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"strings"
	"testing"

	"github.com/mochi-mqtt/server/v2/packets"
)

// closedReadError is what the broker library's read loop gets when the
// broker itself closed a client's connection.
func closedReadError(t *testing.T) error {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer ln.Close()
	c, err := net.Dial("tcp", ln.Addr().String())
	if err != nil {
		t.Fatal(err)
	}
	c.Close()
	_, err = c.Read(make([]byte, 1))
	return err
}

// TestFilterDropsOwnClose: the library's warning for a connection the
// broker closed itself (what a shutdown with a client still connected
// logged) is dropped; other warnings pass, and refusals stay with the burst
// log.
func TestFilterDropsOwnClose(t *testing.T) {
	closed := closedReadError(t)
	cases := []struct {
		name string
		err  error
		pass bool
	}{
		{"closed by the broker", closed, false},
		{"closed, wrapped", fmt.Errorf("read connection: %w", closed), false},
		{"bad password", packets.ErrBadUsernameOrPassword, false},
		{"a reset by the peer", errors.New("read tcp: connection reset by peer"), true},
		{"a protocol violation", packets.ErrProtocolViolationRequireFirstConnect, true},
	}
	for _, c := range cases {
		logs := &capture{}
		log := slog.New(refusalFilter{logs}).With("component", "broker")
		log.Warn("", "listener", "tcp", "error", c.err)
		if got := len(logs.lines) == 1; got != c.pass {
			t.Errorf("%s (%v): logged %q, want logged %v", c.name, c.err, logs.lines, c.pass)
		}
	}
}

// The library's info chatter stays out of the daemon's log, through With
// and WithGroup too; its warnings get through.
func TestLibraryChatterFiltered(t *testing.T) {
	var buf bytes.Buffer
	log := slog.New(refusalFilter{slog.NewTextHandler(&buf, nil)})
	log.With("component", "broker").Info("chatter")
	log.WithGroup("g").Info("chatter")
	log.With("component", "broker").Warn("trouble")
	if out := buf.String(); strings.Contains(out, "chatter") || !strings.Contains(out, "trouble") || !strings.Contains(out, "component=broker") {
		t.Fatalf("log:\n%s", out)
	}
}
