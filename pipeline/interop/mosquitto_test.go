package interop

import (
	"fmt"
	"net"
	"runtime"
	"strings"
	"testing"
)

// TestStartMosquitto starts a broker, finds it listening, and sees that a
// configuration mosquitto refuses fails the start with what it printed.
func TestStartMosquitto(t *testing.T) {
	paths := Need(t, "mosquitto", "mosquitto")
	m := StartMosquitto(t, paths[0], "allow_anonymous true\n")
	c, err := net.Dial("tcp", m.Addr)
	if err != nil {
		t.Fatalf("broker at %s: %v", m.Addr, err)
	}
	c.Close()
	if !strings.HasPrefix(m.URL(), "tcp://127.0.0.1:") {
		t.Errorf("URL %q", m.URL())
	}

	ft := &fatalRecorder{TB: t}
	done := make(chan struct{})
	go func() {
		defer close(done)
		StartMosquitto(ft, paths[0], "no_such_option on\n")
	}()
	<-done
	if !strings.Contains(ft.msg, "mosquitto exited before it listened") {
		t.Errorf("a refused configuration: %q", ft.msg)
	}
}

// fatalRecorder records the first Fatalf and ends the goroutine, as
// t.Fatalf would.
type fatalRecorder struct {
	testing.TB
	msg string
}

func (f *fatalRecorder) Fatalf(format string, args ...any) {
	f.msg = fmt.Sprintf(format, args...)
	runtime.Goexit()
}
