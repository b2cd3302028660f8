package derived

import (
	"fmt"
	"math"
	"net/http"
	"slices"
	"sync"
	"time"

	"github.com/plenum-engine/plenum/derive"
	"github.com/plenum-engine/plenum/pipeline"
)

// The air flow family: speed-density air mass flow from a VE or a VE table,
// and the VE measured from the ECU's mass air flow.

// airflow computes speed-density air mass flow from MAP, IAT and engine speed.
type airflow struct {
	displacement float64 // m³
	ve           float64
	table        *derive.VETable
}

// Name names the derivation.
func (d *airflow) Name() string { return "speed_density" }

// Inputs are MAP, IAT and engine speed.
func (d *airflow) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "manifold_pressure"}, {Name: "intake_air_temp"}, {Name: "engine_speed"}}
}

// Outputs are air mass flow and the VE used.
func (d *airflow) Outputs() []pipeline.Channel {
	return pipeline.DerivedOutputs("air_mass_flow", "volumetric_efficiency")
}

// Derive computes air mass flow in g/s, the Prometheus base unit.
func (d *airflow) Derive(_ time.Time, in, out []float64) uint64 {
	ve := d.ve
	if d.table != nil {
		ve = d.table.At(in[2], in[0])
	}
	out[0] = derive.SpeedDensity(in[0], in[1], in[2], d.displacement, ve) * 1000 // g/s, the Prometheus base unit
	out[1] = ve
	return 0b11
}

// veEstimate is the live VE estimate from a measured MAF (the ECU's PID
// 0x10), accumulated per cell for export as CSV at /ve-table.csv.
type veEstimate struct {
	displacement float64    // m³
	mu           sync.Mutex // guards acc: the HTTP handler reads it
	acc          *derive.VEAccumulator
}

// newVEEstimate accumulates over the cells of table (copied), or over
// default cells without a table.
func newVEEstimate(displacement float64, table *derive.VETable) (*veEstimate, error) {
	speeds := []float64{1000, 1500, 2000, 2500, 3000, 3500, 4000, 4500, 5000, 5500, 6000, 6500, 7000}                  // rpm
	pressures := []float64{20000, 40000, 60000, 80000, 100000, 120000, 140000, 160000, 180000, 200000, 220000, 240000} // Pa
	if table != nil {
		speeds, pressures = slices.Clone(table.Speeds), slices.Clone(table.Pressures)
	}
	acc, err := derive.NewVEAccumulator(speeds, pressures)
	if err != nil {
		return nil, fmt.Errorf("ve table: %w", err)
	}
	return &veEstimate{displacement: displacement, acc: acc}, nil
}

// Name names the derivation.
func (d *veEstimate) Name() string { return "ve_estimate" }

// Inputs are the ECU's MAF, MAP, IAT and engine speed.
func (d *veEstimate) Inputs() []pipeline.Input {
	return []pipeline.Input{{Name: "ecu_mass_air_flow"}, {Name: "manifold_pressure"}, {Name: "intake_air_temp"}, {Name: "engine_speed"}}
}

// Outputs is the measured VE.
func (d *veEstimate) Outputs() []pipeline.Channel {
	return pipeline.DerivedOutputs("volumetric_efficiency_measured")
}

// Derive computes the measured VE above 500 rpm and adds it to its cell.
func (d *veEstimate) Derive(_ time.Time, in, out []float64) uint64 {
	ve := derive.MeasuredVE(in[0]/1000, in[1], in[2], in[3], d.displacement)
	if math.IsNaN(ve) || in[3] < 500 {
		return 0
	}
	d.mu.Lock()
	d.acc.Add(in[3], in[1], ve)
	d.mu.Unlock()
	out[0] = ve
	return 1
}

// ServeHTTP writes the accumulated table as CSV.
func (d *veEstimate) ServeHTTP(w http.ResponseWriter, _ *http.Request) {
	w.Header().Set("Content-Type", "text/csv")
	d.mu.Lock()
	defer d.mu.Unlock()
	d.acc.WriteCSV(w)
}
