// Package pipeline carries samples from drivers through derivations to publishers:
// channels, samples with quality flags, the latest-value store, the derivation graph
// and the bounded fan-out to consumers.
package pipeline

import (
	"fmt"
	"time"
)

// Quality says whether a sample's value may be used in physics.
type Quality uint8

const (
	// OK is a valid, in-range reading.
	OK Quality = iota
	// Stale marks a value older than its channel's maximum age.
	Stale
	// OutOfRange marks a reading outside its channel's plausible range.
	OutOfRange
	// SensorFault marks an open or short circuit, or a reading the sensor cannot give.
	SensorFault
)

// String returns the lower-case name used in logs, MQTT payloads and recordings.
func (q Quality) String() string {
	switch q {
	case OK:
		return "ok"
	case Stale:
		return "stale"
	case OutOfRange:
		return "out_of_range"
	case SensorFault:
		return "sensor_fault"
	}
	return fmt.Sprintf("quality(%d)", uint8(q))
}

// Usable reports whether a value of this quality may feed a derivation.
func (q Quality) Usable() bool { return q == OK }

// ChannelID is a dense index of a channel in a Registry. IDs are assigned in
// registration order and never reused, so they can index slices on the hot path.
type ChannelID uint16

// Sample is one reading of one channel. Time is the instant the value applies to;
// it travels with the sample so that the same code runs live and in replay.
// Values are in the channel's canonical unit.
type Sample struct {
	Channel ChannelID
	Quality Quality
	Time    time.Time
	Value   float64
}
