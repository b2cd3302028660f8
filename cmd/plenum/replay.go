package main

import (
	"bufio"
	"encoding/csv"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"sort"
	"strconv"
	"time"

	"github.com/influxdata/line-protocol/v2/lineprotocol"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/drivers/obd"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/record"
)

// recorded is one input sample read back from a recording.
type recorded struct {
	channel, source string
	value           float64
	quality         pipeline.Quality
	t               time.Time
	seq             int
}

// cmdReplay feeds a recorded run through the derivations and detectors of a
// configuration (by default the one recorded with the run) and writes the
// result as line protocol, or as CSV with -csv.
func cmdReplay(args []string, stdout io.Writer) error {
	fs := flag.NewFlagSet("replay", flag.ContinueOnError)
	cfgPath := fs.String("config", "", "configuration to replay with (default: the run's own config.yaml)")
	in := fs.String("in", "", "a run directory, a run id under -dir, or a line-protocol file")
	dir := fs.String("dir", "", "the recording directory that holds run ids")
	out := fs.String("out", "", "output file (default: standard output)")
	asCSV := fs.Bool("csv", false, "write a CSV table (time, channel, value, quality) instead of line protocol")
	if err := fs.Parse(args); err != nil {
		return usageError{err.Error()}
	}
	if *in == "" {
		return usageError{"replay needs -in RUN"}
	}
	files, runDir, err := resolveRun(*in, *dir)
	if err != nil {
		return err
	}
	var cfg *config.Config
	switch {
	case *cfgPath != "":
		cfg, err = config.Load(*cfgPath)
	case runDir != "":
		cfg, err = config.Load(filepath.Join(runDir, "config.yaml"))
	default:
		return usageError{"replay of a bare file needs -config FILE"}
	}
	if err != nil {
		return err
	}
	samples, err := readRecorded(files)
	if err != nil {
		return err
	}
	w := stdout
	if *out != "" {
		f, err := os.Create(*out)
		if err != nil {
			return fmt.Errorf("replay: %w", err)
		}
		defer f.Close()
		w = f
	}
	bw := bufio.NewWriterSize(w, 1<<20)
	if err := replay(cfg, samples, bw, *asCSV); err != nil {
		return err
	}
	return bw.Flush()
}

func resolveRun(in, dir string) (files []string, runDir string, err error) {
	st, err := os.Stat(in)
	if err != nil && dir != "" {
		in = filepath.Join(dir, in)
		st, err = os.Stat(in)
	}
	if err != nil {
		return nil, "", fmt.Errorf("replay: -in %s: %w", in, err)
	}
	if !st.IsDir() {
		return []string{in}, "", nil
	}
	files, _ = filepath.Glob(filepath.Join(in, "*.lp"))
	sort.Strings(files)
	if len(files) == 0 {
		return nil, "", fmt.Errorf("replay: %s holds no .lp files", in)
	}
	return files, in, nil
}

// readRecorded reads the input samples (not derived ones, which the replay
// recomputes, nor events) from line-protocol files, in time order.
func readRecorded(files []string) ([]recorded, error) { return readSamples(files, false) }

// readSamples reads samples from line-protocol files in time order, with or
// without the derived ones.
func readSamples(files []string, derived bool) ([]recorded, error) {
	var out []recorded
	qual := map[string]pipeline.Quality{}
	for q := pipeline.OK; q <= pipeline.SensorFault; q++ {
		qual[q.String()] = q
	}
	for _, f := range files {
		b, err := os.ReadFile(f)
		if err != nil {
			return nil, fmt.Errorf("replay: %w", err)
		}
		dec := lineprotocol.NewDecoderWithBytes(b)
		line := 0
		for dec.Next() {
			line++
			m, err := dec.Measurement()
			if err != nil {
				return nil, fmt.Errorf("replay: %s: point %d: %w", f, line, err)
			}
			if string(m) != "plenum" {
				continue
			}
			r := recorded{seq: len(out)}
			for {
				k, v, err := dec.NextTag()
				if err != nil {
					return nil, fmt.Errorf("replay: %s: point %d: %w", f, line, err)
				}
				if k == nil {
					break
				}
				switch string(k) {
				case "channel":
					r.channel = string(v)
				case "source":
					r.source = string(v)
				}
			}
			for {
				k, v, err := dec.NextField()
				if err != nil {
					return nil, fmt.Errorf("replay: %s: point %d: %w", f, line, err)
				}
				if k == nil {
					break
				}
				switch string(k) {
				case "value":
					if v.Kind() == lineprotocol.Float {
						r.value = v.FloatV()
					}
				case "quality":
					if v.Kind() == lineprotocol.String {
						r.quality = qual[v.StringV()]
					}
				}
			}
			t, err := dec.Time(lineprotocol.Nanosecond, time.Time{})
			if err != nil {
				return nil, fmt.Errorf("replay: %s: point %d: %w", f, line, err)
			}
			r.t = t
			if (r.source == "derived" && !derived) || r.channel == "" {
				continue
			}
			out = append(out, r)
		}
		if err := dec.Err(); err != nil {
			return nil, fmt.Errorf("replay: %s: %w", f, err)
		}
	}
	sort.SliceStable(out, func(i, j int) bool { return out[i].t.Before(out[j].t) })
	return out, nil
}

// replay runs the samples through the configured derivations synchronously
// and writes every sample and event the pipeline fans out.
func replay(cfg *config.Config, in []recorded, w io.Writer, asCSV bool) error {
	reg := pipeline.NewRegistry()
	ids := map[[2]string]pipeline.ChannelID{}
	for _, r := range in {
		key := [2]string{r.channel, r.source}
		if _, ok := ids[key]; ok {
			continue
		}
		ch, ok := pipeline.Standard(r.channel)
		if !ok {
			if idx, _, found := obd.LookupChannel(r.channel); found {
				ch, _, _ = obd.StandardChannel(idx)
				ch.Sensor = r.channel
			} else {
				ch = pipeline.Channel{Name: r.channel, Quantity: r.channel}
			}
		}
		ch.Source = r.source
		id, err := reg.Register(ch)
		if err != nil {
			return fmt.Errorf("replay: %w", err)
		}
		ids[key] = id
	}
	cfg.StateDir = "" // a replay neither reads nor writes the live turbo state
	ds, _, err := buildAll(cfg, reg)
	if err != nil {
		return err
	}
	g, err := pipeline.BuildGraph(reg, ds)
	if err != nil {
		return fmt.Errorf("replay: %w", err)
	}
	p := pipeline.New(reg, g, pipeline.Options{})
	p.BindEmitters()
	sub := p.Subscribe("replay", 1<<12)
	enc := record.NewEncoder("replay", cfg.Vehicle, reg)
	var cw *csv.Writer
	if asCSV {
		cw = csv.NewWriter(w)
		cw.Write([]string{"time", "channel", "source", "value", "quality"})
	}
	chans := func() []pipeline.Channel { return reg.Channels() }()
	var buf []pipeline.Sample
	var evs []pipeline.Event
	for _, r := range in {
		p.Process(pipeline.Sample{Channel: ids[[2]string{r.channel, r.source}], Value: r.value, Quality: r.quality, Time: r.t})
		buf, evs = sub.Drain(buf[:0], evs[:0])
		for _, s := range buf {
			if cw != nil {
				c := chans[s.Channel]
				cw.Write([]string{s.Time.UTC().Format(time.RFC3339Nano), c.Name, c.Source, strconv.FormatFloat(s.Value, 'g', -1, 64), s.Quality.String()})
				continue
			}
			enc.Write(s)
		}
		for _, e := range evs {
			if cw == nil {
				enc.WriteEvent(e)
			}
		}
		if cw == nil {
			if _, err := w.Write(enc.TakeBytes()); err != nil {
				return fmt.Errorf("replay: write: %w", err)
			}
		}
	}
	if sub.Dropped() > 0 {
		return errors.New("replay: samples were dropped; this is a bug")
	}
	if cw != nil {
		cw.Flush()
		return cw.Error()
	}
	return nil
}
