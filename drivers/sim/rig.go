package sim

import (
	"context"
	"errors"
	"fmt"
	"sync"

	"github.com/plenum-engine/plenum/drivers/can"
)

// RigConfig configures a Rig: the virtual bus and the simulated ECU on it.
type RigConfig struct {
	// Bus configures the virtual bus (its zero value: no wire-time model).
	Bus can.VirtualConfig
	// ECU configures the simulated ECU; ECU.Source is required. When
	// ECU.Clock is nil it takes Bus.Clock, so one injected clock times both.
	ECU ECUConfig
}

// Rig is a virtual CAN bus with a simulated ECU answering on its own node:
// what a tester (a Poller, a probe) needs in place of a car. Give each tester
// its own node from Node.
type Rig struct {
	// Bus is the virtual bus, for its statistics and fault injection.
	Bus *can.VirtualBus
	// ECU is the running simulated ECU.
	ECU *ECU

	once  sync.Once
	err   error
	unreg func() bool
}

// NewRig starts the bus and the ECU. The rig runs until Close or until ctx
// is done, whichever comes first.
func NewRig(ctx context.Context, cfg RigConfig) (*Rig, error) {
	if cfg.ECU.Clock == nil {
		cfg.ECU.Clock = cfg.Bus.Clock
	}
	b, err := can.NewVirtualBus(cfg.Bus)
	if err != nil {
		return nil, fmt.Errorf("sim: rig: %w", err)
	}
	ecu, err := NewECU(b.NewNode(), cfg.ECU)
	if err != nil {
		b.Close()
		return nil, fmt.Errorf("sim: rig: %w", err)
	}
	r := &Rig{Bus: b, ECU: ecu}
	r.unreg = context.AfterFunc(ctx, func() { r.close() })
	return r, nil
}

// Node returns a new node on the rig's bus, for one tester.
func (r *Rig) Node() can.Bus { return r.Bus.NewNode() }

// Close stops the ECU and closes the bus. It is safe to call more than once.
func (r *Rig) Close() error {
	r.unreg()
	return r.close()
}

func (r *Rig) close() error {
	r.once.Do(func() { r.err = errors.Join(r.ECU.Close(), r.Bus.Close()) })
	return r.err
}
