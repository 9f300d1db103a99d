// Package jobstest holds the conformance suite that every jobs.Store
// backend runs in its own tests (Run), and small helpers for tests of the
// job service and its runtime: a manual clock and a goroutine-leak check.
package jobstest

import (
	"runtime"
	"strings"
	"sync"
	"testing"
	"time"
)

// Clock is a manual clock for tests: it stands still until Advance.
type Clock struct {
	mu sync.Mutex
	t  time.Time
}

// NewClock returns a clock that reads start.
func NewClock(start time.Time) *Clock { return &Clock{t: start} }

// Now returns the clock's time.
func (c *Clock) Now() time.Time {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.t
}

// Advance moves the clock forward by d.
func (c *Clock) Advance(d time.Duration) {
	c.mu.Lock()
	defer c.mu.Unlock()
	c.t = c.t.Add(d)
}

// CheckGoroutines fails t if, when t ends, more goroutines run than when
// CheckGoroutines was called, after waiting up to five seconds for them to
// end. Tests that call it must not run in parallel with others.
func CheckGoroutines(t testing.TB) {
	t.Helper()
	before := runtime.NumGoroutine()
	t.Cleanup(func() {
		deadline := time.Now().Add(5 * time.Second)
		for {
			n := runtime.NumGoroutine()
			if n <= before {
				return
			}
			if time.Now().After(deadline) {
				buf := make([]byte, 1<<16)
				buf = buf[:runtime.Stack(buf, true)]
				t.Errorf("goroutine leak: %d goroutines running, %d before the test\n%s", n, before, firstLines(string(buf), 80))
				return
			}
			time.Sleep(10 * time.Millisecond)
		}
	})
}

func firstLines(s string, n int) string {
	lines := strings.SplitN(s, "\n", n+1)
	if len(lines) > n {
		lines = lines[:n]
	}
	return strings.Join(lines, "\n")
}

// Eventually polls cond every 10ms until it holds, failing t after within.
func Eventually(t testing.TB, within time.Duration, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(within)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("still not true after %s: %s", within, what)
		}
		time.Sleep(10 * time.Millisecond)
	}
}
