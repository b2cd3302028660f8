package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"strings"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/drivers/can"
	"github.com/plenum-engine/plenum/drivers/obd"
	"github.com/plenum-engine/plenum/drivers/obdcan"
	"github.com/plenum-engine/plenum/drivers/sim"
)

// cmdProbe asks the bus which ECUs answer and what they support. It sends
// only read requests (services 01 and 09).
func cmdProbe(ctx context.Context, args []string, stdout io.Writer) error {
	fs := newFlagSet("probe", "[-bus can0 | -sim] [-29bit]", "Lists the ECUs that answer on a CAN bus, their VIN and supported PIDs, with\nread-only requests (services 01 and 09), and prints a configuration to start from.", stdout)
	busName := fs.String("bus", "can0", "SocketCAN interface")
	useSim := fs.Bool("sim", false, "probe a simulated ECU on a virtual bus instead")
	format29 := fs.Bool("29bit", false, "use 29-bit identifiers")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	format := obd.ID11
	if *format29 {
		format = obd.ID29
	}
	var bus can.Bus
	name := *busName
	if *useSim {
		eng := sim.NewShared(sim.NewEngine(sim.DefaultParams()))
		eng.Step(8 * time.Second) // an idling engine
		rig, err := sim.NewRig(ctx, sim.RigConfig{Bus: can.VirtualConfig{BitRate: 500000},
			ECU: sim.ECUConfig{Format: format, Source: eng.State, ResponseTime: 5 * time.Millisecond}})
		if err != nil {
			return err
		}
		defer rig.Close()
		bus = rig.Node()
		name = "simulated bus (500 kbit/s)"
	} else {
		b, err := can.DialSocketCAN(*busName)
		if err != nil {
			return fmt.Errorf("probe: %w", err)
		}
		defer b.Close()
		bus = b
	}
	tr, err := obdcan.New(bus, format)
	if err != nil {
		return err
	}
	defer tr.Close()
	fmt.Fprintf(stdout, "Probing %s with read-only OBD-II requests (services 01 and 09).\n\n", name)
	ecus, err := obd.Discover(ctx, tr, obd.DiscoverConfig{Format: format})
	if err != nil {
		return err
	}
	if len(ecus) == 0 {
		return errors.New("probe: no ECU answered the functional request (ignition on? bit rate? 29-bit?)")
	}
	fmt.Fprintf(stdout, "%-10s %-18s %-9s %-9s %s\n", "ECU", "VIN", "response", "multi-PID", "supported PIDs (service 01)")
	for _, e := range ecus {
		var ps []string
		for _, p := range e.DataPIDs() {
			ps = append(ps, fmt.Sprintf("%02X", uint8(p)))
		}
		fmt.Fprintf(stdout, "%-10s %-18s %-9s %-9v %s\n", e.Addr, orDash(e.VIN), e.MedianResponseTime().Round(100*time.Microsecond), e.MultiPID, strings.Join(ps, " "))
	}
	config.WriteCANStart(stdout, *busName, *useSim, *format29)
	for _, p := range ecus[0].DataPIDs() {
		obd.PIDChannels(p, func(ci obd.ChannelIndex) {
			c, _, _ := obd.StandardChannel(ci)
			rate := 1.0
			switch p {
			case 0x0C, 0x0B, 0x11, 0x10, 0x44:
				rate = 20
			}
			fmt.Fprintf(stdout, "      - {name: %s, rate_hz: %g}\n", c.Name, rate)
		})
	}
	return nil
}

func orDash(s string) string {
	if s == "" {
		return "-"
	}
	return s
}
