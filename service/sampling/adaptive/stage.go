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
// the rows visited (each row's update is independent of the others, so
// their order does not matter). stateW sums the weights per target state
// (main track only), for the expected length of the run. A chunk counts
// visits per table entry in cellVisits while it draws (one index per
// sampled variable and sample, no branch) and turns them into row visits
// and touched rows at its end; cells holds the drawn entries of a sample.
type stageStats struct {
	counts     []float64
	visits     []int32
	touched    []int32
	stateW     []float64
	cellVisits []int32
	cells      []int32
	x          []int32
	n          int64
	sumW       float64
	sumW2      float64
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
	if st.cellVisits == nil {
		st.cellVisits = make([]int32, len(s.prob))
		st.x = make([]int32, len(s.nodes))
	}
	if cap(st.cells) < len(t.sampled) {
		st.cells = make([]int32, len(t.sampled))
	}
	x, cells := st.x, st.cells[:len(t.sampled)]
	fillEvidence(t, x)
	r := sampling.NewStream(s.opt.Seed, learnStream(i, stage, c))
	targets, tOff := s.targets, s.tOff
	counts, cellVisits := st.counts, st.cellVisits
	for k := 0; k < n; k++ {
		if k&(abortEvery-1) == abortEvery-1 && abort.Load() {
			clear(cellVisits) // st may be used again
			return false
		}
		w := s.drawRows(t, &r, x, cells)
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
		for _, e := range cells {
			counts[e] += w
			cellVisits[e]++
		}
	}
	// Row visits (counted on the row's first entry) and the rows touched.
	for _, v := range t.sampled {
		nd := &s.nodes[v]
		c := int(nd.card)
		for off := int(nd.tab); off < int(nd.tab)+s.net.Vars[v].Rows*c; off += c {
			cv := cellVisits[off : off+c]
			sum := int32(0)
			for _, n := range cv {
				sum += n
			}
			if sum > 0 {
				st.visits[off] = sum
				st.touched = append(st.touched, int32(off))
				clear(cv)
			}
		}
	}
	st.n = int64(n)
	return true
}
