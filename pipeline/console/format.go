package console

import (
	"encoding/json"
	"net/http"

	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/display"
)

// People is the Formatter of the display-units layer: values in the units
// the configuration chose, rounded per quantity.
type People struct{ display.Formatter }

// Format gives v's number and unit symbol as a person reads them.
func (p People) Format(ch pipeline.Channel, v float64) (text, unit string) {
	x := p.Formatter.Format(ch, v)
	return x.Text(), x.Unit
}

// Override returns People in the units of the compact form units (a
// browser's override of the configured units, e.g. "pressure=bar,
// power=hp_mech"); a refused item is named in the error.
func (p People) Override(units string) (Formatter, error) {
	g, err := p.Formatter.Override(units)
	if err != nil {
		return nil, err
	}
	return People{g}, nil
}

// UnitsPath lists the unit choices a browser may make (GET): the items of
// the compact form and the values each accepts. With ?units= it checks an
// override as the streams would, refusing a bad one with a 400 naming the
// item.
const UnitsPath = "/console/units"

type unitItemJSON struct {
	Key     string   `json:"key"`
	Choices []string `json:"choices"`
}

func (s *Server) serveUnits(w http.ResponseWriter, r *http.Request) {
	if _, ok := s.formatter(w, r); !ok {
		return
	}
	_, over := s.cfg.Formatter.(Overrider)
	items := []unitItemJSON{}
	if over {
		for _, k := range display.Keys() {
			items = append(items, unitItemJSON{k, display.Choices(k)})
		}
	}
	w.Header().Set("Content-Type", "application/json")
	w.Header().Set("Cache-Control", "no-cache")
	json.NewEncoder(w).Encode(struct {
		Items []unitItemJSON `json:"items"`
		Units string         `json:"units"`
	}{items, r.URL.Query().Get(UnitsParam)})
}
