// Package latest hands the newest value of a stream to a slow reader: a
// one-slot channel that the producer side drains and refills, so a reader
// that falls behind skips intermediate values instead of working through a
// backlog (the way grpc-go's health Watch serves status changes).
package latest

import "context"

// Coalesce reads in eagerly and offers only its newest value on the
// returned channel. The returned channel is closed after the last value of
// in has been offered and in is closed, or when ctx ends; a value still in
// the slot when in closes is delivered before the close is seen.
func Coalesce[T any](ctx context.Context, in <-chan T) <-chan T {
	out := make(chan T, 1)
	go func() {
		defer close(out)
		for {
			select {
			case <-ctx.Done():
				return
			case v, ok := <-in:
				if !ok {
					return
				}
				// Drain the slot, then refill it. This goroutine is the only
				// sender, so after the drain the send cannot block.
				select {
				case <-out:
				default:
				}
				out <- v
			}
		}
	}()
	return out
}
