package console

import (
	"bytes"
	"encoding/json"
	"net/http"
	"sort"
	"strconv"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/fleet"
	"github.com/plenum-engine/plenum/pipeline/mqttpub"
)

// Fleet is what the wall view needs of a follower of other vehicles
// (pipeline/fleet's Follower): every vehicle followed, and a channel closed
// at the next change.
type Fleet interface {
	Vehicles() []fleet.Vehicle
	Changes() <-chan struct{}
}

// FleetPath is the stream of the vehicles followed, for the wall view.
const FleetPath = "/console/fleet"

// fleetEvery is the most often the fleet stream sends: a change closer to
// the last one than this waits, and is sent with whatever else changed.
const fleetEvery = 250 * time.Millisecond

// tileJSON is one followed vehicle as the wall view shows it.
type tileJSON struct {
	Name     string          `json:"name"`
	State    string          `json:"state"`    // online, offline or "" (no status yet)
	Since    int64           `json:"since"`    // when that state began, Unix ms
	HeardMS  int64           `json:"heard_ms"` // last live message, Unix ms; 0 never
	Stale    bool            `json:"stale"`    // the fleet says so: nothing live for its stale_after
	Snapshot int64           `json:"snapshot"` // the snapshot's time, Unix ms
	Values   []tileValueJSON `json:"values"`
	Warnings []eventJSON     `json:"warnings"`
	Run      string          `json:"run"` // the run being recorded as its events tell, "" none
}

type tileValueJSON struct {
	Name string `json:"name"`
	X    string `json:"x"`
	U    string `json:"u"`
	Q    string `json:"q"`
}

type fleetJSON struct {
	T         int64      `json:"t"`
	Following bool       `json:"following"`
	Vehicles  []tileJSON `json:"vehicles"`
}

func parseTime(s string) int64 {
	t, err := time.Parse(time.RFC3339Nano, s)
	if err != nil {
		return 0
	}
	return t.UnixMilli()
}

func fromPayload(e mqttpub.EventPayload) eventJSON {
	j := eventJSON{Kind: e.Kind, Name: e.Name, Start: parseTime(e.Start), End: parseTime(e.End), Fields: e.Fields, Tags: e.Tags}
	if e.Tags != nil {
		j.Severity = e.Tags["severity"]
	}
	return j
}

// tiles formats the vehicles followed with f.
func tiles(vs []fleet.Vehicle, f Formatter) []tileJSON {
	out := make([]tileJSON, 0, len(vs))
	for _, v := range vs {
		t := tileJSON{Name: v.Name, State: v.State, Since: ms(v.Since), HeardMS: ms(v.Heard), Stale: v.Stale,
			Snapshot: ms(v.SnapshotTime), Values: []tileValueJSON{}, Warnings: []eventJSON{}}
		for name, x := range v.Snapshot {
			ch, ok := pipeline.Catalogued(name)
			if !ok {
				ch = pipeline.Channel{Name: name, Unit: pipeline.Unit(x.Unit)}
			}
			text, unit := f.Format(ch, x.V)
			t.Values = append(t.Values, tileValueJSON{Name: name, X: text, U: unit, Q: x.Quality})
		}
		sort.Slice(t.Values, func(i, j int) bool { return t.Values[i].Name < t.Values[j].Name })
		for _, w := range v.Warnings {
			t.Warnings = append(t.Warnings, fromPayload(w.Event))
		}
		for _, e := range v.Events {
			switch e.Kind {
			case "run_started":
				t.Run = e.Name
			case "run_ended":
				if t.Run == e.Name {
					t.Run = ""
				}
			}
		}
		out = append(out, t)
	}
	return out
}

// serveFleet streams the vehicles followed: all of them on connect and at
// each change (at most every fleetEvery), a heartbeat every
// Config.Heartbeat, formatted with the browser's units. Without a follower
// it says so once and sends heartbeats only.
func (s *Server) serveFleet(w http.ResponseWriter, r *http.Request) {
	f, ok := s.formatter(w, r)
	if !ok {
		return
	}
	rc := http.NewResponseController(w)
	hd := w.Header()
	hd.Set("Content-Type", "text/event-stream")
	hd.Set("Cache-Control", "no-store")
	hd.Set("X-Accel-Buffering", "no")
	w.WriteHeader(http.StatusOK)
	var seq uint64
	send := func(event string, v any) bool {
		seq++
		var b bytes.Buffer
		b.WriteString("id: ")
		b.WriteString(strconv.FormatUint(seq, 10))
		b.WriteString("\nevent: " + event + "\ndata: ")
		json.NewEncoder(&b).Encode(v)
		b.WriteString("\n")
		rc.SetWriteDeadline(time.Now().Add(s.cfg.WriteTimeout))
		if _, err := w.Write(b.Bytes()); err != nil {
			return false
		}
		return rc.Flush() == nil
	}
	if _, err := w.Write([]byte("retry: 1000\n\n")); err != nil {
		return
	}
	clk := s.cfg.Clock
	var changes <-chan struct{}
	snapshot := func() bool {
		m := fleetJSON{T: ms(clk.Now()), Following: s.cfg.Fleet != nil, Vehicles: []tileJSON{}}
		if s.cfg.Fleet != nil {
			changes = s.cfg.Fleet.Changes()
			m.Vehicles = tiles(s.cfg.Fleet.Vehicles(), f)
		}
		return send("vehicles", m)
	}
	if !snapshot() {
		return
	}
	last := clk.Now()
	beat := clk.After(s.cfg.Heartbeat)
	var hold <-chan time.Time // set while a change waits for fleetEvery
	for {
		select {
		case <-r.Context().Done():
			return
		case <-s.done:
			return
		case <-changes:
			changes = nil
			if d := fleetEvery - clk.Now().Sub(last); d > 0 {
				hold = clk.After(d)
				continue
			}
			if !snapshot() {
				return
			}
			last = clk.Now()
		case <-hold:
			hold = nil
			if !snapshot() {
				return
			}
			last = clk.Now()
		case <-beat:
			beat = clk.After(s.cfg.Heartbeat)
			if !send("heartbeat", struct {
				T int64 `json:"t"`
			}{ms(clk.Now())}) {
				return
			}
		}
	}
}
