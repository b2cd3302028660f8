package pipeline

import (
	"strings"
	"testing"
)

// Every catalogue entry is a valid channel with an origin, a quantity and a
// sentence for people, and no name is catalogued twice.
func TestCatalogueEntries(t *testing.T) {
	seen := map[string]bool{}
	for _, c := range Catalogue() {
		name := strings.TrimSuffix(c.Name, "_") // families end in _
		if err := (Channel{Name: name, Min: c.Min, Max: c.Max}).Validate(); err != nil {
			t.Error(err)
		}
		if seen[c.Name] {
			t.Errorf("%s catalogued twice", c.Name)
		}
		seen[c.Name] = true
		if c.Origin == 0 || c.Quantity == "" {
			t.Errorf("%s: origin %v, quantity %q", c.Name, c.Origin, c.Quantity)
		}
		if len(c.Description) < 10 || !strings.HasSuffix(c.Description, ".") {
			t.Errorf("%s: description %q is not a sentence", c.Name, c.Description)
		}
	}
}

func TestCatalogued(t *testing.T) {
	for _, tc := range []struct {
		name   string
		ok     bool
		unit   Unit
		sensor string
		origin Origin
	}{
		{"manifold_pressure", true, Pascal, "manifold", FromInput},
		{"boost_pressure", true, Pascal, "boost", FromDerived},
		{"ecu_engine_speed", true, RPM, "", FromOBD},
		{"turbo_thermal_state", true, Celsius, "turbo_thermal_model", FromDerived},
		{"warning_over_boost", true, None, "over_boost", FromDerived}, // a family member
		{"warning_", false, None, "", 0},                              // the family itself is no channel
		{"boost_presure", false, None, "", 0},
	} {
		c, ok := Catalogued(tc.name)
		if ok != tc.ok || ok && (c.Unit != tc.unit || c.Sensor != tc.sensor || c.Origin != tc.origin || c.Name != tc.name) {
			t.Errorf("Catalogued(%q) = %+v, %v", tc.name, c, ok)
		}
	}
	if _, ok := Standard("boost_pressure"); ok {
		t.Error("a derived channel passed as a standard input")
	}
}

func TestCheckCatalogued(t *testing.T) {
	reg := NewRegistry()
	ch, _ := Standard("intake_air_temp")
	reg.Register(ch)
	reg.Register(DerivedOutputs("lambda")[0])
	if bad := CheckCatalogued(reg); len(bad) != 0 {
		t.Errorf("catalogued channels refused: %v", bad)
	}
	reg.Register(Channel{Name: "intake_air_temperature", Quantity: "temperature", Unit: Celsius})
	reg.Register(Channel{Name: "oil_temp", Quantity: "temperature", Unit: Ratio})
	if bad := CheckCatalogued(reg); len(bad) != 2 || bad[0] != "intake_air_temperature" || bad[1] != "oil_temp" {
		t.Errorf("CheckCatalogued = %v, want the unknown and the mis-unit channel", bad)
	}
}

// The zero Registry and the zero Health are ready to use.
func TestZeroValuesUsable(t *testing.T) {
	var reg Registry
	if _, ok := reg.Lookup("x"); ok || reg.Len() != 0 {
		t.Fatal("an empty registry knows a channel")
	}
	id, err := reg.Register(Channel{Name: "x"})
	if err != nil || id != 0 || reg.Channel(id).Name != "x" {
		t.Fatalf("Register on the zero Registry: %v, %v", id, err)
	}
	var h Health
	h.Counter("frames").Add(2)
	h.SetUp(true)
	if r := h.Report(); !r.Up || len(r.Counters) != 1 || r.Counters[0].Value != 2 {
		t.Fatalf("zero Health report %+v", r)
	}
}

func TestHealthReportLookups(t *testing.T) {
	r := HealthReport{Counters: []NamedCount{{"frames", 7}}, Gauges: []NamedValue{{"backlog_bytes", 4096}}}
	if v, ok := r.Counter("frames"); !ok || v != 7 {
		t.Errorf("Counter(frames) = %d, %v", v, ok)
	}
	if _, ok := r.Counter("nope"); ok {
		t.Error("a counter the report lacks was found")
	}
	if v, ok := r.Gauge("backlog_bytes"); !ok || v != 4096 {
		t.Errorf("Gauge(backlog_bytes) = %g, %v", v, ok)
	}
	if _, ok := r.Gauge("frames"); ok {
		t.Error("a counter was found as a gauge")
	}
}
