package jobs

import (
	"fmt"
	"time"

	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/sampling"
	"github.com/beliefd/beliefd/service/sampling/adaptive"
)

// State is a job's state.
type State string

// Job states. Queued and running jobs are unfinished; the others are terminal.
const (
	StateQueued    State = "queued"
	StateRunning   State = "running"
	StateSucceeded State = "succeeded"
	StateFailed    State = "failed"
	StateCancelled State = "cancelled"
)

// Terminal reports whether the state is final.
func (s State) Terminal() bool {
	return s == StateSucceeded || s == StateFailed || s == StateCancelled
}

// Priority orders claimable jobs: higher first.
type Priority int

// Priorities.
const (
	PriorityLow    Priority = 0
	PriorityNormal Priority = 1
	PriorityHigh   Priority = 2
)

// ParsePriority reads "low", "normal" (or "") and "high".
func ParsePriority(s string) (Priority, error) {
	switch s {
	case "low":
		return PriorityLow, nil
	case "", "normal":
		return PriorityNormal, nil
	case "high":
		return PriorityHigh, nil
	}
	return 0, fmt.Errorf("%w: priority %q (want low, normal or high)", infer.ErrBadQuery, s)
}

func (p Priority) String() string {
	switch p {
	case PriorityLow:
		return "low"
	case PriorityHigh:
		return "high"
	}
	return "normal"
}

// Job is a job record as kept by a Store.
type Job struct {
	ID string `json:"id"`
	// Tenant owns the job ("" is the open tenant).
	Tenant   string      `json:"tenant,omitempty"`
	State    State       `json:"state"`
	Priority Priority    `json:"priority"`
	Query    infer.Query `json:"query"`
	// Model is the resolved model version the job runs on.
	Model        ModelInfo     `json:"model"`
	Method       string        `json:"method"`
	MethodReason string        `json:"method_reason,omitempty"`
	Seed         uint64        `json:"seed"`
	Stop         sampling.Stop `json:"stop"`
	// BlockSize and Blocks plan a block-wise sampling job: Blocks blocks of
	// BlockSize samples (the last may be shorter). Exact inference and Gibbs
	// sampling run as one unit: Blocks == 1, BlockSize == 0.
	BlockSize int   `json:"block_size,omitempty"`
	Blocks    int64 `json:"blocks"`
	// Merged holds the statistics of blocks 0..MergedBlocks-1
	// (MergedAdaptive for adaptive importance sampling).
	Merged         *sampling.Stats `json:"merged,omitempty"`
	MergedAdaptive *adaptive.Stats `json:"merged_adaptive,omitempty"`
	MergedBlocks   int64           `json:"merged_blocks"`
	// Result is the latest result document: partial while running.
	Result *infer.Result `json:"result,omitempty"`
	// ResultAt is when Result was last written (partial results are
	// written at most every Config.PartialEvery); zero before the first.
	ResultAt       time.Time `json:"result_at,omitzero"`
	Error          string    `json:"error,omitempty"`
	IdempotencyKey string    `json:"idempotency_key,omitempty"`
	CreatedAt      time.Time `json:"created_at"`
	StartedAt      time.Time `json:"started_at,omitzero"`
	UpdatedAt      time.Time `json:"updated_at"`
	FinishedAt     time.Time `json:"finished_at,omitzero"`
	// Deadline is when the job ends at the latest (its stop timeout, or the
	// service's job deadline); zero for none.
	Deadline time.Time `json:"deadline,omitzero"`
	// Retention is how long the record is kept after it finishes.
	Retention time.Duration `json:"retention"`
}

// Blockwise reports whether the job's work is cut into blocks that many
// workers share (forward, rejection, likelihood weighting and adaptive
// importance sampling).
func (j *Job) Blockwise() bool { return j.BlockSize > 0 }

// Clone returns a copy whose statistics may be changed without touching
// j. The result document is shared: results are replaced, never changed in place.
func (j *Job) Clone() *Job {
	c := *j
	if j.Merged != nil {
		c.Merged = j.Merged.Clone()
	}
	if j.MergedAdaptive != nil {
		c.MergedAdaptive = j.MergedAdaptive.Clone()
	}
	return &c
}
