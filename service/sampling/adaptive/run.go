package adaptive

import (
	"context"
	"fmt"
	"runtime"
	"sync/atomic"
	"time"

	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
)

// abortEvery is how many samples a block draws between looks at the abort flag.
const abortEvery = 1024

// ReasonEpsDelta is the stop reason of a run ended by the (ε, δ) rule.
const ReasonEpsDelta = "eps_delta"

func defaultWorkers() int { return runtime.GOMAXPROCS(0) }

// Tracks is the number of tracks (the main one first).
func (s *Sampler) Tracks() int { return len(s.tracks) }

// Targets returns the target variables in the order of the marginals.
func (s *Sampler) Targets() []int { return append([]int(nil), s.targets...) }

// Learning describes the learning phase.
func (s *Sampler) Learning() LearningReport { return s.learn }

// PerTrackSamples is the most samples each track draws under stop (the
// initial block included): the stop's MaxSamples shared equally by the
// tracks.
func (s *Sampler) PerTrackSamples(stop sampling.Stop) int64 {
	return max(1, stop.MaxSamples/int64(len(s.tracks)))
}

// InitialStats returns a copy of the statistics of the initial block: the
// samples drawn from the final importance functions at the end of
// learning (the pilot among them). Every run's merged statistics start
// from them; blocks 0, 1, 2, ... are merged onto them.
func (s *Sampler) InitialStats() *Stats { return s.initial.Clone() }

// Remaining is the samples per track left for the blocks under stop: the
// track's share of MaxSamples less the initial block. Block b of a run
// draws sampling.BlockLen(b, blockSize, s.Remaining(stop)) samples.
func (s *Sampler) Remaining(stop sampling.Stop) int64 {
	return max(0, s.PerTrackSamples(stop)-s.initial.Tracks[0].N)
}

// RunBlock draws block `block` of a run with the given seed: n samples for
// every track, track i from its own stream of (seed, block) only. dst is
// overwritten (its storage reused). Merging blocks 0, 1, 2, ... gives the
// same bits wherever they were drawn.
func (s *Sampler) RunBlock(seed uint64, block int64, n int, dst *Stats) {
	s.runBlock(seed, block, n, dst, nil)
}

func (s *Sampler) runBlock(seed uint64, block int64, n int, dst *Stats, abort *atomic.Bool) bool {
	s.reset(dst)
	if n <= 0 {
		return true
	}
	for i := range s.tracks {
		if !s.runTrack(seed, block, n, i, &dst.Tracks[i], abort) {
			return false
		}
	}
	dst.Blocks = 1
	return true
}

// runTrack draws n samples of track i from its stream of (seed, block)
// into ts (reset beforehand).
func (s *Sampler) runTrack(seed uint64, block int64, n, i int, ts *TrackStats, abort *atomic.Bool) bool {
	t := s.tracks[i]
	ts.N = int64(n)
	ts.Blocks = 1
	if t.impossible {
		return true
	}
	x := make([]int32, len(s.nodes))
	fillEvidence(t, x)
	top := topHeap(ts.Top[:0])
	if cap(top) < TopWeights {
		top = make([]float64, 0, TopWeights)
	}
	// Sums of w and w² per target state of the main track, interleaved so
	// that both sit in one cache line.
	var acc2 []float64
	if i == 0 {
		acc2 = make([]float64, 2*s.states)
	}
	targets, tOff := s.targets, s.tOff
	tOff = tOff[:len(targets)]
	r := sampling.NewStream(seed, trackStream(i, block))
	var acc int64
	var sumW, sumW2, maxW float64
	for k := 0; k < n; k++ {
		if k&(abortEvery-1) == abortEvery-1 && abort != nil && abort.Load() {
			return false
		}
		w := s.draw(t, &r, x)
		if !(w > 0) {
			continue
		}
		acc++
		sumW += w
		w2 := w * w
		sumW2 += w2
		if w > maxW {
			maxW = w
		}
		if len(top) < TopWeights || w > top[0] {
			top.push(w)
		}
		if i == 0 {
			for ti, v := range targets {
				j := 2 * (tOff[ti] + x[v])
				a := acc2[j : j+2 : j+2]
				a[0] += w
				a[1] += w2
			}
		}
	}
	ts.Accepted, ts.SumW, ts.SumW2, ts.MaxW = acc, sumW, sumW2, maxW
	ts.Top = top.sorted(make([]float64, 0, len(top)))
	if i == 0 {
		for j := range ts.StateW {
			ts.StateW[j], ts.StateW2[j] = acc2[2*j], acc2[2*j+1]
		}
	}
	return true
}

// StopReason tells whether a run whose merged statistics are st has
// finished under stop (normalised): ReasonAbsErr or ReasonRelErr when every
// target interval and P(evidence) meet the precision rule, ReasonEpsDelta
// when the (ε, δ) rule holds on every track, ReasonMaxSamples when every
// track drew its share of stop.MaxSamples, "" otherwise.
func (s *Sampler) StopReason(st *Stats, stop sampling.Stop) string {
	return s.stopReason(st, stop, nil)
}

func (s *Sampler) stopReason(st *Stats, stop sampling.Stop, buf []sampling.Interval) string {
	if stop.AbsErr > 0 || stop.RelErr > 0 {
		if r := stop.PrecisionMet(s.precisionIntervals(st, confidenceOf(stop), buf)); r != "" {
			return r
		}
	}
	if s.opt.EpsDelta != nil && s.epsDeltaMet(st) {
		return ReasonEpsDelta
	}
	if st.Tracks[0].N >= s.PerTrackSamples(stop) {
		return sampling.ReasonMaxSamples
	}
	return ""
}

// Run estimates the posterior marginals of targets given ev with the
// adaptive importance sampler: NewSampler, then Sampler.Run.
func Run(ctx context.Context, net *model.Network, ev *model.Evidence, targets []int, opt Options) (*Result, error) {
	start := time.Now()
	s, err := NewSampler(ctx, net, ev, targets, opt)
	if err != nil {
		return nil, err
	}
	return s.run(ctx, start)
}

// Run draws blocks on the sampler's Workers goroutines and merges them
// strictly in block order, so that the same seed gives the same bits
// whatever the number of workers. It stops at the first rule that holds;
// on timeout or cancellation it returns the estimate of the blocks merged
// so far (stop reason timeout or cancelled), not an error.
func (s *Sampler) Run(ctx context.Context) (*Result, error) {
	return s.run(ctx, time.Now())
}

func (s *Sampler) run(ctx context.Context, start time.Time) (*Result, error) {
	stop := s.opt.Stop
	bs := s.opt.BlockSize
	remaining := s.Remaining(stop)
	buf := make([]sampling.Interval, 0, s.states+1)
	prev := make([]float64, len(s.tracks))
	plan := sampling.BlockPlan[*Stats]{
		Blocks:  sampling.NumBlocks(remaining, bs),
		Workers: s.opt.Workers,
		Start:   start,
		Timeout: stop.Timeout,
		New:     s.NewStats,
		First:   s.InitialStats,
		Run: func(b int64, st *Stats, abort *atomic.Bool) bool {
			return s.runBlock(s.opt.Seed, b, sampling.BlockLen(b, bs, remaining), st, abort)
		},
		Merge: func(merged, st *Stats, b int64) error {
			return s.mergeBlock(merged, st, b, prev)
		},
		Stop:  func(merged *Stats) string { return s.stopReason(merged, stop, buf) },
		Every: s.opt.ProgressEvery,
	}
	if s.opt.Progress != nil {
		plan.Progress = func(merged *Stats) { s.opt.Progress(s.result(merged, "", start)) }
	}
	merged, reason, err := sampling.RunBlocks(ctx, plan)
	if err != nil {
		return nil, err
	}
	if reason == "" && plan.Blocks == 0 {
		reason = s.stopReason(merged, stop, buf)
	}
	return s.result(merged, reason, start), nil
}

// MergeBlock adds the statistics of block b (drawn by RunBlock) into
// merged, which holds the initial block and blocks 0..b-1, and marks where
// the (ε, δ) rule's sums crossed their threshold.
func (s *Sampler) MergeBlock(merged, blk *Stats, b int64) error {
	return s.mergeBlock(merged, blk, b, make([]float64, len(s.tracks)))
}

func (s *Sampler) mergeBlock(merged, blk *Stats, b int64, prev []float64) error {
	for i := range prev {
		prev[i] = merged.Tracks[i].SumW
	}
	if err := merged.Merge(blk); err != nil {
		return fmt.Errorf("adaptive: %w: %w", sampling.ErrInternal, err)
	}
	if s.opt.EpsDelta != nil {
		s.markCrossings(merged, prev, b, blk)
	}
	return nil
}

func (s *Sampler) result(merged *Stats, reason string, start time.Time) *Result {
	res := s.Summarize(merged, s.opt.Stop)
	res.Estimate.Seed = s.opt.Seed
	res.Estimate.StopReason = reason
	res.Estimate.Elapsed = time.Since(start)
	return res
}
