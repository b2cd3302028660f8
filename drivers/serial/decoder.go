package serial

import (
	"errors"
	"fmt"
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
	Column  int    // delimited: 1-based column; values are millivolts
	Channel pipeline.ChannelID
	Sensor  calib.Sensor
}

// Sink takes the decoded samples.
type Sink interface {
	Put(pipeline.Sample) bool
}

// Counters are the decoder's health counters, shared with a pipeline.Health.
type Counters struct {
	Frames, BadChecksum, Truncated, Malformed, UnknownField, OutOfRange, SensorFault, SeqGaps, Overlong *atomic.Uint64
}

// NewCounters takes the counters from h.
func NewCounters(h *pipeline.Health) Counters {
	return Counters{
		Frames: h.Counter("frames"), BadChecksum: h.Counter("bad_checksums"), Truncated: h.Counter("truncated_lines"),
		Malformed: h.Counter("malformed_lines"), UnknownField: h.Counter("unknown_fields"), OutOfRange: h.Counter("out_of_range_readings"),
		SensorFault: h.Counter("sensor_faults"), SeqGaps: h.Counter("sequence_gaps"), Overlong: h.Counter("overlong_lines"),
	}
}

// Decoder turns lines into samples. Not safe for concurrent use.
type Decoder struct {
	format   Format
	sep      byte
	inputs   []Input
	byKey    map[string]int
	byCol    []int // column index (0-based) → input index, -1 if unmapped
	sink     Sink
	c        Counters
	frame    Frame
	nums     [MaxReadings]float64
	haveSeq  bool
	lastSeq  uint32
	anchor   time.Time // host time of device millisecond 0
	anchored bool
}

// NewDecoder checks the inputs and returns a decoder writing to sink.
func NewDecoder(format Format, sep byte, inputs []Input, sink Sink, c Counters) (*Decoder, error) {
	d := &Decoder{format: format, sep: sep, inputs: inputs, byKey: map[string]int{}, sink: sink, c: c}
	for i, in := range inputs {
		if err := in.Sensor.Validate(); err != nil {
			return nil, fmt.Errorf("input %d (%s%d): %w", i, in.Key, in.Column, err)
		}
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

// Line decodes one line received at host time now. Readings already decoded
// from a line are kept even when a later field of it is unknown.
func (d *Decoder) Line(line []byte, now time.Time) error {
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
		for i := 0; i < n && i < len(d.byCol); i++ {
			if j := d.byCol[i]; j >= 0 {
				d.emit(&d.inputs[j], d.nums[i], true, now)
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
	}
	d.haveSeq, d.lastSeq = true, f.Seq
	t := d.stamp(f.DeviceMS, now)
	var unknown error
	for i := 0; i < f.N; i++ {
		r := &f.Readings[i]
		j, ok := d.byKey[string(r.KeyBytes())]
		if !ok {
			d.c.UnknownField.Add(1)
			if unknown == nil {
				unknown = &UnknownFieldError{Key: string(r.KeyBytes()), Field: i + 3}
			}
			continue
		}
		d.emit(&d.inputs[j], r.Value, r.MilliVolts, t)
	}
	return unknown
}

// UnknownFieldError reports a reading key that no input maps.
type UnknownFieldError struct {
	Key   string
	Field int
}

func (e *UnknownFieldError) Error() string {
	return fmt.Sprintf("unknown reading %q (field %d)", e.Key, e.Field)
}

// stamp maps the device's millisecond counter to host time: anchored on the
// first frame, re-anchored when the mapping runs ahead of the host clock or
// more than half a second behind it (device reset, counter wrap, a stalled
// line).
func (d *Decoder) stamp(ms uint32, now time.Time) time.Time {
	dev := time.Duration(ms) * time.Millisecond
	if d.anchored {
		t := d.anchor.Add(dev)
		if lag := now.Sub(t); lag >= -20*time.Millisecond && lag <= 500*time.Millisecond {
			return t
		}
	}
	d.anchor = now.Add(-dev)
	d.anchored = true
	return now
}

func (d *Decoder) emit(in *Input, raw float64, mv bool, t time.Time) {
	if !mv {
		raw = in.Sensor.CountsToMV(raw)
	}
	v, q := in.Sensor.Apply(raw)
	switch q {
	case pipeline.OutOfRange:
		d.c.OutOfRange.Add(1)
	case pipeline.SensorFault:
		d.c.SensorFault.Add(1)
	}
	d.sink.Put(pipeline.Sample{Channel: in.Channel, Quality: q, Time: t, Value: v})
}
