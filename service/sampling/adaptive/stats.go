package adaptive

import (
	"fmt"
	"slices"

	"github.com/beliefd/beliefd/service/sampling"
)

// TopWeights is the size of the buffer of largest weights kept per track
// for the tail-shape diagnostic: memory stays constant however many
// samples a run draws.
const TopWeights = 2048

// Stats are the statistics of a block, or of a merged run of blocks: one
// TrackStats per track. Sums merge by addition; the buffers of largest
// weights merge by keeping the TopWeights largest of both, which is the
// same multiset in whatever order blocks are merged.
type Stats struct {
	Blocks int64        `json:"blocks"`
	Tracks []TrackStats `json:"tracks"`
}

// TrackStats are one track's statistics. Weights are stored divided by
// 2^log2Ref of the track. For the main track, StateW and StateW2 hold the
// sums of w and w² per target state, as for likelihood weighting; rare
// tracks have none.
type TrackStats struct {
	sampling.Stats
	// Top holds the largest weights, in decreasing order.
	Top []float64 `json:"top"`
	// Crossed is the sample count at which the (ε, δ) rule's sum reached
	// its threshold (0 while it has not); set by the runner, never merged.
	Crossed int64 `json:"crossed,omitempty"`
}

// NewStats returns empty statistics laid out for s.
func (s *Sampler) NewStats() *Stats { return s.newStats() }

func (s *Sampler) newStats() *Stats {
	st := &Stats{Tracks: make([]TrackStats, len(s.tracks))}
	s.reset(st)
	return st
}

func (s *Sampler) reset(st *Stats) {
	st.Blocks = 0
	if len(st.Tracks) != len(s.tracks) {
		st.Tracks = make([]TrackStats, len(s.tracks))
	}
	for i := range st.Tracks {
		t := &st.Tracks[i]
		t.Blocks, t.N, t.Accepted, t.SumW, t.SumW2, t.MaxW, t.Crossed = 0, 0, 0, 0, 0, 0, 0
		n := 0
		if i == 0 {
			n = s.states
		}
		t.StateW = zeroed(t.StateW, n)
		t.StateW2 = zeroed(t.StateW2, n)
		t.Top = t.Top[:0]
	}
}

func zeroed(b []float64, n int) []float64 {
	if cap(b) < n {
		return make([]float64, n)
	}
	b = b[:n]
	clear(b)
	return b
}

// Merge adds o into st.
func (st *Stats) Merge(o *Stats) error {
	if len(st.Tracks) != len(o.Tracks) {
		return fmt.Errorf("adaptive: merge: %w: %d tracks against %d", sampling.ErrStatsMismatch, len(st.Tracks), len(o.Tracks))
	}
	for i := range st.Tracks {
		if err := st.Tracks[i].Stats.Merge(&o.Tracks[i].Stats); err != nil {
			return fmt.Errorf("adaptive: track %d: %w", i, err)
		}
		st.Tracks[i].Top = mergeTop(st.Tracks[i].Top, o.Tracks[i].Top)
	}
	st.Blocks += o.Blocks
	return nil
}

// Clone returns a deep copy of st.
func (st *Stats) Clone() *Stats {
	c := &Stats{Blocks: st.Blocks, Tracks: make([]TrackStats, len(st.Tracks))}
	for i := range st.Tracks {
		t := &st.Tracks[i]
		c.Tracks[i] = TrackStats{Stats: *t.Stats.Clone(), Top: slices.Clone(t.Top), Crossed: t.Crossed}
	}
	return c
}

// mergeTop merges two decreasing lists into the TopWeights largest, in
// decreasing order, reusing a's storage when it can.
func mergeTop(a, b []float64) []float64 {
	if len(b) == 0 {
		return a
	}
	out := make([]float64, 0, min(TopWeights, len(a)+len(b)))
	i, j := 0, 0
	for len(out) < TopWeights && (i < len(a) || j < len(b)) {
		if j >= len(b) || (i < len(a) && a[i] >= b[j]) {
			out = append(out, a[i])
			i++
		} else {
			out = append(out, b[j])
			j++
		}
	}
	return out
}

// topHeap keeps the TopWeights largest values pushed into it (a min-heap).
type topHeap []float64

func (h *topHeap) push(w float64) {
	a := *h
	if len(a) < TopWeights {
		a = append(a, w)
		i := len(a) - 1
		for i > 0 {
			p := (i - 1) / 2
			if a[p] <= a[i] {
				break
			}
			a[p], a[i] = a[i], a[p]
			i = p
		}
		*h = a
		return
	}
	if w <= a[0] {
		return
	}
	a[0] = w
	i := 0
	for {
		l := 2*i + 1
		if l >= len(a) {
			break
		}
		m := l
		if r := l + 1; r < len(a) && a[r] < a[l] {
			m = r
		}
		if a[i] <= a[m] {
			break
		}
		a[i], a[m] = a[m], a[i]
		i = m
	}
}

// sorted returns the kept values in decreasing order.
func (h topHeap) sorted(dst []float64) []float64 {
	dst = append(dst[:0], h...)
	slices.Sort(dst)
	slices.Reverse(dst)
	return dst
}

// CheckLayout reports whether st (decoded from a block's JSON, say) is laid
// out for s: one entry per track, the main track's sums per target state,
// a buffer of at most TopWeights largest weights.
func (s *Sampler) CheckLayout(st *Stats) error {
	if len(st.Tracks) != len(s.tracks) {
		return fmt.Errorf("adaptive: %w: %d tracks, the sampler has %d", sampling.ErrStatsMismatch, len(st.Tracks), len(s.tracks))
	}
	for i := range st.Tracks {
		t := &st.Tracks[i]
		want := 0
		if i == 0 {
			want = s.states
		}
		if len(t.StateW) != want || len(t.StateW2) != want {
			return fmt.Errorf("adaptive: %w: track %d has %d/%d state sums, want %d", sampling.ErrStatsMismatch, i, len(t.StateW), len(t.StateW2), want)
		}
		if len(t.Top) > TopWeights {
			return fmt.Errorf("adaptive: %w: track %d keeps %d largest weights, at most %d", sampling.ErrStatsMismatch, i, len(t.Top), TopWeights)
		}
	}
	return nil
}
