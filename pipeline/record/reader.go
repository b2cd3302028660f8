package record

import (
	"bytes"
	"cmp"
	"compress/gzip"
	"errors"
	"fmt"
	"io"
	"os"
	"runtime"
	"slices"
	"strings"
	"sync"
	"time"

	"github.com/influxdata/line-protocol/v2/lineprotocol"

	"github.com/plenum-engine/plenum/pipeline"
)

// The reader is the inverse of the Recorder's encoder: it reads the
// "plenum" points of recorded files back into samples. Events
// ("plenum_event") are skipped; replay recomputes them.

// Point is one sample read back from a recording. It holds no pointers
// (the names are in Recording.Keys), so a run of millions of samples costs
// the garbage collector nothing to scan.
type Point struct {
	Key     uint32 // index into Recording.Keys
	Quality pipeline.Quality
	Value   float64
	NS      int64 // sample time, Unix nanoseconds
}

// SeriesKey names a recorded series: its channel and source tags.
type SeriesKey struct{ Channel, Source string }

// Recording is what ReadInputs and ReadAll return: points in time order and
// the channel and source of each key.
type Recording struct {
	Keys   []SeriesKey
	Points []Point
}

// Channel returns the channel name of p.
func (r Recording) Channel(p Point) string { return r.Keys[p.Key].Channel }

// ReadInputs reads the input samples of line-protocol files (.lp, or .lp.gz
// for archived runs), in time order: not the derived ones (source
// "derived"), which a replay recomputes, nor events.
//
// A malformed line is named in the error as file:line:column.
func ReadInputs(files []string) (Recording, error) { return readSamples(files, false, nil) }

// ReadAll reads every sample of line-protocol files, derived ones included,
// in time order. Errors are as for ReadInputs.
func ReadAll(files []string) (Recording, error) { return readSamples(files, true, nil) }

// ReadChannels reads the samples of the named channels only, derived ones
// included, in time order: lines of other channels are passed over before
// they are decoded, so that a long run's few channels read quickly.
// Errors are as for ReadInputs.
func ReadChannels(files []string, names ...string) (Recording, error) {
	want := make([][]byte, len(names))
	for i, n := range names {
		want[i] = []byte("plenum,channel=" + n + ",")
	}
	rec, err := readSamples(files, true, func(line []byte) bool {
		if !bytes.HasPrefix(line, []byte("plenum,")) {
			return false
		}
		if !bytes.HasPrefix(line, []byte("plenum,channel=")) {
			return true // tags in another order: the decoder decides
		}
		for _, w := range want {
			if bytes.HasPrefix(line, w) {
				return true
			}
		}
		return false
	})
	if err != nil {
		// Name the bad line in the whole file, not in the lines kept.
		if _, err2 := ReadAll(files); err2 != nil {
			return Recording{}, err2
		}
		return Recording{}, err
	}
	keep := map[string]bool{}
	for _, n := range names {
		keep[n] = true
	}
	if len(rec.Keys) == 0 || len(rec.Points) == 0 {
		return rec, nil
	}
	// Lines whose tags came in another order were kept whatever their
	// channel: drop the channels not asked for.
	out := rec.Points[:0]
	for _, p := range rec.Points {
		if keep[rec.Keys[p.Key].Channel] {
			out = append(out, p)
		}
	}
	rec.Points = out
	return rec, nil
}

// keepLines returns the lines of b for which keep is true.
func keepLines(b []byte, keep func(line []byte) bool) []byte {
	out := make([]byte, 0, len(b)/8)
	for len(b) > 0 {
		i := bytes.IndexByte(b, '\n')
		line := b
		if i >= 0 {
			line = b[:i+1]
		}
		if keep(line) {
			out = append(out, line...)
		}
		b = b[len(line):]
	}
	return out
}

// readSamples reads samples from line-protocol files in time order, with or
// without the derived ones, of the lines keep (when not nil) is true for. A large file is cut at line boundaries into one
// part per CPU, decoded in parallel. Errors name the file (and the line);
// they carry no package prefix, so that the caller's command names itself.
func readSamples(files []string, derived bool, keep func(line []byte) bool) (Recording, error) {
	var rec Recording
	keyOf := map[SeriesKey]uint32{}
	for _, f := range files {
		b, err := ReadFile(f)
		if err != nil {
			return Recording{}, err
		}
		if keep != nil {
			b = keepLines(b, keep)
		}
		parts := splitLines(b, runtime.GOMAXPROCS(0), 1<<20)
		res := make([]Recording, len(parts))
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
					return Recording{}, fmt.Errorf("%s:%d:%d: %w", f, line+de.Line, de.Column, de.Err)
				}
				return Recording{}, fmt.Errorf("%s (after line %d): %w", f, line, err)
			}
			offset += len(part)
		}
		if rec.Points == nil {
			n := 0
			for _, r := range res {
				n += len(r.Points)
			}
			rec.Points = make([]Point, 0, n*len(files))
		}
		for _, r := range res {
			remap := make([]uint32, len(r.Keys))
			for i, k := range r.Keys {
				id, ok := keyOf[k]
				if !ok {
					id = uint32(len(rec.Keys))
					rec.Keys = append(rec.Keys, k)
					keyOf[k] = id
				}
				remap[i] = id
			}
			for _, x := range r.Points {
				x.Key = remap[x.Key]
				rec.Points = append(rec.Points, x)
			}
		}
	}
	// Recordings are nearly in time order already; sort only if needed,
	// stably, so that the samples of one moment keep their recorded order.
	byTime := func(a, b Point) int { return cmp.Compare(a.NS, b.NS) }
	if !slices.IsSortedFunc(rec.Points, byTime) {
		slices.SortStableFunc(rec.Points, byTime)
	}
	return rec, nil
}

// ReadFile reads a recorded file, gunzipping it when its name ends in .gz
// (compressed segments). A <n>.lp that is gone is read from <n>.lp.gz: the
// compressor may have replaced it since the caller listed the run.
func ReadFile(path string) ([]byte, error) {
	if !strings.HasSuffix(path, ".gz") {
		b, err := os.ReadFile(path)
		if errors.Is(err, os.ErrNotExist) && strings.HasSuffix(path, ".lp") {
			if b, err2 := ReadFile(path + ".gz"); err2 == nil {
				return b, nil
			}
		}
		return b, err
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
func decodeSamples(b []byte, derived bool) (Recording, error) {
	rec := Recording{Points: make([]Point, 0, len(b)/100)} // about 110 bytes a line
	keyOf := map[SeriesKey]uint32{}
	var chBuf, srcBuf []byte
	dec := lineprotocol.NewDecoderWithBytes(b)
	for dec.Next() {
		m, err := dec.Measurement()
		if err != nil {
			return Recording{}, err
		}
		if string(m) != "plenum" {
			continue
		}
		chBuf, srcBuf = chBuf[:0], srcBuf[:0]
		for {
			k, v, err := dec.NextTag()
			if err != nil {
				return Recording{}, err
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
		var r Point
		for {
			k, v, err := dec.NextField()
			if err != nil {
				return Recording{}, err
			}
			if k == nil {
				break
			}
			switch string(k) {
			case "value":
				if v.Kind() == lineprotocol.Float {
					r.Value = v.FloatV()
				}
			case "quality":
				if v.Kind() == lineprotocol.String {
					r.Quality = qualityOf(v.BytesV())
				}
			}
		}
		t, err := dec.Time(lineprotocol.Nanosecond, time.Time{})
		if err != nil {
			return Recording{}, err
		}
		r.NS = t.UnixNano()
		if len(chBuf) == 0 || (!derived && string(srcBuf) == "derived") {
			continue
		}
		id, ok := keyOf[SeriesKey{string(chBuf), string(srcBuf)}]
		if !ok {
			k := SeriesKey{string(chBuf), string(srcBuf)}
			id = uint32(len(rec.Keys))
			rec.Keys = append(rec.Keys, k)
			keyOf[k] = id
		}
		r.Key = id
		rec.Points = append(rec.Points, r)
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

// ReadEvents reads the events ("plenum_event" points) of line-protocol
// files in time order: kind, name, start (the recorded time), end (start
// plus the recorded duration_seconds) and the numeric fields other than
// the duration. Errors are as for ReadInputs.
func ReadEvents(files []string) ([]pipeline.Event, error) {
	var evs []pipeline.Event
	for _, f := range files {
		b, err := ReadFile(f)
		if err != nil {
			return nil, err
		}
		e, err := readEvents(f, keepLines(b, func(l []byte) bool { return bytes.HasPrefix(l, []byte("plenum_event")) }))
		if err != nil {
			// Name the bad line in the whole file.
			if _, err2 := readEvents(f, b); err2 != nil {
				return nil, err2
			}
			return nil, err
		}
		evs = append(evs, e...)
	}
	slices.SortStableFunc(evs, func(a, b pipeline.Event) int { return a.Start.Compare(b.Start) })
	return evs, nil
}

// readEvents decodes the events of b, the contents of file f.
func readEvents(f string, b []byte) ([]pipeline.Event, error) {
	var evs []pipeline.Event
	dec := lineprotocol.NewDecoderWithBytes(b)
	for dec.Next() {
		m, err := dec.Measurement()
		if err != nil {
			return nil, fmt.Errorf("%s: %w", f, err)
		}
		if string(m) != "plenum_event" {
			continue
		}
		var e pipeline.Event
		for {
			k, v, err := dec.NextTag()
			if err != nil {
				return nil, fmt.Errorf("%s: %w", f, err)
			}
			if k == nil {
				break
			}
			switch string(k) {
			case "kind":
				e.Kind = string(v)
			case "name":
				e.Name = string(v)
			}
		}
		dur := 0.0
		for {
			k, v, err := dec.NextField()
			if err != nil {
				return nil, fmt.Errorf("%s: %w", f, err)
			}
			if k == nil {
				break
			}
			if v.Kind() != lineprotocol.Float {
				continue
			}
			if string(k) == "duration_seconds" {
				dur = v.FloatV()
				continue
			}
			if e.Fields == nil {
				e.Fields = map[string]float64{}
			}
			e.Fields[string(k)] = v.FloatV()
		}
		t, err := dec.Time(lineprotocol.Nanosecond, time.Time{})
		if err != nil {
			return nil, fmt.Errorf("%s: %w", f, err)
		}
		e.Start = t.UTC()
		if dur > 0 {
			e.End = e.Start.Add(time.Duration(dur * float64(time.Second)))
		}
		evs = append(evs, e)
	}
	if err := dec.Err(); err != nil {
		var de *lineprotocol.DecodeError
		if errors.As(err, &de) {
			return nil, fmt.Errorf("%s:%d:%d: %w", f, de.Line, de.Column, de.Err)
		}
		return nil, fmt.Errorf("%s: %w", f, err)
	}
	return evs, nil
}
