package main

import (
	"bytes"
	"crypto/sha256"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"sort"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/influxdata/line-protocol/v2/lineprotocol"

	"github.com/plenum-engine/plenum/pipeline/record"
)

// childEnv, when set, makes this test binary act as the plenum command with
// the arguments it holds (separated by newlines): the SIGKILL test needs a
// real process to kill.
const childEnv = "PLENUM_TEST_CHILD_ARGS"

func TestChildDaemon(t *testing.T) {
	args := os.Getenv(childEnv)
	if args == "" {
		t.Skip("only runs as the child process of TestSIGKILLMidRun")
	}
	os.Exit(run(strings.Split(args, "\n"), os.Stdout, os.Stderr))
}

// daemonProc is a plenum daemon in its own process.
type daemonProc struct {
	cmd *exec.Cmd
	out *syncBuffer
}

var recordingRE = regexp.MustCompile(`recording: (\S+)`)

func startProc(t *testing.T, args ...string) *daemonProc {
	t.Helper()
	cmd := exec.Command(os.Args[0], "-test.run=^TestChildDaemon$")
	cmd.Env = append(os.Environ(), childEnv+"="+strings.Join(args, "\n"))
	out := &syncBuffer{}
	cmd.Stdout, cmd.Stderr = out, out
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	d := &daemonProc{cmd: cmd, out: out}
	t.Cleanup(func() {
		if cmd.ProcessState == nil {
			cmd.Process.Kill()
			cmd.Wait()
		}
	})
	return d
}

// runDir waits for the daemon to say where it records.
func (d *daemonProc) runDir(t *testing.T) string {
	t.Helper()
	deadline := time.Now().Add(15 * time.Second)
	for time.Now().Before(deadline) {
		if m := recordingRE.FindStringSubmatch(d.out.String()); m != nil {
			return m[1]
		}
		time.Sleep(20 * time.Millisecond)
	}
	t.Fatalf("the daemon did not start recording:\n%s", d.out.String())
	return ""
}

func (d *daemonProc) stop(t *testing.T) {
	t.Helper()
	d.cmd.Process.Signal(syscall.SIGTERM)
	if err := d.cmd.Wait(); err != nil {
		t.Fatalf("daemon exit: %v\n%s", err, d.out.String())
	}
}

// waitLines waits until the run's data holds at least n lines.
func waitLines(t *testing.T, dir string, n int) {
	t.Helper()
	deadline := time.Now().Add(20 * time.Second)
	for time.Now().Before(deadline) {
		b, _ := os.ReadFile(filepath.Join(dir, "0001.lp"))
		if bytes.Count(b, []byte{'\n'}) >= n {
			return
		}
		time.Sleep(50 * time.Millisecond)
	}
	t.Fatalf("%s never reached %d lines", dir, n)
}

func hashTree(t *testing.T, dir string) map[string][32]byte {
	t.Helper()
	out := map[string][32]byte{}
	ents, err := os.ReadDir(dir)
	if err != nil {
		t.Fatal(err)
	}
	for _, e := range ents {
		b, err := os.ReadFile(filepath.Join(dir, e.Name()))
		if err != nil {
			t.Fatal(err)
		}
		out[e.Name()] = sha256.Sum256(b)
	}
	return out
}

// decodeAll parses every line with the line-protocol decoder and returns
// the points' times (ns) in order. A .lp the compressor has replaced is
// read from its .lp.gz.
func decodeAll(t *testing.T, path string) []int64 {
	t.Helper()
	b, err := record.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	dec := lineprotocol.NewDecoderWithBytes(b)
	var times []int64
	line := 0
	for dec.Next() {
		line++
		if _, err := dec.Measurement(); err != nil {
			t.Fatalf("%s:%d: %v", path, line, err)
		}
		for {
			k, _, err := dec.NextTag()
			if err != nil {
				t.Fatalf("%s:%d: tag: %v", path, line, err)
			}
			if k == nil {
				break
			}
		}
		for {
			k, _, err := dec.NextField()
			if err != nil {
				t.Fatalf("%s:%d: field: %v", path, line, err)
			}
			if k == nil {
				break
			}
		}
		ts, err := dec.Time(lineprotocol.Nanosecond, time.Time{})
		if err != nil {
			t.Fatalf("%s:%d: time: %v", path, line, err)
		}
		times = append(times, ts.UnixNano())
	}
	return times
}

// TestSIGKILLMidRun kills a real daemon process mid-run. What it had
// written is still there and parses; a torn tail (as a power cut leaves it)
// is cut on the next start and the run is marked as ended abnormally; the
// run before it is byte for byte what it was.
func TestSIGKILLMidRun(t *testing.T) {
	if testing.Short() {
		t.Skip("starts three daemon processes")
	}
	base := t.TempDir()
	recDir := filepath.Join(base, "runs")
	const syncEvery = 100 * time.Millisecond
	cfgText := strings.NewReplacer("listen: 127.0.0.1:1883", "listen: 127.0.0.1:0", "listen: 127.0.0.1:9108", "listen: 127.0.0.1:0").
		Replace(string(demoConfig))
	cfgText += fmt.Sprintf("record:\n  dir: %s\n  sync_every: %s\nstate_dir: %s\n", recDir, syncEvery, filepath.Join(base, "state"))
	cfgPath := filepath.Join(base, "plenum.yaml")
	if err := os.WriteFile(cfgPath, []byte(cfgText), 0o644); err != nil {
		t.Fatal(err)
	}

	// Run A ends normally.
	a := startProc(t, "run", "-config", cfgPath)
	dirA := a.runDir(t)
	waitLines(t, dirA, 2000)
	a.stop(t)
	hashA := hashTree(t, dirA)
	if _, ok := hashA["ended"]; !ok {
		t.Fatalf("run A has no ended marker: %v", hashA)
	}
	// Compression is on (the default): the run's one segment was
	// compressed as the daemon stopped.
	if _, ok := hashA["0001.lp.gz"]; !ok {
		t.Fatalf("run A's segment was not compressed at the stop: %v", keys(hashA))
	}
	if _, ok := hashA["0001.lp"]; ok {
		t.Fatalf("run A keeps its .lp beside the .lp.gz: %v", keys(hashA))
	}
	time.Sleep(1100 * time.Millisecond) // run ids have millisecond resolution; keep them apart in the listing

	// Run B is killed.
	b := startProc(t, "run", "-config", cfgPath)
	dirB := b.runDir(t)
	waitLines(t, dirB, 5000)
	before, err := os.ReadFile(filepath.Join(dirB, "0001.lp"))
	if err != nil {
		t.Fatal(err)
	}
	time.Sleep(3 * syncEvery) // at least two syncs after the snapshot
	killed := time.Now()
	if err := b.cmd.Process.Signal(syscall.SIGKILL); err != nil {
		t.Fatal(err)
	}
	b.cmd.Wait()
	lpB := filepath.Join(dirB, "0001.lp")
	after, err := os.ReadFile(lpB)
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.HasPrefix(after, before) {
		t.Fatal("lines written before the kill are gone or changed")
	}
	times := decodeAll(t, lpB)
	if len(times) < 5000 || after[len(after)-1] != '\n' {
		t.Fatalf("%d lines after the kill; last byte %q", len(times), after[len(after)-1])
	}
	// Nothing older than the last sync is missing: the newest sample is at
	// most a sync interval (plus the scheduling slack of a busy machine)
	// older than the kill.
	newest := time.Unix(0, times[0])
	for _, ns := range times {
		if x := time.Unix(0, ns); x.After(newest) {
			newest = x
		}
	}
	gap := killed.Sub(newest)
	t.Logf("%d lines survived the kill; the newest sample is %v older than the kill", len(times), gap)
	if gap > syncEvery+time.Second {
		t.Errorf("the newest recorded sample is %v older than the kill (sync every %v)", gap, syncEvery)
	}
	for _, f := range []string{"ended", "summary.json"} {
		if _, err := os.Stat(filepath.Join(dirB, f)); err == nil {
			t.Errorf("a killed run has %s", f)
		}
	}
	// SIGKILL cannot tear a line (every write ends at a newline), a power
	// cut can: tear the tail the way it would.
	torn := []byte("plenum,channel=engine_speed,run=x,source=bench_mcu,vehicle=brackenfell-rs value=31")
	f, err := os.OpenFile(lpB, os.O_APPEND|os.O_WRONLY, 0)
	if err != nil {
		t.Fatal(err)
	}
	f.Write(torn)
	f.Close()

	// Run C: the start-up cuts B's torn tail and marks it.
	c := startProc(t, "run", "-config", cfgPath)
	dirC := c.runDir(t)
	waitLines(t, dirC, 500)
	c.stop(t)
	// The start-up cut B's tail, marked it, and (a run that has ended)
	// compressed its segment: the .lp.gz holds the cut lines exactly.
	if _, err := os.Stat(lpB + ".gz"); err != nil {
		t.Errorf("the recovered run's segment was not compressed: %v", err)
	}
	fixed, err := record.ReadFile(lpB)
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(fixed, after) {
		t.Fatalf("the torn tail was not cut to the last whole line: %d bytes, want %d", len(fixed), len(after))
	}
	if _, err := os.Stat(filepath.Join(dirB, "ended_abnormally")); err != nil {
		t.Error("the killed run is not marked ended_abnormally")
	}
	if !strings.Contains(c.out.String(), "cut short") {
		t.Errorf("the restart did not report the recovery:\n%s", c.out.String())
	}
	hashA2 := hashTree(t, dirA)
	if len(hashA2) != len(hashA) {
		t.Fatalf("run A's files changed: %v, was %v", keys(hashA2), keys(hashA))
	}
	for name, h := range hashA {
		if hashA2[name] != h {
			t.Errorf("run A's %s changed", name)
		}
	}
	if _, err := os.Stat(filepath.Join(dirC, "ended")); err != nil {
		t.Error("run C did not end normally")
	}
	decodeAll(t, filepath.Join(dirC, "0001.lp"))
}

func keys(m map[string][32]byte) []string {
	var k []string
	for n := range m {
		k = append(k, n)
	}
	sort.Strings(k)
	return k
}
