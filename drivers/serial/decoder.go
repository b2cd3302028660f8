package serial

import (
	"errors"
	"fmt"
	"math"
	"sync/atomic"
	"time"

	"github.com/plenum-engine/plenum/drivers/calib"
	"github.com/plenum-engine/plenum/pipeline"
)

// Format selects the line format.
type Format uint8

// Line formats.
const (
	Framed    Format = iota // Plenum's line protocol, version 1
	Delimited               // plain numbers separated by a delimiter
)

// Input maps one reading to a calibrated channel.
type Input struct {
	Key     string // framed: the reading's key, e.g. "a0"
	Column  int    // delimited: 1-based column; values are millivolts unless Counts
	Counts  bool   // delimited: the column holds raw ADC counts
	Channel pipeline.ChannelID
	Sensor  calib.Sensor
}

// Sink takes the decoded samples, one frame per line: the readings of one
// line at one time. PutFrame is called from the driver's goroutine, must not
// block for long and must copy what it keeps (the slice is reused); its
// result is ignored (a sink that drops a frame counts that itself).
type Sink interface {
	PutFrame([]pipeline.Sample) bool
}

// Counters are a source's health counters, kept in a pipeline.Health that
// the driver reports at scrape time. All are updated
// atomically; read them together with Snapshot.
type Counters struct {
	Frames, BadChecksum, Truncated, Malformed, UnknownField, OutOfRange, SensorFault, SeqGaps, Overlong *atomic.Uint64
	// DroppedFrames is the number of frames missing in sequence gaps.
	DroppedFrames *atomic.Uint64
	// Reanchors counts re-anchorings of the device clock (reset, wrap, stall).
	Reanchors *atomic.Uint64
	// ReadErrors and Reopens are kept by the Driver.
	ReadErrors, Reopens *atomic.Uint64
}

// NewCounters takes the counters from h, under the names listed in PROTOCOL.md.
func NewCounters(h *pipeline.Health) Counters {
	return Counters{
		Frames: h.Counter("frames"), BadChecksum: h.Counter("bad_checksums"), Truncated: h.Counter("truncated_lines"),
		Malformed: h.Counter("malformed_lines"), UnknownField: h.Counter("unknown_fields"), OutOfRange: h.Counter("out_of_range_readings"),
		SensorFault: h.Counter("sensor_faults"), SeqGaps: h.Counter("sequence_gaps"), Overlong: h.Counter("overlong_lines"),
		DroppedFrames: h.Counter("dropped_frames"), Reanchors: h.Counter("clock_reanchors"),
		ReadErrors: h.Counter("read_errors"), Reopens: h.Counter("reopens"),
	}
}

// fill gives every nil counter a private one, so that a partly built
// Counters value never makes the hot path dereference nil.
func (c *Counters) fill() {
	for _, p := range []**atomic.Uint64{&c.Frames, &c.BadChecksum, &c.Truncated, &c.Malformed, &c.UnknownField,
		&c.OutOfRange, &c.SensorFault, &c.SeqGaps, &c.Overlong, &c.DroppedFrames, &c.Reanchors, &c.ReadErrors, &c.Reopens} {
		if *p == nil {
			*p = new(atomic.Uint64)
		}
	}
}

// Stats is a snapshot of a source's counters.
type Stats struct {
	Up            bool   // a good frame arrived within the last second and the port is open
	Frames        uint64 // lines decoded (framed: checksum and syntax good)
	BadChecksum   uint64 // framed lines whose CRC did not match
	Truncated     uint64 // lines without a complete *crc trailer or header
	Malformed     uint64 // other unparsable lines (version, syntax, number, key)
	UnknownField  uint64 // readings whose key no input maps
	OutOfRange    uint64 // readings outside the plausible range (pipeline.OutOfRange)
	SensorFault   uint64 // readings outside the fault rails (pipeline.SensorFault)
	SeqGaps       uint64 // jumps in the sequence number
	DroppedFrames uint64 // frames missing in those jumps
	Overlong      uint64 // lines longer than MaxLine, discarded
	Reanchors     uint64 // device clock re-anchorings
	ReadErrors    uint64 // failed reads (the device vanished)
	Reopens       uint64 // successful opens after the first
}

// Snapshot reads every counter (each atomically; the set is not one instant).
func (c Counters) Snapshot() Stats {
	c.fill()
	return Stats{
		Frames: c.Frames.Load(), BadChecksum: c.BadChecksum.Load(), Truncated: c.Truncated.Load(), Malformed: c.Malformed.Load(),
		UnknownField: c.UnknownField.Load(), OutOfRange: c.OutOfRange.Load(), SensorFault: c.SensorFault.Load(),
		SeqGaps: c.SeqGaps.Load(), DroppedFrames: c.DroppedFrames.Load(), Overlong: c.Overlong.Load(),
		Reanchors: c.Reanchors.Load(), ReadErrors: c.ReadErrors.Load(), Reopens: c.Reopens.Load(),
	}
}

// Decoder turns lines into samples. Not safe for concurrent use.
type Decoder struct {
	format   Format
	sep      byte
	inputs   []Input
	byKey    map[string]int
	byCol    []int          // column index (0-based) → input index, -1 if unmapped
	tables   [][]calibrated // per input: every count calibrated in advance, or nil
	c        Counters
	out      []pipeline.Sample // the current line's samples
	frame    Frame
	nums     [MaxReadings]float64
	order    [MaxReadings]int16 // input index + 1 last seen at each reading position
	haveSeq  bool
	lastSeq  uint32
	anchor   time.Time // host time of device millisecond 0
	anchored bool
	last     time.Time // the previous line's time
	lastRead time.Time // and the host time it was read at
}

// NewDecoder checks the inputs and returns a decoder.
func NewDecoder(format Format, sep byte, inputs []Input, c Counters) (*Decoder, error) {
	c.fill()
	inputs = append([]Input(nil), inputs...)
	d := &Decoder{format: format, sep: sep, inputs: inputs, byKey: map[string]int{}, c: c,
		out: make([]pipeline.Sample, 0, MaxReadings)}
	for i, in := range inputs {
		if err := in.Sensor.Validate(); err != nil {
			return nil, fmt.Errorf("input %d (%s%d): %w", i, in.Key, in.Column, err)
		}
		d.tables = append(d.tables, countTable(in))
		switch format {
		case Framed:
			if in.Key == "" || len(in.Key) > MaxKeyLen || !validKey([]byte(in.Key)) {
				return nil, fmt.Errorf("input %d: key %q must be 1–%d of a-z, 0-9, _", i, in.Key, MaxKeyLen)
			}
			if _, dup := d.byKey[in.Key]; dup {
				return nil, fmt.Errorf("input %d: key %q mapped twice", i, in.Key)
			}
			d.byKey[in.Key] = i
		case Delimited:
			if in.Column < 1 || in.Column > MaxReadings {
				return nil, fmt.Errorf("input %d: column %d outside 1–%d", i, in.Column, MaxReadings)
			}
			for len(d.byCol) < in.Column {
				d.byCol = append(d.byCol, -1)
			}
			if d.byCol[in.Column-1] >= 0 {
				return nil, fmt.Errorf("input %d: column %d mapped twice", i, in.Column)
			}
			d.byCol[in.Column-1] = i
		}
	}
	if format == Delimited && sep == 0 {
		d.sep = ','
	}
	return d, nil
}

// Reset forgets the sequence and clock state, as after a reopen.
func (d *Decoder) Reset() { d.haveSeq, d.anchored = false, false }

// Counters returns the decoder's counters.
func (d *Decoder) Counters() Counters { return d.c }

// Line decodes one line received at host time now and hands its readings to
// sink as one frame. Readings decoded from a line are kept even when another
// field of it is unknown.
func (d *Decoder) Line(line []byte, now time.Time, sink Sink) error {
	d.out = d.out[:0]
	err := d.line(line, now)
	if len(d.out) > 0 {
		sink.PutFrame(d.out)
	}
	return err
}

func (d *Decoder) line(line []byte, now time.Time) error {
	line = trimSpace(line)
	if len(line) == 0 {
		return nil
	}
	if d.format == Delimited {
		n, err := ParseDelimited(line, d.sep, d.nums[:])
		if err != nil {
			d.c.Malformed.Add(1)
			return err
		}
		d.c.Frames.Add(1)
		now = d.after(now, now)
		for i := 0; i < n && i < len(d.byCol); i++ {
			if j := d.byCol[i]; j >= 0 {
				d.emit(j, d.nums[i], !d.inputs[j].Counts, now)
			}
		}
		return nil
	}
	if err := ParseFrame(line, &d.frame); err != nil {
		var pe *ParseError
		if errors.As(err, &pe) {
			switch pe.Kind {
			case ErrChecksum:
				d.c.BadChecksum.Add(1)
			case ErrTruncated:
				d.c.Truncated.Add(1)
			case ErrTooLong:
				d.c.Overlong.Add(1)
			default:
				d.c.Malformed.Add(1)
			}
		}
		return err
	}
	f := &d.frame
	d.c.Frames.Add(1)
	if d.haveSeq && f.Seq != d.lastSeq+1 {
		d.c.SeqGaps.Add(1)
		// A forward jump (modulo 2^32) of less than half the range is lost
		// frames; anything else is a device reset or a replayed frame.
		if lost := f.Seq - d.lastSeq - 1; lost < 1<<31 {
			d.c.DroppedFrames.Add(uint64(lost))
		}
	}
	d.haveSeq, d.lastSeq = true, f.Seq
	t := d.after(d.stamp(f.DeviceMS, now), now)
	var unknown error
	for i := 0; i < f.N; i++ {
		r := &f.Readings[i]
		// Devices send their readings in a fixed order: try the input that
		// held this position in the previous frame before the map.
		key := r.KeyBytes()
		j, ok := int(d.order[i])-1, false
		if j >= 0 && string(key) == d.inputs[j].Key {
			ok = true
		} else if j, ok = d.byKey[string(key)]; ok {
			d.order[i] = int16(j + 1)
		}
		if !ok {
			d.c.UnknownField.Add(1)
			if unknown == nil {
				unknown = &UnknownFieldError{Key: string(r.KeyBytes()), Field: i + 3, Offset: r.Offset}
			}
			continue
		}
		d.emit(j, r.Value, r.MilliVolts, t)
	}
	return unknown
}

// UnknownFieldError reports a reading key that no input maps. The frame's
// other readings were still decoded. errors.Is(err, ErrUnknown) holds.
type UnknownFieldError struct {
	Key    string
	Field  int // 0-based comma-separated field of the line
	Offset int // byte offset of the key in the line
}

// Error names the key, the field and the byte offset.
func (e *UnknownFieldError) Error() string {
	return fmt.Sprintf("unknown reading %q at byte %d (field %d)", e.Key, e.Offset, e.Field)
}

// Unwrap returns ErrUnknown.
func (e *UnknownFieldError) Unwrap() error { return ErrUnknown }

// MaxClockLag is how far behind the host clock the device-clock mapping may
// fall before it is re-anchored.
const MaxClockLag = 500 * time.Millisecond

// stamp maps the device's millisecond counter to host time as
// anchor + ms. The anchor is set on the first frame (anchor = now − ms). A
// frame that arrives sooner than the mapping predicts (the first frame was
// delayed in transit, or the device clock runs fast) moves the anchor back
// so that no sample is stamped in the host's future; this converges on the
// least-delayed frame. A mapping more than MaxClockLag behind the host (a
// device reset, the 49.7-day counter wrap, a slow device clock, a stalled
// line) is re-anchored on the host clock and counted.
func (d *Decoder) stamp(ms uint32, now time.Time) time.Time {
	dev := time.Duration(ms) * time.Millisecond
	if d.anchored {
		t := d.anchor.Add(dev)
		lag := now.Sub(t)
		if lag >= 0 && lag <= MaxClockLag {
			return t
		}
		if lag < 0 && lag >= -MaxClockLag {
			d.anchor = d.anchor.Add(lag)
			return now
		}
		d.c.Reanchors.Add(1)
	}
	d.anchor = now.Add(-dev)
	d.anchored = true
	return now
}

// after returns t for a line read at host time now, moved to a microsecond
// after the previous line's time when both came in one read (the same now)
// and t is not later. Lines read in one burst share the host time of the
// read, and a device clock ahead of the mapping is pulled back to it, but
// two lines are two moments, never one: no channel gets two values at one
// instant.
func (d *Decoder) after(t, now time.Time) time.Time {
	if now.Equal(d.lastRead) && !t.After(d.last) {
		t = d.last.Add(time.Microsecond)
	}
	d.last, d.lastRead = t, now
	return t
}

// calibrated is a cached calibration result.
type calibrated struct {
	v float64
	q pipeline.Quality
}

// maxTableCounts bounds the converters whose every count is calibrated in
// advance: 12 bits, 64 KiB per input.
const maxTableCounts = 4095

// countTable calibrates every count of in's converter once, for curves that
// cost more than a table look-up (thermistors, tables); nil otherwise. A
// look-up gives exactly what Apply computes for that count.
func countTable(in Input) []calibrated {
	if _, lin := in.Sensor.Curve.(calib.Linear); lin || in.Sensor.ADCMax > maxTableCounts || in.Sensor.ADCMax != math.Trunc(in.Sensor.ADCMax) {
		return nil
	}
	tab := make([]calibrated, int(in.Sensor.ADCMax)+1)
	for n := range tab {
		v, q := in.Sensor.Apply(in.Sensor.CountsToMV(float64(n)))
		tab[n] = calibrated{v, q}
	}
	return tab
}

func (d *Decoder) emit(j int, raw float64, mv bool, t time.Time) {
	in := &d.inputs[j]
	if !mv {
		if tab := d.tables[j]; tab != nil && raw >= 0 && raw < float64(len(tab)) && raw == math.Trunc(raw) {
			c := tab[int(raw)]
			d.put(in, c.v, c.q, t)
			return
		}
		raw = in.Sensor.CountsToMV(raw)
	}
	v, q := in.Sensor.Apply(raw)
	d.put(in, v, q, t)
}

func (d *Decoder) put(in *Input, v float64, q pipeline.Quality, t time.Time) {
	switch q {
	case pipeline.OutOfRange:
		d.c.OutOfRange.Add(1)
	case pipeline.SensorFault:
		d.c.SensorFault.Add(1)
	}
	d.out = append(d.out, pipeline.Sample{Channel: in.Channel, Quality: q, Time: t, Value: v})
}
