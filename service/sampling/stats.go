package sampling

import (
	"errors"
	"fmt"
)

// ErrStatsMismatch is wrapped when statistics of different layouts are merged.
var ErrStatsMismatch = errors.New("statistics layouts differ")

// Stats are the sufficient statistics of one block of samples, or of a
// merged run of blocks. They are plain data, serialisable as JSON (float64
// values round-trip exactly through encoding/json), and merge by addition.
//
// A weight w is attached to each sample: 1 for forward sampling, 1 or 0
// (accepted or rejected) for rejection sampling, the likelihood weight for
// likelihood weighting. StateW and StateW2 hold, for every state of every
// target (targets in the kernel's order, each target's states in order),
// the sums of w and of w² over the samples in that state.
type Stats struct {
	// Blocks is the number of blocks merged into these statistics.
	Blocks int64 `json:"blocks"`
	// N is the number of samples drawn.
	N int64 `json:"n"`
	// Accepted counts the samples of positive weight.
	Accepted int64 `json:"accepted"`
	// SumW and SumW2 are the sums of w and w² over all samples.
	SumW  float64 `json:"sum_w"`
	SumW2 float64 `json:"sum_w2"`
	// MaxW is the largest weight.
	MaxW float64 `json:"max_w"`
	// StateW[j] is the sum of w over samples where target state j holds.
	StateW []float64 `json:"state_w"`
	// StateW2[j] is the sum of w² over the same samples (likelihood
	// weighting only; nil for the counting samplers, where it equals StateW).
	StateW2 []float64 `json:"state_w2,omitempty"`
}

// Merge adds o into s. Merging blocks 0, 1, 2, ... in order gives the same
// bits wherever the blocks were computed.
func (s *Stats) Merge(o *Stats) error {
	if len(s.StateW) != len(o.StateW) || len(s.StateW2) != len(o.StateW2) {
		return fmt.Errorf("sampling: merge: %w: %d/%d target states against %d/%d",
			ErrStatsMismatch, len(s.StateW), len(s.StateW2), len(o.StateW), len(o.StateW2))
	}
	s.Blocks += o.Blocks
	s.N += o.N
	s.Accepted += o.Accepted
	s.SumW += o.SumW
	s.SumW2 += o.SumW2
	if o.MaxW > s.MaxW {
		s.MaxW = o.MaxW
	}
	for i, v := range o.StateW {
		s.StateW[i] += v
	}
	for i, v := range o.StateW2 {
		s.StateW2[i] += v
	}
	return nil
}

// Clone returns a deep copy of s.
func (s *Stats) Clone() *Stats {
	c := *s
	c.StateW = append([]float64(nil), s.StateW...)
	if s.StateW2 != nil {
		c.StateW2 = append([]float64(nil), s.StateW2...)
	}
	return &c
}

// CheckLayout reports whether s has the layout of k's statistics, for
// statistics read back from storage.
func (k *Kernel) CheckLayout(s *Stats) error {
	want2 := 0
	if k.method == MethodLikelihoodWeighting {
		want2 = k.states
	}
	if len(s.StateW) != k.states || len(s.StateW2) != want2 {
		return fmt.Errorf("sampling: %w: have %d/%d target states, the %s kernel has %d/%d",
			ErrStatsMismatch, len(s.StateW), len(s.StateW2), k.method, k.states, want2)
	}
	return nil
}

// NumBlocks is the number of blocks of size blockSize that draw maxSamples
// samples (the last block may be short).
func NumBlocks(maxSamples int64, blockSize int) int64 {
	if maxSamples <= 0 || blockSize <= 0 {
		return 0
	}
	return (maxSamples + int64(blockSize) - 1) / int64(blockSize)
}

// BlockLen is the number of samples block k draws in a run of maxSamples
// samples cut into blocks of blockSize: blockSize, except for a short last
// block, and 0 past the end.
func BlockLen(k int64, blockSize int, maxSamples int64) int {
	if k < 0 || blockSize <= 0 {
		return 0
	}
	start := k * int64(blockSize)
	if start >= maxSamples || start/int64(blockSize) != k {
		return 0
	}
	return int(min(int64(blockSize), maxSamples-start))
}
