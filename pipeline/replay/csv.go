package replay

import (
	"encoding/csv"
	"fmt"
	"io"
	"os"
	"sort"
	"strconv"
	"strings"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/display"
)

// The CSV exports are for spreadsheets.
//
// The wide table (Config.CSV): the header is "time" (RFC 3339, UTC), "seconds" (since the first
// row) and one column per channel, "name (unit)" (a channel recorded from
// two sources is "name/source (unit)"), in registration order: recorded
// channels, then derived ones. Each row is one frame time. A cell is empty
// where the channel has no sample at that time, or a sample whose quality
// is not ok (the line protocol keeps those). Values are in canonical units
// with every digit, or, with a display formatter, in its units rounded as
// a person reads them.
//
// The events table (Config.Events): "time", "kind", "name", "duration_seconds", then one column
// per numeric field any event carries (sorted by name), empty where an
// event lacks it; one row per event, in the order they happened.

// wideCSV writes the wide table, one row per sample time.
type wideCSV struct {
	w      *csv.Writer
	col    []int // column of each channel ID (after time and seconds)
	scale  []func(float64) string
	row    []string
	filled bool
	ns     int64 // the time of row
	first  int64
	begun  bool
}

func newWideCSV(w io.Writer, chans []pipeline.Channel, f *display.Formatter) *wideCSV {
	t := &wideCSV{w: csv.NewWriter(w), col: make([]int, len(chans)), scale: make([]func(float64) string, len(chans))}
	names := map[string]int{}
	for _, c := range chans {
		names[c.Name]++
	}
	header := []string{"time", "seconds"}
	for i, c := range chans {
		name := c.Name
		if names[c.Name] > 1 {
			name += "/" + c.Source
		}
		unit := ""
		if c.Unit != pipeline.None {
			unit = strings.ReplaceAll(string(c.Unit), "_", " ")
		}
		t.scale[i] = func(v float64) string { return strconv.FormatFloat(v, 'g', -1, 64) }
		if cat, ok := pipeline.Catalogued(c.Name); ok && f != nil {
			unit = f.ScaleOf(cat).Label()
			t.scale[i] = func(v float64) string { return f.Format(cat, v).Text() }
		}
		if unit != "" {
			name += " (" + unit + ")"
		}
		t.col[i] = len(header)
		header = append(header, name)
	}
	t.row = make([]string, len(header))
	t.w.Write(header)
	return t
}

// add puts s in its row, writing the previous row when s is of a new time.
func (t *wideCSV) add(s pipeline.Sample) {
	ns := s.Time.UnixNano()
	if t.filled && ns != t.ns {
		t.flush()
	}
	if !t.begun {
		t.first, t.begun = ns, true
	}
	t.ns, t.filled = ns, true
	if int(s.Channel) >= len(t.col) || !s.Quality.Usable() {
		return
	}
	t.row[t.col[s.Channel]] = t.scale[s.Channel](s.Value)
}

func (t *wideCSV) flush() {
	t.row[0] = time.Unix(0, t.ns).UTC().Format(time.RFC3339Nano)
	t.row[1] = strconv.FormatFloat(float64(t.ns-t.first)/1e9, 'f', -1, 64)
	t.w.Write(t.row)
	for i := range t.row {
		t.row[i] = ""
	}
	t.filled = false
}

// close writes the last row and flushes.
func (t *wideCSV) close() error {
	if t.filled {
		t.flush()
	}
	t.w.Flush()
	return t.w.Error()
}

// writeEventsFile writes evs to path as the events table.
func writeEventsFile(path string, evs []pipeline.Event) error {
	f, err := os.Create(path)
	if err != nil {
		return fmt.Errorf("replay: events: %w", err)
	}
	if err := writeEvents(f, evs); err != nil {
		f.Close()
		return fmt.Errorf("replay: events: %w", err)
	}
	if err := f.Close(); err != nil {
		return fmt.Errorf("replay: events: %w", err)
	}
	return nil
}

// writeEvents writes evs as the events table, in the order of their
// start (a detector emits a measurement after the time it measures from).
func writeEvents(w io.Writer, evs []pipeline.Event) error {
	sort.SliceStable(evs, func(i, j int) bool { return evs[i].Start.Before(evs[j].Start) })
	keys := map[string]bool{}
	for _, e := range evs {
		for k := range e.Fields {
			keys[k] = true
		}
	}
	fields := make([]string, 0, len(keys))
	for k := range keys {
		fields = append(fields, k)
	}
	sort.Strings(fields)
	cw := csv.NewWriter(w)
	cw.Write(append([]string{"time", "kind", "name", "duration_seconds"}, fields...))
	for _, e := range evs {
		dur := ""
		if !e.End.IsZero() {
			dur = strconv.FormatFloat(e.End.Sub(e.Start).Seconds(), 'f', -1, 64)
		}
		row := []string{e.Start.UTC().Format(time.RFC3339Nano), e.Kind, e.Name, dur}
		for _, k := range fields {
			v, ok := e.Fields[k]
			if ok {
				row = append(row, strconv.FormatFloat(v, 'g', -1, 64))
			} else {
				row = append(row, "")
			}
		}
		cw.Write(row)
	}
	cw.Flush()
	return cw.Error()
}
