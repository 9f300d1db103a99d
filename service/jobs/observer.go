package jobs

import "time"

// Observer receives the events that metrics are made of. The service and
// the worker runtime call it; a Prometheus implementation lives with the
// transport (api/metrics) and is wired in by cmd. Implementations must be
// safe for concurrent use and fast. Label values come from small fixed sets
// (method names, job states, outcomes): never IDs.
type Observer interface {
	// SamplesDrawn counts samples drawn by a worker for a method.
	SamplesDrawn(method string, n int64)
	// BlockDone records the duration of one block (or single work unit)
	// and its outcome: "committed", "lost_lease", "cancelled", "error".
	BlockDone(method, outcome string, d time.Duration)
	// JobSubmitted counts a new job.
	JobSubmitted(method string)
	// JobFinished records a job reaching a terminal state, its run time
	// from creation, and for sampling jobs the final widest relative
	// half-width and effective-sample ratio (NaN when not applicable).
	JobFinished(method string, state State, d time.Duration, relHalfWidth, essRatio float64)
}

// NopObserver ignores every event.
type NopObserver struct{}

// SamplesDrawn implements Observer.
func (NopObserver) SamplesDrawn(string, int64) {}

// BlockDone implements Observer.
func (NopObserver) BlockDone(string, string, time.Duration) {}

// JobSubmitted implements Observer.
func (NopObserver) JobSubmitted(string) {}

// JobFinished implements Observer.
func (NopObserver) JobFinished(string, State, time.Duration, float64, float64) {}

var _ Observer = NopObserver{}
