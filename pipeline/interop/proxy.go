package interop

import (
	"io"
	"net"
	"sync"
	"testing"
)

// Proxy is a TCP forwarder for tests, standing in for the network path of
// one client: frozen, it passes no byte either way while the connections
// stay open (the client goes quiet without a word); cut, it drops every
// connection and refuses new ones (the client leaves the network, and a
// broker sends its will).
type Proxy struct {
	ln    net.Listener
	flow  sync.RWMutex // held for writing while frozen
	mu    sync.Mutex
	conns []net.Conn
}

// NewProxy forwards a free local port to upstream until the test ends.
func NewProxy(t testing.TB, upstream string) *Proxy {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	p := &Proxy{ln: ln}
	go func() {
		for {
			c, err := ln.Accept()
			if err != nil {
				return
			}
			u, err := net.Dial("tcp", upstream)
			if err != nil {
				c.Close()
				continue
			}
			p.mu.Lock()
			p.conns = append(p.conns, c, u)
			p.mu.Unlock()
			go p.pump(u, c)
			go p.pump(c, u)
		}
	}()
	t.Cleanup(func() { ln.Close(); p.closeAll() })
	return p
}

// URL is the proxy's address as an MQTT broker URL.
func (p *Proxy) URL() string { return "tcp://" + p.ln.Addr().String() }

// Freeze stops every byte in both directions; the connections stay open.
func (p *Proxy) Freeze() { p.flow.Lock() }

// Thaw lets bytes pass again after Freeze.
func (p *Proxy) Thaw() { p.flow.Unlock() }

// Cut drops the connections (after Freeze) and refuses new ones.
func (p *Proxy) Cut() {
	p.ln.Close()
	p.closeAll()
	p.flow.Unlock()
}

func (p *Proxy) pump(dst io.Writer, src io.Reader) {
	buf := make([]byte, 32<<10)
	for {
		n, err := src.Read(buf)
		if n > 0 {
			p.flow.RLock()
			_, werr := dst.Write(buf[:n])
			p.flow.RUnlock()
			if werr != nil {
				return
			}
		}
		if err != nil {
			return
		}
	}
}

func (p *Proxy) closeAll() {
	p.mu.Lock()
	defer p.mu.Unlock()
	for _, c := range p.conns {
		c.Close()
	}
	p.conns = nil
}
