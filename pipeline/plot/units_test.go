package plot

import "testing"

// Plot axes name each channel's canonical unit: standard channels from
// their definition, derived ones from the table.
func TestUnitLabel(t *testing.T) {
	cases := []struct{ channel, want string }{
		{"engine_speed", "rpm"},
		{"manifold_pressure", "pascals"},
		{"dyno_torque", "newton meters"},
		{"gear", ""},
		{"corrected_power", "watts"},
		{"air_mass_flow", "grams per second"},
		{"turbo_thermal_state", "celsius"},
		{"lambda", "ratio"},
		{"no_such_channel", ""},
	}
	for _, c := range cases {
		if got := CatalogueUnit(c.channel); got != c.want {
			t.Errorf("CatalogueUnit(%q) = %q, want %q", c.channel, got, c.want)
		}
	}
}
