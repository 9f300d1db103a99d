package latest

import (
	"context"
	"testing"

	"github.com/beliefd/beliefd/api/internal/leakcheck"
)

// TestSlowReaderSeesLatest: a reader that does not read while 1000 values
// are produced sees at most two values afterwards (the one in the slot, and
// the newest if it was taken while the slot was being refilled), ending with
// the newest, then the close.
func TestSlowReaderSeesLatest(t *testing.T) {
	leakcheck.Check(t)
	in := make(chan int)
	out := Coalesce(context.Background(), in)
	for i := 1; i <= 1000; i++ {
		in <- i // returns once the coalescing goroutine took the value
	}
	close(in)
	var got []int
	for v := range out {
		got = append(got, v)
	}
	if len(got) == 0 || len(got) > 2 || got[len(got)-1] != 1000 || (len(got) == 2 && got[0] >= got[1]) {
		t.Fatalf("slow reader saw %v, want [1000] or [n 1000] with n < 1000", got)
	}
}

// TestFastReaderSeesAll: a reader that keeps up sees every value in order.
func TestFastReaderSeesAll(t *testing.T) {
	leakcheck.Check(t)
	in := make(chan int)
	out := Coalesce(context.Background(), in)
	for i := 1; i <= 100; i++ {
		in <- i
		if v := <-out; v != i {
			t.Fatalf("got %d, want %d", v, i)
		}
	}
	close(in)
	if v, ok := <-out; ok {
		t.Fatalf("got %d after close, want a closed channel", v)
	}
}

// TestContextEnds: ending ctx closes the output although in stays open.
func TestContextEnds(t *testing.T) {
	leakcheck.Check(t)
	ctx, cancel := context.WithCancel(context.Background())
	out := Coalesce(ctx, make(chan int))
	cancel()
	if _, ok := <-out; ok {
		t.Fatal("value after cancel, want a closed channel")
	}
}
