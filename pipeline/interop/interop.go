// Package interop holds what the tests against outside programs (Debian's
// mosquitto, promtool, influxd, victoria-metrics) share: the rule that they
// run under PLENUM_INTEGRATION=1, where a missing program is a failure, and
// skip with a one-line reason otherwise.
package interop

import (
	"net"
	"os"
	"os/exec"
	"testing"
)

// Need skips t unless PLENUM_INTEGRATION=1; then it fails t if a program is
// not installed, naming the apt packages that provide them, and returns
// the programs' paths in order.
func Need(t testing.TB, packages string, programs ...string) []string {
	t.Helper()
	if os.Getenv("PLENUM_INTEGRATION") != "1" {
		t.Skipf("interop test: set PLENUM_INTEGRATION=1 to run it against %s", packages)
	}
	paths := make([]string, 0, len(programs))
	for _, prog := range programs {
		p, err := exec.LookPath(prog)
		if err != nil {
			t.Fatalf("PLENUM_INTEGRATION=1 but %s is not installed (apt-get install -y %s): %v", prog, packages, err)
		}
		paths = append(paths, p)
	}
	return paths
}

// FreePort returns a TCP port on 127.0.0.1 that was free a moment ago.
func FreePort(t testing.TB) int {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer ln.Close()
	return ln.Addr().(*net.TCPAddr).Port
}
