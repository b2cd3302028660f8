package tsdbpush

import (
	"context"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"testing"
	"time"
)

// BenchmarkAppend measures Append of recorder-shaped ~110-byte lines while
// Run writes the backlog to disk and sends it to a local endpoint. Lines
// per call: 1 (worst case) and 100 (what one recorder sync hands over).
// lines/s is the rate Append sustains (what the recorder sees);
// kept_lines/s the part that the writer could also put on disk on this
// machine, the rest being dropped and counted as designed.
func BenchmarkAppend(b *testing.B) {
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		io.Copy(io.Discard, r.Body)
		w.WriteHeader(http.StatusNoContent)
	}))
	defer srv.Close()
	for _, per := range []int{1, 100} {
		b.Run(fmt.Sprintf("lines_per_call=%d", per), func(b *testing.B) {
			p, err := Open(Config{
				URL:             srv.URL + "/write?db=plenum&precision=ns",
				Dir:             b.TempDir(),
				MaxBacklogBytes: 1 << 30,
				FlushEvery:      100 * time.Millisecond,
				Logger:          slog.New(slog.NewTextHandler(io.Discard, nil)),
			})
			if err != nil {
				b.Fatal(err)
			}
			ctx, cancel := context.WithCancel(context.Background())
			done := make(chan error, 1)
			go func() { done <- p.Run(ctx) }()
			var chunk []byte
			for _, l := range genLines(per, 1700000000000000000) {
				chunk = append(chunk, l...)
			}
			b.SetBytes(int64(len(chunk)))
			b.ReportAllocs()
			b.ResetTimer()
			for b.Loop() {
				if err := p.Append(chunk); err != nil {
					b.Fatal(err)
				}
			}
			b.StopTimer()
			sec := b.Elapsed().Seconds()
			b.ReportMetric(float64(b.N*per)/sec, "lines/s")
			// Lines taken into staging (not dropped because the disk writer
			// could not keep up with a loop that does nothing but Append).
			st := p.Stats()
			b.ReportMetric(float64(st.AppendedLines)/sec, "kept_lines/s")
			b.ReportMetric(float64(st.DroppedLines)/float64(b.N*per), "dropped/line")
			cancel()
			if err := <-done; err != nil {
				b.Fatal(err)
			}
			p.Close()
		})
	}
}
