// Package replay feeds a recorded run through an offline pipeline (the
// derivations and detectors of a configuration, built by the caller) and
// writes what the pipeline fans out: every sample and event as line
// protocol, or a CSV table, and the replayed run's summary.
//
// The pipeline is the same code the daemon runs; replay only stands in for
// the ingest loop, feeding the samples of one recorded time as one frame.
package replay

import (
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strings"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/display"
	"github.com/plenum-engine/plenum/pipeline/record"
)

// Config configures a replay.
type Config struct {
	// Pipeline builds the derivations and detectors to replay through, over
	// reg, which already holds the recorded channels. It is called once per
	// replay. The pipeline is fed with ProcessFrame, never run; it must not
	// read or write live state. Required.
	Pipeline func(reg *pipeline.Registry) (*pipeline.Pipeline, error)
	// Channel describes a recorded channel by name (quantity, unit, range,
	// sensor); the recorded source is set on it. A name it does not know
	// (false) is registered bare, its name as its quantity. Nil:
	// CataloguedChannel.
	Channel func(name string) (pipeline.Channel, bool)
	// Vehicle is the vehicle tag of the output lines and of the summary.
	Vehicle string
	// Run is the run tag of the output lines and the summary's run id
	// (RunID derives one from the recorded run). Empty: "replay".
	Run string
	// Of is the id of the recorded run, and ConfigUsed the configuration
	// replayed with (its path, or "the run's own"), both stated in the
	// summary; empty: not stated.
	Of, ConfigUsed string
	// CSV writes a wide table instead of line protocol: one row per
	// frame time, one column per channel with its unit in the header (see
	// csv.go).
	CSV bool
	// Display, when set, writes the CSV's values in its units, rounded as
	// a person reads them; nil: canonical units, every digit.
	Display *display.Formatter
	// Events, when set, is a file the events are written to as CSV (see
	// csv.go).
	Events string
	// Out is the output file. Empty: the writer given to Run.
	Out string
	// Summary, when set, is a file the replayed run's summary (JSON) is
	// written to.
	Summary string
}

// Input is a recorded run to replay or plot: its data files in recorded
// order, and its directory.
type Input struct {
	Files  []string
	RunDir string // the run's directory; empty for a bare line-protocol file
}

// RunID derives the run id of in's replay from the recorded run's
// (OriginalID): "<id>-replay". Two replays of different runs pushed to one
// database keep apart.
func RunID(in Input) string { return OriginalID(in) + "-replay" }

// OriginalID is the id of the recorded run in: the id in its run.json, else
// its directory's name, or for a bare file its name without .lp or .lp.gz.
func OriginalID(in Input) string {
	if in.RunDir != "" {
		var m record.Meta
		if b, err := os.ReadFile(filepath.Join(in.RunDir, "run.json")); err == nil && json.Unmarshal(b, &m) == nil && m.ID != "" {
			return m.ID
		}
	}
	name := in.RunDir
	if name == "" && len(in.Files) > 0 {
		name = in.Files[0]
	}
	return strings.TrimSuffix(strings.TrimSuffix(filepath.Base(filepath.Clean(name)), ".gz"), ".lp")
}

// Resolve finds the input named in: a run directory, a run id under dir, or
// a line-protocol file. A run directory yields its .lp and .lp.gz files in
// recorded order. Errors name in as the command line's -in.
func Resolve(in, dir string) (Input, error) {
	st, err := os.Stat(in)
	if err != nil && dir != "" {
		in = filepath.Join(dir, in)
		st, err = os.Stat(in)
	}
	if err != nil {
		return Input{}, fmt.Errorf("replay: -in %s: %w", in, err)
	}
	if !st.IsDir() {
		return Input{Files: []string{in}}, nil
	}
	files, err := record.DataFiles(in) // 0001.lp.gz, 0002.lp: one per segment, in recorded order
	if err != nil {
		return Input{}, fmt.Errorf("replay: -in %s: %w", in, err)
	}
	if len(files) == 0 {
		return Input{}, fmt.Errorf("replay: %s holds no .lp or .lp.gz files", in)
	}
	return Input{Files: files, RunDir: in}, nil
}

// ReadInputs reads the input's recorded input samples (not the derived ones,
// which a replay recomputes, nor events), in time order.
func (in Input) ReadInputs() (record.Recording, error) {
	rec, err := record.ReadInputs(in.Files)
	if err != nil {
		return record.Recording{}, fmt.Errorf("replay: %w", err)
	}
	return rec, nil
}

// ReadAll reads every recorded sample of the input, derived ones included,
// in time order.
func (in Input) ReadAll() (record.Recording, error) {
	rec, err := record.ReadAll(in.Files)
	if err != nil {
		return record.Recording{}, fmt.Errorf("replay: %w", err)
	}
	return rec, nil
}

// Run replays rec: it writes every sample and event the pipeline fans out
// to cfg.Out (or to w when Out is empty), writes the summary file when
// cfg.Summary is set, and returns the replayed run's summary. The output is
// written from a goroutine of its own while the next block is computed.
func Run(cfg Config, rec record.Recording, w io.Writer) (record.Summary, error) {
	var f *os.File
	if cfg.Out != "" {
		var err error
		if f, err = os.Create(cfg.Out); err != nil {
			return record.Summary{}, fmt.Errorf("replay: %w", err)
		}
		defer f.Close() // a second Close after the checked one below is harmless
		w = f
	}
	bw := newAsyncWriter(w, 1<<20)
	sum, events, err := replay(cfg, rec, bw)
	if cerr := bw.Close(); err == nil && cerr != nil {
		err = fmt.Errorf("replay: write: %w", cerr)
	}
	if err != nil {
		return record.Summary{}, err
	}
	if f != nil {
		if err := f.Close(); err != nil {
			return record.Summary{}, fmt.Errorf("replay: %w", err)
		}
	}
	if cfg.Events != "" {
		if err := writeEventsFile(cfg.Events, events); err != nil {
			return record.Summary{}, err
		}
	}
	if cfg.Summary != "" {
		if err := os.WriteFile(cfg.Summary, sum.JSON(), 0o644); err != nil {
			return record.Summary{}, fmt.Errorf("replay: summary: %w", err)
		}
	}
	return sum, nil
}

// CataloguedChannel describes a recorded channel from the channel
// catalogue; an OBD channel's sensor label is its name, as the OBD source
// registers it.
func CataloguedChannel(name string) (pipeline.Channel, bool) {
	ch, ok := pipeline.Catalogued(name)
	if ok && ch.Origin == pipeline.FromOBD {
		ch.Sensor = name
	}
	return ch, ok
}

// register registers the recorded series in a new registry and returns it
// with the channel ID of each recording key.
func register(cfg Config, rec record.Recording) (*pipeline.Registry, []pipeline.ChannelID, error) {
	lookup := cfg.Channel
	if lookup == nil {
		lookup = CataloguedChannel
	}
	reg := pipeline.NewRegistry()
	ids := make([]pipeline.ChannelID, len(rec.Keys))
	for i, k := range rec.Keys {
		ch, ok := lookup(k.Channel)
		if !ok {
			ch = pipeline.Channel{Name: k.Channel, Quantity: k.Channel}
		}
		ch.Source = k.Source
		id, err := reg.Register(ch)
		if err != nil {
			return nil, nil, fmt.Errorf("replay: %w", err)
		}
		ids[i] = id
	}
	return reg, ids, nil
}

// replay runs the samples through the pipeline synchronously, writes every
// sample and event the pipeline fans out, and returns the summary of the
// replayed run and its events.
func replay(cfg Config, rec record.Recording, w io.Writer) (record.Summary, []pipeline.Event, error) {
	if cfg.Pipeline == nil {
		return record.Summary{}, nil, errors.New("replay: no pipeline to replay through")
	}
	reg, ids, err := register(cfg, rec)
	if err != nil {
		return record.Summary{}, nil, err
	}
	in := rec.Points
	p, err := cfg.Pipeline(reg)
	if err != nil {
		return record.Summary{}, nil, err
	}
	sub := p.Subscribe("replay", 1<<12)
	run := cfg.Run
	if run == "" {
		run = "replay"
	}
	enc := record.NewEncoder(run, cfg.Vehicle, reg)
	var table *wideCSV
	if cfg.CSV {
		table = newWideCSV(w, reg.Channels(), cfg.Display)
	}
	var buf []pipeline.Sample
	var evs, all []pipeline.Event
	// Samples of one time (one serial line, one OBD answer) are one frame,
	// as the live ingest loop takes them.
	var frame []pipeline.Sample
	for i := 0; i < len(in); {
		frame = frame[:0]
		t := time.Unix(0, in[i].NS)
		for j := i; j < len(in) && in[j].NS == in[i].NS; j++ {
			r := in[j]
			frame = append(frame, pipeline.Sample{Channel: ids[r.Key], Value: r.Value, Quality: r.Quality, Time: t})
		}
		i += len(frame)
		p.ProcessFrame(frame)
		buf, evs = sub.Drain(buf[:0], evs[:0])
		for _, s := range buf {
			enc.Write(s) // the summary sees every sample, in CSV mode too
			if table != nil {
				table.add(s)
			}
		}
		for _, e := range evs {
			enc.WriteEvent(e)
		}
		if cfg.Events != "" {
			all = append(all, evs...)
		}
		b := enc.TakeBytes()
		if table == nil {
			if _, err := w.Write(b); err != nil {
				return record.Summary{}, nil, fmt.Errorf("replay: write: %w", err)
			}
		}
	}
	if sub.Dropped() > 0 {
		return record.Summary{}, nil, errors.New("replay: samples were dropped; this is a bug")
	}
	if table != nil {
		if err := table.close(); err != nil {
			return record.Summary{}, nil, fmt.Errorf("replay: write: %w", err)
		}
	}
	sum := enc.Summary()
	sum.ReplayOf, sum.ReplayConfig = cfg.Of, cfg.ConfigUsed
	return sum, all, nil
}
