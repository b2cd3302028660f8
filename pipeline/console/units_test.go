package console

import (
	"encoding/json"
	"io"
	"net/http"
	"net/url"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
	"github.com/plenum-engine/plenum/pipeline/fleet"
	"github.com/plenum-engine/plenum/pipeline/mqttpub"
)

// TestUnitOverride: a stream asked for with ?units= shows that browser's
// units (bar, mechanical horsepower) while another browser's stream keeps
// the configured ones; the fleet stream takes the same parameter; a bad
// override is refused with a 400 naming the item.
func TestUnitOverride(t *testing.T) {
	r := newRig(t, Config{}, true)
	q := "?" + UnitsParam + "=" + url.QueryEscape("pressure=bar,power=hp_mech")
	def, over := r.connect(), r.connectTo("/console/stream"+q)
	def.wait(t, "snapshot", 1)
	var snap snapshotJSON
	json.Unmarshal(over.wait(t, "snapshot", 1)[0].Data, &snap)
	if u := snap.Channels[r.ids["boost_pressure"]].Unit; u != "bar" {
		t.Errorf("overridden snapshot: boost pressure in %q, want bar", u)
	}
	if u := snap.Channels[r.ids["brake_power"]].Unit; u != "hp" {
		t.Errorf("overridden snapshot: power in %q, want hp", u)
	}
	r.advance(time.Second)
	r.put("boost_pressure", 150e3, r.now())
	r.put("brake_power", 100e3, r.now())
	// 100 kW is 134 hp (mechanical horsepower, 745.699 871 582 270 22 W:
	// NIST SP 811 (2008), B.8); 150 kPa is 1.5 bar (SI brochure, table 8).
	want := map[string][2]string{"boost_pressure": {"150", "kPa"}, "brake_power": {"100", "kW"}}
	wantOver := map[string][2]string{"boost_pressure": {"1.50", "bar"}, "brake_power": {"134", "hp"}}
	for _, c := range []struct {
		name string
		cl   *sseClient
		want map[string][2]string
	}{{"configured", def, want}, {"override", over, wantOver}} {
		got := map[string][2]string{}
		waitFor(t, c.name+" values", func() bool {
			for _, m := range c.cl.all("values") {
				var v struct{ V []valueJSON }
				json.Unmarshal(m.Data, &v)
				for _, x := range v.V {
					for n, id := range r.ids {
						if int(id) == x.C {
							got[n] = [2]string{x.X, x.U}
						}
					}
				}
			}
			return len(got) >= 2
		})
		for n, w := range c.want {
			if got[n] != w {
				t.Errorf("%s: %s is %q, want %q", c.name, n, got[n], w)
			}
		}
	}
	if ids := [2]string{def.all("values")[0].ID, over.all("values")[0].ID}; ids[0] != ids[1] {
		t.Errorf("one flush, two ids: %v", ids)
	}

	hc := &http.Client{Timeout: 5 * time.Second} // a stream accepted by mistake would never end
	for _, bad := range []struct{ q, item string }{{"pressure=mmHg", "pressure"}, {"colour=red", "colour"}, {"pressure=bar,power", "power"}} {
		for _, path := range []string{"/console/stream", FleetPath} {
			resp, err := hc.Get(r.http.URL + path + "?units=" + url.QueryEscape(bad.q))
			if err != nil {
				t.Fatalf("%s?units=%s: %v", path, bad.q, err)
			}
			b, _ := io.ReadAll(resp.Body)
			resp.Body.Close()
			if resp.StatusCode != 400 || !strings.Contains(string(b), bad.item) {
				t.Errorf("%s?units=%s: %s %q, want 400 naming %q", path, bad.q, resp.Status, b, bad.item)
			}
		}
	}
}

// TestFleetStreamUnits: the fleet stream formats followed vehicles' values
// in the browser's units.
func TestFleetStreamUnits(t *testing.T) {
	ff := newFakeFleet()
	ff.set(fleet.Vehicle{Name: "car-a", State: "online", Snapshot: map[string]mqttpub.Value{"boost_pressure": {V: 150e3, Unit: "Pa", Quality: "ok"}}})
	r := newRig(t, Config{Fleet: ff}, false)
	m := nextVehicles(t, fleetClient(t, r.http.URL+FleetPath+"?units="+url.QueryEscape("pressure=bar")), "car-a", func(m fleetJSON) bool { return len(m.Vehicles) == 1 })
	if v := m.Vehicles[0].Values; len(v) != 1 || v[0].X != "1.50" || v[0].U != "bar" {
		t.Errorf("values %+v, want 1.50 bar", v)
	}
}

// TestBrowserUnitChoice: a person picks bar on the driver view; the page
// keeps the choice in localStorage, reconnects with it and shows bar, and
// the choice is still there after a reload.
func TestBrowserUnitChoice(t *testing.T) {
	r := newRig(t, Config{}, false)
	f := r.feed()
	defer f.halt()
	pg := newPage(t, 390, 844)
	pg.do(chromedp.Navigate(r.http.URL + "/console/driver"))
	unit := `document.querySelector('.fig[data-channel="boost_pressure"] .unit')?.textContent`
	pg.until("boost in kPa", unit+` === "kPa"`, 10*time.Second)
	pg.until("the units panel", `document.querySelector('#units select[name="pressure"]') !== null`, 5*time.Second)
	pg.do(chromedp.Click(`#units summary`))
	pg.do(chromedp.Evaluate[chromedp.Void](`{const s = document.querySelector('#units select[name="pressure"]'); s.value = "bar"; s.dispatchEvent(new Event("change"))}`))
	pg.until("boost in bar", unit+` === "bar" && document.querySelector('.fig[data-channel="boost_pressure"]').dataset.state === "live"`, 10*time.Second)
	if s := evalAs[string](pg, `localStorage.getItem("plenum.units")`); s != "pressure=bar" {
		t.Errorf("localStorage holds %q", s)
	}
	pg.noHorizontalScroll("units panel open")
	pg.shot("driver-units-bar-390x844")
	pg.do(chromedp.Reload())
	pg.until("boost in bar after a reload", unit+` === "bar"`, 10*time.Second)
	// A bad stored choice does not leave the page dead: it says so and
	// falls back to the configured units.
	pg.do(chromedp.Evaluate[chromedp.Void](`localStorage.setItem("plenum.units", "pressure=furlong")`))
	pg.do(chromedp.Reload())
	pg.until("back to kPa", unit+` === "kPa"`, 10*time.Second)
	if n := evalAs[string](pg, `document.querySelector('#units .unote')?.textContent || ""`); !strings.Contains(n, "pressure") {
		t.Errorf("note on the refused choice: %q", n)
	}
	for _, e := range pg.errors() {
		if !strings.Contains(e, "400") {
			t.Errorf("console error: %s", e)
		}
	}
}
