package interop

import (
	"bytes"
	"fmt"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"sync"
	"testing"
	"time"
)

// Mosquitto is a mosquitto broker started for one test on a free port of
// 127.0.0.1, with its data nowhere (persistence off).
type Mosquitto struct {
	// Addr is host:port of its listener.
	Addr string
	// Port is the listener's port.
	Port int
	out  lockedBuffer
}

// StartMosquitto starts the mosquitto at path with a configuration of the
// listener, `persistence false` and the given lines (e.g. "allow_anonymous
// true\n", or a password file, an ACL file and TLS lines for the
// listener), written into a temporary directory. It waits until the broker
// accepts connections (failing t after 10 s), stops it when the test ends
// and, if the test failed, logs what the broker printed.
func StartMosquitto(t testing.TB, path, lines string) *Mosquitto {
	t.Helper()
	m := &Mosquitto{Port: FreePort(t)}
	m.Addr = fmt.Sprintf("127.0.0.1:%d", m.Port)
	conf := fmt.Sprintf("listener %d 127.0.0.1\npersistence false\n%s", m.Port, lines)
	if os.Geteuid() == 0 {
		conf += "user root\n" // else mosquitto drops to a user that cannot read the test's files
	}
	cf := filepath.Join(t.TempDir(), "mosquitto.conf")
	if err := os.WriteFile(cf, []byte(conf), 0o600); err != nil {
		t.Fatal(err)
	}
	cmd := exec.Command(path, "-c", cf)
	cmd.Stdout, cmd.Stderr = &m.out, &m.out
	if err := cmd.Start(); err != nil {
		t.Fatalf("mosquitto: %v", err)
	}
	exited := make(chan struct{})
	go func() { cmd.Wait(); close(exited) }()
	t.Cleanup(func() {
		cmd.Process.Kill()
		<-exited
		if t.Failed() {
			t.Logf("mosquitto printed:\n%s", m.Output())
		}
	})
	deadline := time.Now().Add(10 * time.Second)
	for {
		c, err := net.Dial("tcp", m.Addr)
		if err == nil {
			c.Close()
			return m
		}
		select {
		case <-exited:
			t.Fatalf("mosquitto exited before it listened:\n%s", m.Output())
		default:
		}
		if time.Now().After(deadline) {
			t.Fatalf("mosquitto not listening on %s after 10 s: %v\n%s", m.Addr, err, m.Output())
		}
		time.Sleep(20 * time.Millisecond)
	}
}

// URL is the broker's address as an MQTT client names it: tcp://host:port.
func (m *Mosquitto) URL() string { return "tcp://" + m.Addr }

// Output is what the broker printed so far.
func (m *Mosquitto) Output() string { return m.out.String() }

// lockedBuffer is a buffer the broker's output goroutines and the test
// share.
type lockedBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (l *lockedBuffer) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.Write(p)
}

func (l *lockedBuffer) String() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.String()
}
