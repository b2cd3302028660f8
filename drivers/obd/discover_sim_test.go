package obd_test

import (
	"context"
	"slices"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/drivers/can"
	"github.com/plenum-engine/plenum/drivers/obd"
	"github.com/plenum-engine/plenum/drivers/obdcan"
	"github.com/plenum-engine/plenum/drivers/sim"
)

// TestDiscoverSimECUs discovers simulated ECUs over obdcan and ISO-TP on the
// virtual bus: every responder, its PIDs, its (multi-frame) VIN and its
// multi-PID support.
func TestDiscoverSimECUs(t *testing.T) {
	for _, tc := range []struct {
		name      string
		format    obd.Format
		addrs     []uint8
		singlePID bool
	}{
		{"11bit_two_ecus", obd.ID11, []uint8{0, 2}, false},
		{"29bit", obd.ID29, []uint8{0x10}, false},
		{"single_pid", obd.ID11, nil, true},
	} {
		t.Run(tc.name, func(t *testing.T) {
			eng := sim.NewShared(sim.NewEngine(sim.DefaultParams()))
			eng.Step(8 * time.Second)
			rig, err := sim.NewRig(context.Background(), sim.RigConfig{Bus: can.VirtualConfig{BitRate: 500_000},
				ECU: sim.ECUConfig{Format: tc.format, Addrs: tc.addrs, Source: eng.State, SinglePID: tc.singlePID, ResponseTime: time.Millisecond}})
			if err != nil {
				t.Fatal(err)
			}
			defer rig.Close()
			tr, err := obdcan.New(rig.Node(), tc.format)
			if err != nil {
				t.Fatal(err)
			}
			defer tr.Close()
			ecus, err := obd.Discover(context.Background(), tr, obd.DiscoverConfig{Format: tc.format})
			if err != nil {
				t.Fatal(err)
			}
			var got []obd.Addr
			for _, e := range ecus {
				got = append(got, e.Addr)
				if e.VIN != sim.DemoVIN {
					t.Errorf("%v: VIN %q, want %q", e.Addr, e.VIN, sim.DemoVIN)
				}
				if !slices.Equal(e.DataPIDs(), sim.EncodablePIDs()) {
					t.Errorf("%v: PIDs %X, want %X", e.Addr, e.DataPIDs(), sim.EncodablePIDs())
				}
				if e.MultiPID == tc.singlePID {
					t.Errorf("%v: multi-PID %v", e.Addr, e.MultiPID)
				}
				if e.MedianResponseTime() < time.Millisecond {
					t.Errorf("%v: median response time %v below the ECU's 1 ms", e.Addr, e.MedianResponseTime())
				}
			}
			slices.SortFunc(got, func(x, y obd.Addr) int { return int(x.ECU) - int(y.ECU) })
			if !slices.Equal(got, rig.ECU.Addrs()) {
				t.Errorf("responders %v, want %v", got, rig.ECU.Addrs())
			}
		})
	}
}
