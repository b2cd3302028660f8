package main

import (
	"bytes"
	"io"
	"net/http"
	"os"
	"os/exec"
	"regexp"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"syscall"
	"testing"
	"time"
)

// cpuTicks returns a process's user and system CPU time from
// /proc/<pid>/stat (fields 14 and 15, after the parenthesised command
// name), in clock ticks.
func cpuTicks(tb testing.TB, pid int) int64 {
	tb.Helper()
	b, err := os.ReadFile("/proc/" + strconv.Itoa(pid) + "/stat")
	if err != nil {
		tb.Skip("no /proc/<pid>/stat:", err)
	}
	f := strings.Fields(string(b[bytes.LastIndexByte(b, ')')+2:])) // f[0] is field 3, the state
	ut, err1 := strconv.ParseInt(f[11], 10, 64)
	st, err2 := strconv.ParseInt(f[12], 10, 64)
	if err1 != nil || err2 != nil {
		tb.Fatalf("/proc/%d/stat: %q", pid, b)
	}
	return ut + st
}

// clockTicks is the unit of /proc's CPU times (USER_HZ).
func clockTicks() float64 {
	if out, err := exec.Command("getconf", "CLK_TCK").Output(); err == nil {
		if n, err := strconv.Atoi(strings.TrimSpace(string(out))); err == nil && n > 0 {
			return float64(n)
		}
	}
	return 100
}

var consoleRE = regexp.MustCompile(`console:\s+http://(\S+)/console/`)

// BenchmarkDaemonCPUWithStreams runs the demo daemon in a process of its
// own (this test binary re-executed as `plenum demo`, in real time) with 0
// and with 3 console streams attached, each read as fast as it comes (the
// console sends each channel at most 10 times a second), and reports the
// daemon process's CPU seconds per wall second over a fixed 10 s window
// after 3 s of warm-up, from /proc/<pid>/stat; and the messages a second
// each stream got, with the values a second (one "values" message carries
// every channel that changed).
//
// go test -run '^$' -bench DaemonCPUWithStreams -benchtime 1x ./cmd/plenum/
func BenchmarkDaemonCPUWithStreams(b *testing.B) {
	const warm, window = 3 * time.Second, 10 * time.Second
	hz := clockTicks()
	for _, clients := range []int{0, 3} {
		b.Run("clients="+strconv.Itoa(clients), func(b *testing.B) {
			for range b.N {
				cmd := exec.Command(os.Args[0], "-test.run=^TestChildDaemon$")
				cmd.Env = append(os.Environ(), childEnv+"="+strings.Join([]string{"demo", "-http", "127.0.0.1:0", "-mqtt", "127.0.0.1:0", "-time-scale", "1"}, "\n"))
				out := &syncBuffer{}
				cmd.Stdout, cmd.Stderr = out, out
				if err := cmd.Start(); err != nil {
					b.Fatal(err)
				}
				var addr string
				for deadline := time.Now().Add(15 * time.Second); addr == ""; time.Sleep(20 * time.Millisecond) {
					if m := consoleRE.FindStringSubmatch(out.String()); m != nil {
						addr = m[1]
					} else if time.Now().After(deadline) {
						cmd.Process.Kill()
						b.Fatalf("the demo did not print its console:\n%s", out.String())
					}
				}
				var msgs, values atomic.Int64
				var wg sync.WaitGroup
				var bodies []io.Closer
				for range clients {
					resp, err := http.Get("http://" + addr + "/console/stream")
					if err != nil {
						b.Fatal(err)
					}
					bodies = append(bodies, resp.Body)
					wg.Add(1)
					go func() {
						defer wg.Done()
						buf := make([]byte, 64<<10)
						for {
							n, err := resp.Body.Read(buf)
							msgs.Add(int64(bytes.Count(buf[:n], []byte("\nevent: "))))
							values.Add(int64(bytes.Count(buf[:n], []byte("\nevent: values\n"))))
							if err != nil {
								return
							}
						}
					}()
				}
				time.Sleep(warm) // a fixed run, not an assertion
				pid := cmd.Process.Pid
				c0, m0, v0, t0 := cpuTicks(b, pid), msgs.Load(), values.Load(), time.Now()
				time.Sleep(window)
				c1, m1, v1, t1 := cpuTicks(b, pid), msgs.Load(), values.Load(), time.Now()
				wall := t1.Sub(t0).Seconds()
				b.ReportMetric(float64(c1-c0)/hz/wall, "cpu_s/s")
				if clients > 0 {
					b.ReportMetric(float64(m1-m0)/wall/float64(clients), "msgs/s/stream")
					b.ReportMetric(float64(v1-v0)/wall/float64(clients), "values_msgs/s/stream")
				}
				for _, c := range bodies {
					c.Close()
				}
				wg.Wait()
				cmd.Process.Signal(syscall.SIGTERM)
				if err := cmd.Wait(); err != nil {
					b.Fatalf("daemon exit: %v\n%s", err, out.String())
				}
			}
		})
	}
}
