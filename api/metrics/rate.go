package metrics

import (
	"sync"
	"time"
)

// rateWindowSeconds is the length of the sample-rate window.
const rateWindowSeconds = 10

// rateWindow counts samples per method in one-second buckets and reports
// the mean rate over the last whole seconds: a ring of rateWindowSeconds
// buckets, each stamped with the Unix second it counts.
type rateWindow struct {
	mu      sync.Mutex
	seconds int64
	start   int64 // Unix second the window was created
	rings   map[string][]bucket
}

type bucket struct {
	sec int64
	n   int64
}

func newRateWindow(seconds int64, now time.Time) *rateWindow {
	return &rateWindow{seconds: seconds, start: now.Unix(), rings: map[string][]bucket{}}
}

func (w *rateWindow) add(key string, n int64, now time.Time) {
	sec := now.Unix()
	w.mu.Lock()
	defer w.mu.Unlock()
	ring, ok := w.rings[key]
	if !ok {
		ring = make([]bucket, w.seconds)
		w.rings[key] = ring
	}
	b := &ring[mod(sec, w.seconds)]
	if b.sec != sec {
		*b = bucket{sec: sec}
	}
	b.n += n
}

// rate is the samples per second over the whole seconds [now-S, now), where
// S is the window length, or the whole seconds since the window started
// when that is shorter; 0 before the first whole second.
func (w *rateWindow) rate(key string, now time.Time) float64 {
	sec := now.Unix()
	span := min(w.seconds, sec-w.start)
	if span <= 0 {
		return 0
	}
	w.mu.Lock()
	defer w.mu.Unlock()
	var total int64
	for _, b := range w.rings[key] {
		if b.sec >= sec-span && b.sec < sec {
			total += b.n
		}
	}
	return float64(total) / float64(span)
}

func mod(a, b int64) int64 {
	r := a % b
	if r < 0 {
		r += b
	}
	return r
}
