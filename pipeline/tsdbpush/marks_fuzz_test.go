package tsdbpush

import (
	"slices"
	"testing"
)

// FuzzMarks feeds arbitrary bytes to the reader of the marks file: it never
// panics, keeps only well-formed marks (0 ≤ start ≤ end), and what it keeps
// is written and read back unchanged.
func FuzzMarks(f *testing.F) {
	f.Add([]byte("20261202T074204.792Z 0 1045 0\n20261202T080000.000Z 1045 99000 1\n"))
	f.Add([]byte("r 5 4 0\nr 1 2 x\nr -1 2 0\n r 1 2 1 extra\n"))
	f.Add([]byte("a 0 1 0\r\nb 1 2 1"))
	f.Add([]byte{})
	f.Fuzz(func(t *testing.T, b []byte) {
		got := parseMarks(b)
		for _, m := range got {
			if m.start < 0 || m.end < m.start || m.name == "" {
				t.Fatalf("kept a malformed mark %+v from %q", m, b)
			}
		}
		back := parseMarks(formatMarks(got))
		if !slices.Equal(back, got) {
			t.Fatalf("round trip: %+v, read back %+v", got, back)
		}
	})
}
