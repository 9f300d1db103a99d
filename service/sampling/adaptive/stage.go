package adaptive

import (
	"context"
	"fmt"
	"math"
	"sync/atomic"

	"github.com/beliefd/beliefd/service/sampling"
)

// learnChunk is the samples of one chunk of a learning stage. A stage is
// cut into chunks drawn on the workers, each from its own stream, and
// merged in chunk order, so the learned tables do not depend on the
// number of workers.
const learnChunk = 1024

// stageStats are the weighted state counts of (a chunk of) a learning
// stage: counts[off+k] sums the weights of the samples that drew state k
// in the table row at offset off, visits[off] counts them; touched lists
// the rows visited, in first-visit order. stateW sums the weights per
// target state (main track only), for the expected length of the run.
type stageStats struct {
	counts  []float64
	visits  []int32
	touched []int32
	stateW  []float64
	n       int64
	sumW    float64
	sumW2   float64
}

func (s *Sampler) newStageStats() *stageStats {
	return &stageStats{counts: make([]float64, len(s.prob)), visits: make([]int32, len(s.prob)), stateW: make([]float64, s.states)}
}

// reset clears what the previous use touched.
func (s *Sampler) resetStage(st *stageStats) {
	for _, off := range st.touched {
		c := int(s.rowCard[off])
		clear(st.counts[off : int(off)+c])
		st.visits[off] = 0
	}
	st.touched = st.touched[:0]
	clear(st.stateW)
	st.n, st.sumW, st.sumW2 = 0, 0, 0
}

// mergeStage adds the chunk o into st.
func (s *Sampler) mergeStage(st, o *stageStats) {
	for _, off := range o.touched {
		c := int(s.rowCard[off])
		if st.visits[off] == 0 {
			st.touched = append(st.touched, off)
		}
		st.visits[off] += o.visits[off]
		dst, src := st.counts[off:int(off)+c], o.counts[off:int(off)+c]
		for k := range dst {
			dst[k] += src[k]
		}
	}
	for k := range st.stateW {
		st.stateW[k] += o.stateW[k]
	}
	st.n += o.n
	st.sumW += o.sumW
	st.sumW2 += o.sumW2
}

// drawStage draws stage `stage` of track t (number i): m samples from the
// current importance function, in chunks of learnChunk on the workers,
// chunk c from NewStream(seed, learnStream(i, stage, c)).
func (s *Sampler) drawStage(ctx context.Context, t *track, i, stage, m int) (*stageStats, error) {
	chunks := int64((m + learnChunk - 1) / learnChunk)
	plan := sampling.BlockPlan[*stageStats]{
		Blocks:  chunks,
		Workers: s.opt.Workers,
		New:     s.newStageStats,
		Run: func(c int64, st *stageStats, abort *atomic.Bool) bool {
			n := min(learnChunk, m-int(c)*learnChunk)
			return s.drawChunk(t, i, stage, c, n, st, abort)
		},
		Merge: func(merged, st *stageStats, _ int64) error {
			s.mergeStage(merged, st)
			return nil
		},
		Stop: func(*stageStats) string { return "" },
	}
	merged, reason, err := sampling.RunBlocks(ctx, plan)
	if err != nil {
		return nil, fmt.Errorf("adaptive: learning: %w", err)
	}
	if reason != "" {
		return nil, fmt.Errorf("adaptive: learning: %w", context.Cause(ctx))
	}
	return merged, nil
}

func (s *Sampler) drawChunk(t *track, i, stage int, c int64, n int, st *stageStats, abort *atomic.Bool) bool {
	s.resetStage(st)
	x := make([]int32, len(s.nodes))
	offs := make([]int32, len(s.nodes))
	fillEvidence(t, x)
	r := sampling.NewStream(s.opt.Seed, learnStream(i, stage, c))
	targets, tOff := s.targets, s.tOff
	counts, visits := st.counts, st.visits
	for k := 0; k < n; k++ {
		if k&(abortEvery-1) == abortEvery-1 && abort.Load() {
			return false
		}
		w := s.drawRows(t, &r, x, offs)
		if !(w > 0) {
			continue
		}
		st.sumW += w
		st.sumW2 += w * w
		if i == 0 {
			for ti, v := range targets {
				st.stateW[int(tOff[ti])+int(x[v])] += w
			}
		}
		if s.opt.temper > 0 {
			w = math.Pow(w, s.opt.temper)
		}
		for _, v := range t.sampled {
			off := offs[v]
			if visits[off] == 0 {
				st.touched = append(st.touched, off)
			}
			visits[off]++ // row visits counted on the row's first entry
			counts[off+x[v]] += w
		}
	}
	st.n = int64(n)
	return true
}
