package backlog

import (
	"bytes"
	"fmt"
	"hash/crc32"
	"strconv"
	"strings"
)

// Parsers and formatters of the backlog files. Every function here takes
// bytes from disk and never panics on them (FuzzSegment).

const (
	segPrefix    = "seg-"
	segSuffix    = ".lp"
	segDigits    = 20
	cursorPrefix = "tsdbpush cursor v1 acked="
	crcMark      = " crc="
)

// segmentName is the file name of the segment starting at offset start.
func segmentName(start int64) string {
	return fmt.Sprintf("%s%0*d%s", segPrefix, segDigits, start, segSuffix)
}

// parseSegmentName returns the start offset named by a segment file name.
func parseSegmentName(name string) (int64, bool) {
	if len(name) != len(segPrefix)+segDigits+len(segSuffix) ||
		!strings.HasPrefix(name, segPrefix) || !strings.HasSuffix(name, segSuffix) {
		return 0, false
	}
	digits := name[len(segPrefix) : len(segPrefix)+segDigits]
	for i := 0; i < len(digits); i++ {
		if digits[i] < '0' || digits[i] > '9' {
			return 0, false
		}
	}
	n, err := strconv.ParseInt(digits, 10, 64)
	if err != nil || n < 0 {
		return 0, false
	}
	return n, true
}

// wholeLen is the length of b up to and including its last newline: the part
// of a segment made of whole lines.
func wholeLen(b []byte) int {
	return bytes.LastIndexByte(b, '\n') + 1
}

// batchCut returns the length of the longest prefix of b that is made of at
// most maxLines whole lines (0 if b holds no whole line).
func batchCut(b []byte, maxLines int) int {
	end := wholeLen(b)
	if maxLines <= 0 {
		return end
	}
	n, pos := 0, 0
	for pos < end {
		i := bytes.IndexByte(b[pos:end], '\n')
		pos += i + 1
		n++
		if n == maxLines {
			return pos
		}
	}
	return end
}

// formatCursor encodes the cursor file.
func formatCursor(acked int64) []byte {
	body := cursorPrefix + strconv.FormatInt(acked, 10)
	return fmt.Appendf(nil, "%s%s%08x\n", body, crcMark, crc32.ChecksumIEEE([]byte(body)))
}

// parseCursor decodes the cursor file; errors name the byte offset.
func parseCursor(b []byte) (int64, error) {
	if !bytes.HasPrefix(b, []byte(cursorPrefix)) {
		return 0, fmt.Errorf("cursor: byte 0: want %q", cursorPrefix)
	}
	nl := bytes.IndexByte(b, '\n')
	if nl < 0 {
		return 0, fmt.Errorf("cursor: byte %d: no newline (torn write)", len(b))
	}
	if nl != len(b)-1 {
		return 0, fmt.Errorf("cursor: byte %d: data after the line", nl+1)
	}
	line := b[:nl]
	ci := bytes.LastIndex(line, []byte(crcMark))
	if ci < len(cursorPrefix) {
		return 0, fmt.Errorf("cursor: byte %d: no%q", len(line), crcMark)
	}
	num := string(line[len(cursorPrefix):ci])
	acked, err := strconv.ParseInt(num, 10, 64)
	if err != nil || acked < 0 || num != strconv.FormatInt(acked, 10) {
		return 0, fmt.Errorf("cursor: byte %d: offset %q is not a non-negative decimal", len(cursorPrefix), num)
	}
	sum := string(line[ci+len(crcMark):])
	want, err := strconv.ParseUint(sum, 16, 32)
	if err != nil || len(sum) != 8 {
		return 0, fmt.Errorf("cursor: byte %d: crc %q is not 8 hex digits", ci+len(crcMark), sum)
	}
	if got := crc32.ChecksumIEEE(line[:ci]); uint32(want) != got {
		return 0, fmt.Errorf("cursor: byte %d: crc %08x, content has %08x", ci+len(crcMark), want, got)
	}
	return acked, nil
}
