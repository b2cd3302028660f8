//go:build kernelcan

package obdcan_test

import (
	"bytes"
	"context"
	"github.com/plenum-engine/plenum/drivers/can/cantest"
	"os/exec"
	"strings"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/drivers/can"
	"github.com/plenum-engine/plenum/drivers/obd"
	"github.com/plenum-engine/plenum/drivers/obdcan"
	"github.com/plenum-engine/plenum/drivers/sim"
)

// TestKernelPollerReadsSimECU serves the simulated ECU on one SocketCAN
// socket of vcan0 and polls it with obd.Poller over obdcan on another: the
// frames go through the Linux CAN stack, and candump (when present) sees the
// ISO 15765-4 exchange, flow control on 0x7E0 included.
func TestKernelPollerReadsSimECU(t *testing.T) {
	ecuSock, err := can.DialSocketCAN("vcan0")
	cantest.NeedKernel(t, err)
	defer ecuSock.Close()
	tester, err := can.DialSocketCAN("vcan0")
	cantest.NeedKernel(t, err)
	defer tester.Close()

	var dump *exec.Cmd
	var dumped bytes.Buffer
	if _, err := exec.LookPath("candump"); err == nil {
		dump = exec.Command("candump", "-L", "vcan0")
		dump.Stdout = &dumped
		if err := dump.Start(); err != nil {
			t.Fatal(err)
		}
		time.Sleep(200 * time.Millisecond)
	}

	st := pullState(t)
	ecu, err := sim.NewECU(ecuSock, sim.ECUConfig{Source: func() sim.State { return st }, ResponseTime: 2 * time.Millisecond})
	if err != nil {
		t.Fatal(err)
	}
	defer ecu.Close()
	tr, err := obdcan.New(tester, obd.ID11)
	if err != nil {
		t.Fatal(err)
	}
	defer tr.Close()

	var r readings
	p, stop := runPoller(t, obd.Config{Transport: tr, Format: obd.ID11, Channels: channels(20 * time.Millisecond), Emit: r.emit})
	waitAll(t, &r, ecu.Addrs(), 3)
	stop()
	checkValues(t, &r, ecu.Addrs(), st)
	s := p.Stats()
	if len(s.ECUs) != 1 || s.ECUs[0].MultiPID != obd.MultiYes || s.Timeouts != 0 || s.ECUs[0].Malformed != 0 {
		t.Fatalf("poller stats %+v", s)
	}
	t.Logf("poller over vcan0: %d requests, %d responses, response time %v", s.Requests, s.Responses, s.ECUs[0].ResponseTime)

	// VIN over the kernel bus: the Poller is stopped, so the transport is free.
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Second)
	defer cancel()
	if err := tr.Send(ctx, obd.FunctionalAddr(obd.ID11), obd.VehicleInfo(0x02)); err != nil {
		t.Fatal(err)
	}
	for {
		m, err := tr.Receive(ctx)
		if err != nil {
			t.Fatal(err)
		}
		resp, err := obd.ParseResponse(m.Payload)
		if err != nil || resp.Service != 0x09 { // a late service 01 answer may come first
			continue
		}
		if vin, err := obd.DecodeVIN(resp.Data); err != nil || vin != sim.DemoVIN {
			t.Fatalf("VIN %q %v", vin, err)
		}
		break
	}

	if dump != nil {
		time.Sleep(100 * time.Millisecond)
		_ = dump.Process.Kill()
		_ = dump.Wait()
		out := dumped.String()
		for _, want := range []string{"7DF#020100", "7E8#064100", "7E0#300000", "7E8#10", "7E8#21", "7DF#020902"} {
			if !strings.Contains(out, want) {
				t.Errorf("candump shows no %s frame", want)
			}
		}
		t.Logf("candump saw %d frames", strings.Count(out, "\n"))
	} else {
		t.Log("candump not installed: frame check skipped (kernel-can-run --with-can-utils)")
	}
}
