package backlog

import (
	"bytes"
	"testing"
)

// FuzzSegment feeds arbitrary bytes to the readers of backlog files: the
// torn-tail cut and batch cutting of a segment, the cursor file and segment
// file names. None may panic; cut batches must tile the whole lines exactly.
func FuzzSegment(f *testing.F) {
	f.Add([]byte("plenum,channel=a value=1,quality=\"ok\" 1\nplenum,channel=a value=2 2\n"), formatCursor(10), uint16(1), "seg-00000000000000000000.lp")
	f.Add([]byte("a 1\nb 2\ntorn"), []byte("tsdbpush cursor v1 acked=4 crc=deadbeef\n"), uint16(0), "seg-1.lp")
	f.Add([]byte("\n\n\n"), []byte("tsdbpush cursor v1 acked="), uint16(2), "seg-99999999999999999999.lp")
	f.Add([]byte{}, []byte{}, uint16(5000), "cursor")
	f.Fuzz(func(t *testing.T, seg, cursor []byte, maxLines uint16, name string) {
		keep := wholeLen(seg)
		if keep < 0 || keep > len(seg) || (keep > 0 && seg[keep-1] != '\n') || bytes.IndexByte(seg[keep:], '\n') >= 0 {
			t.Fatalf("wholeLen %d of %q", keep, seg)
		}
		whole := seg[:keep]
		var joined []byte
		for rest := whole; len(rest) > 0; {
			n := batchCut(rest, int(maxLines))
			if n <= 0 || n > len(rest) || rest[n-1] != '\n' {
				t.Fatalf("batchCut %d of %q", n, rest)
			}
			if maxLines > 0 && bytes.Count(rest[:n], []byte{'\n'}) > int(maxLines) {
				t.Fatalf("batch of %d lines, limit %d", bytes.Count(rest[:n], []byte{'\n'}), maxLines)
			}
			joined = append(joined, rest[:n]...)
			rest = rest[n:]
		}
		if !bytes.Equal(joined, whole) {
			t.Fatal("batches do not tile the segment")
		}
		if acked, err := parseCursor(cursor); err == nil {
			if acked < 0 || !bytes.Equal(formatCursor(acked), cursor) {
				t.Fatalf("cursor %q parsed as %d but formats as %q", cursor, acked, formatCursor(acked))
			}
		}
		if start, ok := parseSegmentName(name); ok && segmentName(start) != name {
			t.Fatalf("name %q parsed as %d", name, start)
		}
	})
}
