package sdnotify

import (
	"fmt"
	"os/exec"
	"path/filepath"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/pipeline/interop"
)

// The datagrams are byte for byte those of systemd's own systemd-notify
// (Debian 12, systemd 252), the reference for the protocol, on a path and
// on an abstract socket.
func TestSameAsSystemdNotify(t *testing.T) {
	prog := interop.Need(t, "systemd", "systemd-notify")[0]
	for _, socket := range []string{filepath.Join(t.TempDir(), "notify"), fmt.Sprintf("@plenum-ref-%d", time.Now().UnixNano())} {
		srv := listen(t, socket)
		n := New(Config{Socket: socket})
		for _, tc := range []struct {
			args []string
			send func() error
		}{
			{[]string{"--ready", "--status=running: vehicle car-1"}, func() error { return n.Ready("running: vehicle car-1") }},
			{[]string{"WATCHDOG=1"}, n.Ping},
			{[]string{"RELOADING=1", "STATUS=reloading /etc/plenum/plenum.yaml"}, func() error { return n.Reloading("reloading /etc/plenum/plenum.yaml") }},
			{[]string{"STOPPING=1", "STATUS=stopping"}, func() error { return n.Stopping("stopping") }},
		} {
			cmd := exec.Command(prog, append([]string{"--no-block"}, tc.args...)...)
			cmd.Env = []string{"NOTIFY_SOCKET=" + socket}
			if out, err := cmd.CombinedOutput(); err != nil {
				t.Fatalf("systemd-notify %q: %v: %s", tc.args, err, out)
			}
			want := recv(t, srv)
			if err := tc.send(); err != nil {
				t.Fatal(err)
			}
			if got := recv(t, srv); got != want {
				t.Errorf("%s: sent %q, systemd-notify %q sent %q", socket, got, tc.args, want)
			}
		}
		n.Close()
	}
}
