package serial

import (
	"fmt"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
)

// BenchmarkFirmwareRates finds the highest frame rate the reference
// firmware sustains with its default inputs (six, 4× oversampling) at
// 115 200 and 1 000 000 baud: for each frame period it builds the
// firmware, runs it for 10 s of emulated time in simavr with four-digit
// millivolt readings on every input and a 6789 rpm pulse train, and
// reports the frames per second achieved, the frames skipped because the
// transmit ring was full, the bytes per line and the share of CPU cycles
// awake. A rate is sustained when no frame is skipped and no burst of
// conversions overruns. Periods whose conversions cannot fit do not
// build (config.h's static checks). Needs PLENUM_INTEGRATION=1:
//
//	PLENUM_INTEGRATION=1 go test ./drivers/serial -run '^$' -bench FirmwareRates -benchtime 1x
//
// simavr counts 11 bit times a byte at 8N1 (it adds a parity bit), where
// the wire takes 10, so its figures at a given baud rate are about 9%
// below what a real board achieves.
func BenchmarkFirmwareRates(b *testing.B) {
	fwTools(b)
	dir := b.TempDir()
	harness := fwHarness(b, dir)
	for _, baud := range []string{"115200", "1000000"} {
		best := 0.0
		for _, period := range []int{10, 9, 8, 7, 6, 5, 4, 3} {
			name := fmt.Sprintf("baud=%s/period=%dms", baud, period)
			out := filepath.Join(dir, fmt.Sprintf("b%s_p%d", baud, period))
			args := []string{"-s", "-C", filepath.Join(firmwareDir, "atmega328p"), "OUT=" + out,
				"PM_BAUD=" + baud + "UL", "PM_FRAME_PERIOD_MS=" + strconv.Itoa(period)}
			msg, err := exec.Command("make", args...).CombinedOutput()
			if err != nil && !strings.Contains(string(msg), "do not fit its period") {
				b.Fatalf("make %v: %v\n%s", args, err, msg)
			}
			elf := filepath.Join(out, "plenum-mcu.elf")
			b.Run(name, func(b *testing.B) {
				if err != nil {
					b.Logf("%s: does not build: the conversions of one frame do not fit the period", name)
					return
				}
				var done map[string]uint64
				for i := 0; i < b.N; i++ {
					msg, err := exec.Command(harness, "-f", elf, "-n", "-m", "1111,2222,3333,4444,4888,3777",
						"-s", "6789:10000", "-t", "10000", "-y", fwSymbols(b, elf)).CombinedOutput()
					if err != nil {
						b.Fatalf("harness: %v\n%s", err, msg)
					}
					for _, l := range strings.Split(string(msg), "\n") {
						if m, ok := harnessDone(l); ok {
							done = m
						}
					}
					if done == nil {
						b.Fatalf("harness gave no counts:\n%s", msg)
					}
				}
				fps := float64(done["lines"]) / 10
				cpu := 100 * float64(done["cycles"]-done["asleep"]) / float64(done["cycles"])
				b.ReportMetric(fps, "frames/s")
				b.ReportMetric(float64(done["frames_skipped"]), "skipped")
				b.ReportMetric(float64(done["bytes"])/float64(done["lines"]), "bytes/line")
				b.ReportMetric(cpu, "cpu_%")
				sustained := done["frames_skipped"] == 0 && done["bursts_overrun"] == 0
				if sustained && 1000/float64(period) > best {
					best = 1000 / float64(period)
				}
				b.Logf("%s: %.1f frames/s, %d skipped, %d overruns, %.1f bytes/line, CPU awake %.1f%%, sustained %v",
					name, fps, done["frames_skipped"], done["bursts_overrun"], float64(done["bytes"])/float64(done["lines"]), cpu, sustained)
			})
		}
		b.Run("baud="+baud+"/highest", func(b *testing.B) {
			b.ReportMetric(best, "frames/s")
			b.Logf("baud %s: highest sustained rate %.1f frames/s", baud, best)
		})
	}
}
