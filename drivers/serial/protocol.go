// Package serial reads a sensor microcontroller over a serial line: Plenum's
// framed line protocol (see PROTOCOL.md) or a plain delimited mode, with
// calibration into pipeline samples, and a port that is reopened with backoff
// when the device vanishes.
package serial

import (
	"math"
	"strconv"
)

// MaxReadings is the most readings one frame may carry.
const MaxReadings = 32

// MaxKeyLen is the longest reading key.
const MaxKeyLen = 8

// MaxLine is the longest line accepted, in bytes; longer lines are discarded.
const MaxLine = 512

// Reading is one value in a frame: the key the device gives it, the number,
// and whether it is in millivolts (suffix m) or raw ADC counts (no suffix).
type Reading struct {
	Key        [MaxKeyLen]byte
	KeyLen     uint8
	MilliVolts bool
	Value      float64
	// Offset is the byte offset of the reading's key in the parsed line
	// (set by ParseFrame; ignored by AppendFrame).
	Offset int
}

// KeyBytes returns the key.
func (r *Reading) KeyBytes() []byte { return r.Key[:r.KeyLen] }

// NewReading builds a reading; a key longer than MaxKeyLen is cut.
func NewReading(key string, value float64, millivolts bool) Reading {
	var r Reading
	r.KeyLen = uint8(copy(r.Key[:], key))
	r.Value = value
	r.MilliVolts = millivolts
	return r
}

// Frame is one parsed line. Reuse one Frame across calls: parsing does not
// allocate.
type Frame struct {
	Version  uint8                // protocol version (1)
	Seq      uint32               // frame sequence number
	DeviceMS uint32               // the device's millisecond counter
	N        int                  // number of readings in Readings
	Readings [MaxReadings]Reading // Readings[:N] are this frame's
}

// ErrKind classifies a parse error.
type ErrKind uint8

// Parse error kinds.
const (
	ErrTruncated ErrKind = iota + 1 // a frame header without a complete *crc trailer, or missing fields
	ErrVersion                      // a P<digit> tag other than P1
	ErrChecksum                     // CRC mismatch, or a trailer that is not hex
	ErrSyntax                       // not a frame at all, or a reading without '='
	ErrNumber                       // a sequence, counter or value that is not a valid number
	ErrTooMany                      // more than MaxReadings readings (framed) or columns (delimited)
	ErrKey                          // a reading key outside the key syntax
	ErrTooLong                      // a line longer than MaxLine
	ErrUnknown                      // a well-formed reading whose key no input maps (see UnknownFieldError)
)

var kindNames = [...]string{"", "truncated line", "unsupported version", "bad checksum", "syntax error", "bad number", "too many readings", "bad key", "line too long", "unknown reading key"}

// String names the kind.
func (k ErrKind) String() string {
	if int(k) < len(kindNames) {
		return kindNames[k]
	}
	return "error " + strconv.Itoa(int(k))
}

// Error makes a kind usable as a sentinel: errors.Is(err, ErrChecksum)
// holds for a *ParseError of that kind.
func (k ErrKind) Error() string { return k.String() }

// ParseError says what is wrong with a line and at which byte (0-based) and
// field (0-based, comma-separated) it was found.
type ParseError struct {
	Kind   ErrKind
	Offset int
	Field  int
}

// Error names the kind, the byte offset and the field.
func (e *ParseError) Error() string {
	return e.Kind.String() + " at byte " + strconv.Itoa(e.Offset) + " (field " + strconv.Itoa(e.Field) + ")"
}

// Unwrap returns the kind, so that errors.Is(err, ErrTruncated) and the like work.
func (e *ParseError) Unwrap() error { return e.Kind }

// CRC16 returns the CRC-16/CCITT-FALSE of b (polynomial 0x1021, initial value
// 0xFFFF, no reflection, no final XOR).
func CRC16(b []byte) uint16 {
	return crc16Update(0xFFFF, b)
}

func hexVal(c byte) (uint16, bool) {
	switch {
	case c >= '0' && c <= '9':
		return uint16(c - '0'), true
	case c >= 'A' && c <= 'F':
		return uint16(c-'A') + 10, true
	case c >= 'a' && c <= 'f':
		return uint16(c-'a') + 10, true
	}
	return 0, false
}

// ParseFrame parses one framed line (without its line ending) into f.
// The good path does not allocate.
func ParseFrame(line []byte, f *Frame) error {
	if len(line) > MaxLine {
		return &ParseError{Kind: ErrTooLong, Offset: MaxLine}
	}
	// Trailer: *XXXX
	star := len(line) - 5
	if star < 0 || line[star] != '*' {
		if len(line) < 2 || line[0] != 'P' || line[1] < '0' || line[1] > '9' {
			return &ParseError{Kind: ErrSyntax, Offset: 0} // not a frame at all: noise, a boot banner
		}
		for i := range line {
			if line[i] == '*' {
				return &ParseError{Kind: ErrTruncated, Offset: len(line), Field: fieldAt(line, i)}
			}
		}
		return &ParseError{Kind: ErrTruncated, Offset: len(line), Field: fieldAt(line, len(line))}
	}
	var want uint16
	for i := star + 1; i < len(line); i++ {
		v, ok := hexVal(line[i])
		if !ok {
			return &ParseError{Kind: ErrChecksum, Offset: i, Field: fieldAt(line, star)}
		}
		want = want<<4 | v
	}
	body := line[:star]
	if CRC16(body) != want {
		return &ParseError{Kind: ErrChecksum, Offset: star, Field: fieldAt(line, star)}
	}
	if len(body) < 2 || body[0] != 'P' {
		return &ParseError{Kind: ErrSyntax, Offset: 0}
	}
	if body[1] != '1' || (len(body) > 2 && body[2] != ',') {
		return &ParseError{Kind: ErrVersion, Offset: 1}
	}
	f.Version = 1
	f.N = 0
	pos := 2
	field := 0
	next := func() (start, end int, ok bool) {
		if pos >= len(body) || body[pos] != ',' {
			return 0, 0, false
		}
		start = pos + 1
		end = start
		for end < len(body) && body[end] != ',' {
			end++
		}
		pos = end
		field++
		return start, end, true
	}
	s, e, ok := next()
	if !ok {
		return &ParseError{Kind: ErrTruncated, Offset: pos, Field: field}
	}
	seq, ok := parseUint(body[s:e])
	if !ok {
		return &ParseError{Kind: ErrNumber, Offset: s, Field: field}
	}
	s, e, ok = next()
	if !ok {
		return &ParseError{Kind: ErrTruncated, Offset: pos, Field: field}
	}
	ms, ok := parseUint(body[s:e])
	if !ok {
		return &ParseError{Kind: ErrNumber, Offset: s, Field: field}
	}
	f.Seq, f.DeviceMS = seq, ms
	for pos < len(body) {
		s, e, ok = next()
		if !ok {
			return &ParseError{Kind: ErrSyntax, Offset: pos, Field: field}
		}
		if f.N == MaxReadings {
			return &ParseError{Kind: ErrTooMany, Offset: s, Field: field}
		}
		eq := s
		for eq < e && body[eq] != '=' {
			eq++
		}
		if eq == e {
			return &ParseError{Kind: ErrSyntax, Offset: s, Field: field}
		}
		if eq == s || eq-s > MaxKeyLen || !validKey(body[s:eq]) {
			return &ParseError{Kind: ErrKey, Offset: s, Field: field}
		}
		r := &f.Readings[f.N]
		r.KeyLen = uint8(copy(r.Key[:], body[s:eq]))
		r.Offset = s
		num := body[eq+1 : e]
		r.MilliVolts = false
		if len(num) > 0 && num[len(num)-1] == 'm' {
			r.MilliVolts = true
			num = num[:len(num)-1]
		}
		v, ok := parseDecimal(num)
		if !ok {
			return &ParseError{Kind: ErrNumber, Offset: eq + 1, Field: field}
		}
		r.Value = v
		f.N++
	}
	return nil
}

func fieldAt(b []byte, off int) int {
	n := 0
	for i := 0; i < off && i < len(b); i++ {
		if b[i] == ',' {
			n++
		}
	}
	return n
}

func validKey(k []byte) bool {
	for i, c := range k {
		if !(c >= 'a' && c <= 'z' || c == '_' || (i > 0 && c >= '0' && c <= '9')) {
			return false
		}
	}
	return true
}

func parseUint(b []byte) (uint32, bool) {
	if len(b) == 0 || len(b) > 10 {
		return 0, false
	}
	var v uint64
	for _, c := range b {
		if c < '0' || c > '9' {
			return 0, false
		}
		v = v*10 + uint64(c-'0')
	}
	if v > 1<<32-1 {
		return 0, false
	}
	return uint32(v), true
}

var pow10 = [...]float64{1, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9}

// parseDecimal parses [-]digits[.digits] with at most 15 significant digits
// and 9 decimals, without allocating.
func parseDecimal(b []byte) (float64, bool) {
	if len(b) == 0 {
		return 0, false
	}
	neg := false
	if b[0] == '-' || b[0] == '+' {
		neg = b[0] == '-'
		b = b[1:]
	}
	// The integer part, then the fraction: two tight loops.
	var mant uint64
	i := 0
	for i < len(b) && b[i]-'0' <= 9 {
		mant = mant*10 + uint64(b[i]-'0')
		i++
	}
	digits, frac := i, 0
	if i < len(b) {
		if b[i] != '.' {
			return 0, false
		}
		i++
		start := i
		for i < len(b) && b[i]-'0' <= 9 {
			mant = mant*10 + uint64(b[i]-'0')
			i++
		}
		frac = i - start
		if i < len(b) || frac == 0 {
			return 0, false // a stray byte, or a point without decimals
		}
		digits += frac
	}
	if digits == 0 || digits > 15 || frac > 9 {
		return 0, false
	}
	v := float64(mant)
	if frac > 0 {
		v /= pow10[frac]
	}
	if neg {
		v = -v
	}
	return v, true
}

// AppendFrame appends a framed line for the readings, with its checksum and a
// trailing newline, to dst. Values are written in the shortest form that
// reads back exactly, or rounded to fit the protocol's 15 digits and 9
// decimals; a reading that is NaN, infinite or of magnitude 1e15 or more
// cannot be written and is left out. It allocates only to grow dst.
func AppendFrame(dst []byte, seq, ms uint32, readings []Reading) []byte {
	start := len(dst)
	dst = append(dst, 'P', '1', ',')
	dst = strconv.AppendUint(dst, uint64(seq), 10)
	dst = append(dst, ',')
	dst = strconv.AppendUint(dst, uint64(ms), 10)
	for i := range readings {
		r := &readings[i]
		if math.IsNaN(r.Value) || math.IsInf(r.Value, 0) || math.Abs(r.Value) >= 1e15 {
			continue
		}
		dst = append(dst, ',')
		dst = append(dst, r.KeyBytes()...)
		dst = append(dst, '=')
		dst = appendValue(dst, r.Value)
		if r.MilliVolts {
			dst = append(dst, 'm')
		}
	}
	crc := CRC16(dst[start:])
	const hexd = "0123456789ABCDEF"
	dst = append(dst, '*', hexd[crc>>12], hexd[crc>>8&15], hexd[crc>>4&15], hexd[crc&15], '\n')
	return dst
}

// appendValue writes v so that parseDecimal accepts it: the shortest exact
// form if it fits 15 digits and 9 decimals, else v rounded to fit.
func appendValue(dst []byte, v float64) []byte {
	start := len(dst)
	dst = strconv.AppendFloat(dst, v, 'f', -1, 64)
	for prec := 9; ; prec-- {
		if _, ok := parseDecimal(dst[start:]); ok || prec < 0 {
			return dst
		}
		dst = strconv.AppendFloat(dst[:start], v, 'f', prec, 64)
	}
}

// ParseDelimited splits a delimited line into up to len(dst) numbers and
// returns how many it found. sep is the delimiter byte; ' ' also folds runs
// of spaces and tabs.
func ParseDelimited(line []byte, sep byte, dst []float64) (int, error) {
	if len(line) > MaxLine {
		return 0, &ParseError{Kind: ErrTooLong, Offset: MaxLine}
	}
	n, i, field := 0, 0, 0
	for i <= len(line) {
		if sep == ' ' {
			for i < len(line) && (line[i] == ' ' || line[i] == '\t') {
				i++
			}
			if i == len(line) {
				break
			}
		}
		j := i
		for j < len(line) && line[j] != sep && !(sep == ' ' && line[j] == '\t') {
			j++
		}
		if n == len(dst) {
			return n, &ParseError{Kind: ErrTooMany, Offset: i, Field: field}
		}
		tok := trimSpace(line[i:j])
		v, ok := parseDecimal(tok)
		if !ok {
			return n, &ParseError{Kind: ErrNumber, Offset: i, Field: field}
		}
		dst[n] = v
		n++
		field++
		i = j + 1
	}
	return n, nil
}

func trimSpace(b []byte) []byte {
	for len(b) > 0 && (b[0] == ' ' || b[0] == '\t') {
		b = b[1:]
	}
	for len(b) > 0 && (b[len(b)-1] == ' ' || b[len(b)-1] == '\t' || b[len(b)-1] == '\r') {
		b = b[:len(b)-1]
	}
	return b
}
