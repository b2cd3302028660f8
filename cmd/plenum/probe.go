package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"sort"
	"strings"
	"time"

	"github.com/plenum-engine/plenum/drivers/can"
	"github.com/plenum-engine/plenum/drivers/obd"
	"github.com/plenum-engine/plenum/drivers/obdcan"
	"github.com/plenum-engine/plenum/drivers/sim"
)

// probedECU is what probe learned of one responder.
type probedECU struct {
	addr     obd.Addr
	vin      string
	pids     obd.PIDSet
	times    []time.Duration
	multiPID bool
}

// cmdProbe asks the bus which ECUs answer and what they support. It sends
// only read requests (services 01 and 09).
func cmdProbe(ctx context.Context, args []string, stdout io.Writer) error {
	fs := flag.NewFlagSet("probe", flag.ContinueOnError)
	busName := fs.String("bus", "can0", "SocketCAN interface")
	useSim := fs.Bool("sim", false, "probe a simulated ECU on a virtual bus instead")
	format29 := fs.Bool("29bit", false, "use 29-bit identifiers")
	if err := fs.Parse(args); err != nil {
		return usageError{err.Error()}
	}
	format := obd.ID11
	if *format29 {
		format = obd.ID29
	}
	var bus can.Bus
	name := *busName
	if *useSim {
		vb, err := can.NewVirtualBus(can.VirtualConfig{BitRate: 500000})
		if err != nil {
			return err
		}
		defer vb.Close()
		eng := sim.NewShared(sim.NewEngine(sim.DefaultParams()))
		eng.Step(8 * time.Second) // an idling engine
		ecu, err := sim.NewECU(vb.NewNode(), sim.ECUConfig{Format: format, Source: eng.State, ResponseTime: 5 * time.Millisecond})
		if err != nil {
			return err
		}
		defer ecu.Close()
		bus = vb.NewNode()
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
	ecus, err := probe(ctx, tr, format)
	if err != nil {
		return err
	}
	if len(ecus) == 0 {
		return errors.New("probe: no ECU answered the functional request (ignition on? bit rate? 29-bit?)")
	}
	fmt.Fprintf(stdout, "%-10s %-18s %-9s %-9s %s\n", "ECU", "VIN", "response", "multi-PID", "supported PIDs (service 01)")
	for _, e := range ecus {
		var ps []string
		for p := 1; p < 256; p++ {
			if e.pids.Has(obd.PID(p)) && !obd.IsBitmapPID(obd.PID(p)) {
				ps = append(ps, fmt.Sprintf("%02X", p))
			}
		}
		fmt.Fprintf(stdout, "%-10s %-18s %-9s %-9v %s\n", e.addr, orDash(e.vin), median(e.times).Round(100*time.Microsecond), e.multiPID, strings.Join(ps, " "))
	}
	fmt.Fprintf(stdout, "\n# A configuration snippet to start from:\ncan:\n  - name: ecu\n    bus: %s\n    format: %s\n    channels:\n", map[bool]string{true: "sim", false: *busName}[*useSim], map[bool]string{true: "29bit", false: "11bit"}[*format29])
	e := ecus[0]
	for p := 1; p < 256; p++ {
		if !e.pids.Has(obd.PID(p)) || obd.IsBitmapPID(obd.PID(p)) {
			continue
		}
		obd.PIDChannels(obd.PID(p), func(ci obd.ChannelIndex) {
			c, _, _ := obd.StandardChannel(ci)
			rate := 1.0
			switch obd.PID(p) {
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

func median(d []time.Duration) time.Duration {
	if len(d) == 0 {
		return 0
	}
	s := append([]time.Duration(nil), d...)
	sort.Slice(s, func(i, j int) bool { return s[i] < s[j] })
	return s[len(s)/2]
}

// exchange sends req to an address and waits for the first answer from want
// (any ECU when want is functional), skipping response-pending answers.
func exchange(ctx context.Context, tr *obdcan.Transport, to obd.Addr, req obd.Request, window time.Duration) ([]obd.Message, time.Duration, error) {
	start := time.Now()
	if err := tr.Send(ctx, to, req); err != nil {
		return nil, 0, err
	}
	ctx, cancel := context.WithTimeout(ctx, window)
	defer cancel()
	var out []obd.Message
	var first time.Duration
	for {
		m, err := tr.Receive(ctx)
		if err != nil {
			if ctx.Err() != nil {
				return out, first, nil
			}
			return out, first, err
		}
		r, err := obd.ParseResponse(m.Payload)
		if err == nil && r.Negative && r.NRC == 0x78 {
			continue
		}
		if first == 0 {
			first = time.Since(start)
		}
		out = append(out, m)
		if !to.Functional {
			return out, first, nil
		}
	}
}

func probe(ctx context.Context, tr *obdcan.Transport, format obd.Format) ([]*probedECU, error) {
	req, _ := obd.CurrentData(0x00)
	msgs, _, err := exchange(ctx, tr, obd.FunctionalAddr(format), req, 300*time.Millisecond)
	if err != nil {
		return nil, err
	}
	var ecus []*probedECU
	for _, m := range msgs {
		e := &probedECU{addr: m.From}
		ecus = append(ecus, e)
		for base := 0; base < 256; base += 0x20 {
			r, _ := obd.CurrentData(obd.PID(base))
			ms, rt, err := exchange(ctx, tr, e.addr, r, 500*time.Millisecond)
			if err != nil || len(ms) == 0 {
				break
			}
			e.times = append(e.times, rt)
			resp, err := obd.ParseResponse(ms[0].Payload)
			if err != nil || resp.Negative || len(resp.Data) < 5 {
				break
			}
			next, err := e.pids.AddBitmap(obd.PID(base), resp.Data[1:5])
			if err != nil || !next {
				break
			}
		}
		if ms, _, err := exchange(ctx, tr, e.addr, obd.VehicleInfo(0x02), 500*time.Millisecond); err == nil && len(ms) > 0 {
			if resp, err := obd.ParseResponse(ms[0].Payload); err == nil && !resp.Negative {
				e.vin, _ = obd.DecodeVIN(resp.Data)
			}
		}
		// Multi-PID: ask for two supported PIDs at once.
		var two []obd.PID
		for p := 1; p < 256 && len(two) < 2; p++ {
			if e.pids.Has(obd.PID(p)) && !obd.IsBitmapPID(obd.PID(p)) {
				two = append(two, obd.PID(p))
			}
		}
		if len(two) == 2 {
			r, _ := obd.CurrentData(two...)
			if ms, rt, err := exchange(ctx, tr, e.addr, r, 500*time.Millisecond); err == nil && len(ms) > 0 {
				e.times = append(e.times, rt)
				if resp, err := obd.ParseResponse(ms[0].Payload); err == nil && !resp.Negative {
					n := 0
					obd.WalkCurrentData(resp.Data, func(obd.PID, []byte) { n++ })
					e.multiPID = n == 2
				}
			}
		}
	}
	return ecus, nil
}
