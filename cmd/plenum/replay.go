package main

import (
	"bytes"
	"cmp"
	"compress/gzip"
	"encoding/csv"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"runtime"
	"slices"
	"sort"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/influxdata/line-protocol/v2/lineprotocol"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/drivers/obd"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/record"
)

// recorded is one sample read back from a recording. It holds no pointers
// (the names are in recording.keys), so a run of millions of samples costs
// the garbage collector nothing to scan.
type recorded struct {
	key     uint32 // index into recording.keys
	quality pipeline.Quality
	value   float64
	ns      int64 // sample time, Unix nanoseconds
}

// recording is what readSamples returns: samples in time order and the
// channel and source of each key.
type recording struct {
	keys    []seriesKey
	samples []recorded
}

// seriesKey names a recorded series.
type seriesKey struct{ channel, source string }

func (r recording) channel(x recorded) string { return r.keys[x.key].channel }

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
	sumPath := fs.String("summary", "", "also write the replayed run's summary (JSON) to this file")
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
	var f *os.File
	if *out != "" {
		if f, err = os.Create(*out); err != nil {
			return fmt.Errorf("replay: %w", err)
		}
		defer f.Close() // a second Close after the checked one below is harmless
		w = f
	}
	bw := newAsyncWriter(w, 1<<20)
	sum, err := replay(cfg, samples, bw, *asCSV)
	if cerr := bw.Close(); err == nil && cerr != nil {
		err = fmt.Errorf("replay: write: %w", cerr)
	}
	if err != nil {
		return err
	}
	if f != nil {
		if err := f.Close(); err != nil {
			return fmt.Errorf("replay: %w", err)
		}
	}
	if *sumPath != "" {
		if err := os.WriteFile(*sumPath, sum.JSON(), 0o644); err != nil {
			return fmt.Errorf("replay: summary: %w", err)
		}
	}
	return nil
}

// asyncWriter writes to w from its own goroutine, so that the replay
// computes the next megabyte while the kernel takes the last one.
type asyncWriter struct {
	w    io.Writer
	size int
	cur  []byte
	full chan []byte // buffers to write, in order
	free chan []byte // written buffers, for reuse
	done chan error  // the writer goroutine's first error, at the end
}

func newAsyncWriter(w io.Writer, size int) *asyncWriter {
	a := &asyncWriter{w: w, size: size, full: make(chan []byte, 3), free: make(chan []byte, 4), done: make(chan error, 1)}
	for range 3 {
		a.free <- make([]byte, 0, size)
	}
	a.cur = make([]byte, 0, size)
	go func() {
		var err error
		for b := range a.full {
			if err == nil {
				_, err = w.Write(b)
			}
			a.free <- b[:0]
		}
		a.done <- err
	}()
	return a
}

// Write copies p; a failure of an earlier write is returned at Close.
func (a *asyncWriter) Write(p []byte) (int, error) {
	a.cur = append(a.cur, p...)
	if len(a.cur) >= a.size {
		a.full <- a.cur
		a.cur = <-a.free
	}
	return len(p), nil
}

// Close writes what is left, waits for the writer and returns its error.
func (a *asyncWriter) Close() error {
	if len(a.cur) > 0 {
		a.full <- a.cur
	}
	close(a.full)
	return <-a.done
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
	gz, _ := filepath.Glob(filepath.Join(in, "*.lp.gz"))
	files = append(files, gz...)
	sort.Strings(files) // 0001.lp, 0001.lp.gz, 0002.lp: in recorded order either way
	if len(files) == 0 {
		return nil, "", fmt.Errorf("replay: %s holds no .lp or .lp.gz files", in)
	}
	return files, in, nil
}

// readRecorded reads the input samples (not derived ones, which the replay
// recomputes, nor events) from line-protocol files, in time order.
func readRecorded(files []string) (recording, error) { return readSamples(files, false) }

// readSamples reads samples from line-protocol files in time order, with or
// without the derived ones. A large file is cut at line boundaries into one
// part per CPU, decoded in parallel.
func readSamples(files []string, derived bool) (recording, error) {
	var rec recording
	keyOf := map[seriesKey]uint32{}
	for _, f := range files {
		b, err := readMaybeGzip(f)
		if err != nil {
			return recording{}, fmt.Errorf("replay: %w", err)
		}
		parts := splitLines(b, runtime.GOMAXPROCS(0), 1<<20)
		res := make([]recording, len(parts))
		errs := make([]error, len(parts))
		var wg sync.WaitGroup
		for i, part := range parts {
			wg.Add(1)
			go func() {
				defer wg.Done()
				res[i], errs[i] = decodeSamples(part, derived)
			}()
		}
		wg.Wait()
		offset := 0
		for i, part := range parts {
			if err := errs[i]; err != nil {
				// Name the line in the whole file.
				line := int64(bytes.Count(b[:offset], []byte{'\n'}))
				var de *lineprotocol.DecodeError
				if errors.As(err, &de) {
					return recording{}, fmt.Errorf("replay: %s:%d:%d: %w", f, line+de.Line, de.Column, de.Err)
				}
				return recording{}, fmt.Errorf("replay: %s (after line %d): %w", f, line, err)
			}
			offset += len(part)
		}
		if rec.samples == nil {
			n := 0
			for _, r := range res {
				n += len(r.samples)
			}
			rec.samples = make([]recorded, 0, n*len(files))
		}
		for _, r := range res {
			remap := make([]uint32, len(r.keys))
			for i, k := range r.keys {
				id, ok := keyOf[k]
				if !ok {
					id = uint32(len(rec.keys))
					rec.keys = append(rec.keys, k)
					keyOf[k] = id
				}
				remap[i] = id
			}
			for _, x := range r.samples {
				x.key = remap[x.key]
				rec.samples = append(rec.samples, x)
			}
		}
	}
	// Recordings are nearly in time order already; sort only if needed,
	// stably, so that the samples of one moment keep their recorded order.
	byTime := func(a, b recorded) int { return cmp.Compare(a.ns, b.ns) }
	if !slices.IsSortedFunc(rec.samples, byTime) {
		slices.SortStableFunc(rec.samples, byTime)
	}
	return rec, nil
}

// readMaybeGzip reads a file, gunzipping it when its name ends in .gz
// (archived runs).
func readMaybeGzip(path string) ([]byte, error) {
	if !strings.HasSuffix(path, ".gz") {
		return os.ReadFile(path)
	}
	f, err := os.Open(path)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	zr, err := gzip.NewReader(f)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	b, err := io.ReadAll(zr)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	return b, nil
}

// splitLines cuts b into at most n parts of at least min bytes, each
// ending at a newline (the last one at the end of b).
func splitLines(b []byte, n, min int) [][]byte {
	var parts [][]byte
	for n > 1 && len(b) >= 2*min {
		cut := len(b) / n
		i := bytes.IndexByte(b[cut:], '\n')
		if i < 0 {
			break
		}
		parts = append(parts, b[:cut+i+1])
		b = b[cut+i+1:]
		n--
	}
	return append(parts, b)
}

// decodeSamples decodes one part of a file; errors carry the decoder's line
// within the part.
func decodeSamples(b []byte, derived bool) (recording, error) {
	rec := recording{samples: make([]recorded, 0, len(b)/100)} // about 110 bytes a line
	keyOf := map[seriesKey]uint32{}
	var chBuf, srcBuf []byte
	dec := lineprotocol.NewDecoderWithBytes(b)
	for dec.Next() {
		m, err := dec.Measurement()
		if err != nil {
			return recording{}, err
		}
		if string(m) != "plenum" {
			continue
		}
		chBuf, srcBuf = chBuf[:0], srcBuf[:0]
		for {
			k, v, err := dec.NextTag()
			if err != nil {
				return recording{}, err
			}
			if k == nil {
				break
			}
			switch string(k) {
			case "channel":
				chBuf = append(chBuf, v...)
			case "source":
				srcBuf = append(srcBuf, v...)
			}
		}
		var r recorded
		for {
			k, v, err := dec.NextField()
			if err != nil {
				return recording{}, err
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
					r.quality = qualityOf(v.BytesV())
				}
			}
		}
		t, err := dec.Time(lineprotocol.Nanosecond, time.Time{})
		if err != nil {
			return recording{}, err
		}
		r.ns = t.UnixNano()
		if len(chBuf) == 0 || (!derived && string(srcBuf) == "derived") {
			continue
		}
		id, ok := keyOf[seriesKey{string(chBuf), string(srcBuf)}]
		if !ok {
			k := seriesKey{string(chBuf), string(srcBuf)}
			id = uint32(len(rec.keys))
			rec.keys = append(rec.keys, k)
			keyOf[k] = id
		}
		r.key = id
		rec.samples = append(rec.samples, r)
	}
	return rec, dec.Err()
}

// qualityOf maps a recorded quality string to its value (OK if unknown).
func qualityOf(b []byte) pipeline.Quality {
	for q := pipeline.OK; q <= pipeline.SensorFault; q++ {
		if string(b) == q.String() {
			return q
		}
	}
	return pipeline.OK
}

// offlinePipeline builds cfg's derivations and detectors over reg for use
// away from the car (replay, benchmarks): the live turbo state is neither
// read nor written. Feed it with Process or ProcessFrame.
func offlinePipeline(cfg *config.Config, reg *pipeline.Registry) (*pipeline.Pipeline, error) {
	c := *cfg
	c.StateDir = ""
	ds, _, err := buildAll(&c, reg)
	if err != nil {
		return nil, err
	}
	g, err := pipeline.BuildGraph(reg, ds)
	if err != nil {
		return nil, fmt.Errorf("replay: %w", err)
	}
	p := pipeline.New(reg, g, pipeline.Options{})
	p.BindEmitters()
	return p, nil
}

// replay runs the samples through the configured derivations synchronously,
// writes every sample and event the pipeline fans out, and returns the
// summary of the replayed run.
func replay(cfg *config.Config, rec recording, w io.Writer, asCSV bool) (record.Summary, error) {
	reg := pipeline.NewRegistry()
	ids := make([]pipeline.ChannelID, len(rec.keys))
	for i, k := range rec.keys {
		ch, ok := pipeline.Standard(k.channel)
		if !ok {
			if idx, _, found := obd.LookupChannel(k.channel); found {
				ch, _, _ = obd.StandardChannel(idx)
				ch.Sensor = k.channel
			} else {
				ch = pipeline.Channel{Name: k.channel, Quantity: k.channel}
			}
		}
		ch.Source = k.source
		id, err := reg.Register(ch)
		if err != nil {
			return record.Summary{}, fmt.Errorf("replay: %w", err)
		}
		ids[i] = id
	}
	in := rec.samples
	p, err := offlinePipeline(cfg, reg)
	if err != nil {
		return record.Summary{}, err
	}
	sub := p.Subscribe("replay", 1<<12)
	enc := record.NewEncoder("replay", cfg.Vehicle, reg)
	var cw *csv.Writer
	if asCSV {
		cw = csv.NewWriter(w)
		cw.Write([]string{"time", "channel", "source", "value", "quality"})
	}
	chans := reg.Channels()
	var buf []pipeline.Sample
	var evs []pipeline.Event
	// Samples of one time (one serial line, one OBD answer) are one frame,
	// as the live ingest loop takes them.
	var frame []pipeline.Sample
	for i := 0; i < len(in); {
		frame = frame[:0]
		t := time.Unix(0, in[i].ns)
		for j := i; j < len(in) && in[j].ns == in[i].ns; j++ {
			r := in[j]
			frame = append(frame, pipeline.Sample{Channel: ids[r.key], Value: r.value, Quality: r.quality, Time: t})
		}
		i += len(frame)
		p.ProcessFrame(frame)
		buf, evs = sub.Drain(buf[:0], evs[:0])
		for _, s := range buf {
			enc.Write(s) // the summary sees every sample, in CSV mode too
			if cw != nil {
				c := chans[s.Channel]
				cw.Write([]string{s.Time.UTC().Format(time.RFC3339Nano), c.Name, c.Source, strconv.FormatFloat(s.Value, 'g', -1, 64), s.Quality.String()})
			}
		}
		for _, e := range evs {
			enc.WriteEvent(e)
		}
		b := enc.TakeBytes()
		if cw == nil {
			if _, err := w.Write(b); err != nil {
				return record.Summary{}, fmt.Errorf("replay: write: %w", err)
			}
		}
	}
	if sub.Dropped() > 0 {
		return record.Summary{}, errors.New("replay: samples were dropped; this is a bug")
	}
	if cw != nil {
		cw.Flush()
		if err := cw.Error(); err != nil {
			return record.Summary{}, fmt.Errorf("replay: write: %w", err)
		}
	}
	return enc.Summary(), nil
}
