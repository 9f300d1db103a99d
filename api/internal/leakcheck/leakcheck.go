// Package leakcheck fails a test that leaves goroutines behind.
package leakcheck

import (
	"runtime"
	"testing"
	"time"
)

// settle bounds how long goroutines of a finished test may take to end.
const settle = 5 * time.Second

// Check records the number of goroutines now and, when the test ends,
// waits up to a few seconds for it to come back down; it fails the test
// with the stacks of every goroutine if it does not. Call it first in a
// test, so its cleanup runs last. Tests that use it must not run in parallel.
func Check(t testing.TB) {
	t.Helper()
	before := runtime.NumGoroutine()
	t.Cleanup(func() {
		deadline := time.Now().Add(settle)
		for {
			n := runtime.NumGoroutine()
			if n <= before {
				return
			}
			if time.Now().After(deadline) {
				buf := make([]byte, 1<<20)
				buf = buf[:runtime.Stack(buf, true)]
				t.Errorf("%d goroutines left behind (%d before, %d after):\n%s", n-before, before, n, buf)
				return
			}
			time.Sleep(10 * time.Millisecond)
		}
	})
}
