// Package cantest holds what the kernel CAN interop tests share.
package cantest

import (
	"os"
	"testing"
)

// NeedKernel skips the test when err says the kernel has no CAN, unless the
// test runs inside the CAN VM or under PLENUM_INTEGRATION=1, where a missing
// kernel CAN is a failure.
func NeedKernel(t testing.TB, err error) {
	t.Helper()
	if err == nil {
		return
	}
	if os.Getenv("KERNEL_CAN_VM") == "1" || os.Getenv("PLENUM_INTEGRATION") == "1" {
		t.Fatalf("kernel CAN: %v", err)
	}
	t.Skipf("kernel CAN unavailable (run through kernel-can-run): %v", err)
}
