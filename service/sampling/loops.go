package sampling

import "sync/atomic"

// abortEvery is how many samples a block draws between looks at the abort
// flag (a power of two).
const abortEvery = 1024

// RunBlock draws block number `block` of a run with the given seed: n
// samples from NewStream(seed, block) only. dst is overwritten with the
// block's statistics (its storage is reused). Blocks are independent, so
// any number of goroutines, processes or machines may run them; merging the
// results in block order gives the same bits however they were spread.
func (k *Kernel) RunBlock(seed uint64, block int64, n int, dst *Stats) {
	k.runBlock(seed, block, n, dst, nil)
}

// runBlock is RunBlock that gives up (returning false, with dst unusable)
// when abort is set.
func (k *Kernel) runBlock(seed uint64, block int64, n int, dst *Stats, abort *atomic.Bool) bool {
	k.reset(dst)
	if n <= 0 {
		return true
	}
	r := NewStream(seed, uint64(block))
	x := make([]int32, len(k.nodes))
	var ok bool
	switch k.method {
	case MethodForward:
		ok = k.forward(&r, n, x, dst.StateW, abort)
		dst.Accepted = int64(n)
	case MethodRejection:
		var acc int64
		acc, ok = k.rejection(&r, n, x, dst.StateW, abort)
		dst.Accepted = acc
	default:
		ok = k.weighting(&r, n, x, dst, abort)
	}
	if !ok {
		return false
	}
	dst.Blocks = 1
	dst.N = int64(n)
	if k.method != MethodLikelihoodWeighting {
		dst.SumW = float64(dst.Accepted)
		dst.SumW2 = dst.SumW
		if dst.Accepted > 0 {
			dst.MaxW = 1
		}
	}
	return true
}

// forward draws n samples from the prior, counting target states into cnt.
func (k *Kernel) forward(r *Rand, n int, x []int32, cnt []float64, abort *atomic.Bool) bool {
	nodes, parVar, parMul, cum := k.nodes, k.parVar, k.parMul, k.cum
	x = x[:len(nodes)]
	for i := 0; i < n; i++ {
		if i&(abortEvery-1) == abortEvery-1 && abort != nil && abort.Load() {
			return false
		}
		for v := range nodes {
			nd := &nodes[v]
			off := nd.tab
			pv := parVar[nd.pBeg:nd.pEnd]
			pm := parMul[nd.pBeg:nd.pEnd]
			pm = pm[:len(pv)]
			for j, p := range pv {
				off += x[p] * pm[j]
			}
			s := pick(cum[off:off+nd.card], r.Float64())
			x[v] = s
			if nd.cnt >= 0 {
				cnt[nd.cnt+s]++
			}
		}
	}
	return true
}

// rejection draws n samples from the prior, stopping a sample as soon as it
// contradicts hard evidence or loses the acceptance draw of a soft-evidence
// variable (accepted with likelihood / largest likelihood), and counts the
// target states of the accepted samples into cnt.
func (k *Kernel) rejection(r *Rand, n int, x []int32, cnt []float64, abort *atomic.Bool) (int64, bool) {
	nodes, parVar, parMul, cum, lik := k.nodes, k.parVar, k.parMul, k.cum, k.lik
	tVar, tOff := k.tVar, k.tOff
	tOff = tOff[:len(tVar)]
	x = x[:len(nodes)]
	var acc int64
sample:
	for i := 0; i < n; i++ {
		if i&(abortEvery-1) == abortEvery-1 && abort != nil && abort.Load() {
			return 0, false
		}
		for v := range nodes {
			nd := &nodes[v]
			off := nd.tab
			pv := parVar[nd.pBeg:nd.pEnd]
			pm := parMul[nd.pBeg:nd.pEnd]
			pm = pm[:len(pv)]
			for j, p := range pv {
				off += x[p] * pm[j]
			}
			s := pick(cum[off:off+nd.card], r.Float64())
			x[v] = s
			if nd.ev >= 0 && s != nd.ev {
				continue sample
			}
			if nd.lik >= 0 {
				if a := lik[nd.lik+s]; a < 1 && r.Float64() >= a {
					continue sample
				}
			}
		}
		acc++
		for t, v := range tVar {
			cnt[tOff[t]+x[v]]++
		}
	}
	return acc, true
}

// weighting draws n likelihood-weighted samples: hard-evidence variables
// are set to their observed state and multiply the weight by its
// probability given the parents; soft-evidence variables are sampled and
// multiply the weight by the likelihood of the sampled state.
func (k *Kernel) weighting(r *Rand, n int, x []int32, dst *Stats, abort *atomic.Bool) bool {
	nodes, parVar, parMul, cum, prob, lik := k.nodes, k.parVar, k.parMul, k.cum, k.prob, k.lik
	tVar, tOff := k.tVar, k.tOff
	tOff = tOff[:len(tVar)]
	x = x[:len(nodes)]
	// Sums of w and w² per target state, interleaved so that both sit in
	// one cache line.
	acc2 := make([]float64, 2*len(dst.StateW))
	var acc int64
	var sumW, sumW2, maxW float64
sample:
	for i := 0; i < n; i++ {
		if i&(abortEvery-1) == abortEvery-1 && abort != nil && abort.Load() {
			return false
		}
		w := 1.0
		for v := range nodes {
			nd := &nodes[v]
			off := nd.tab
			pv := parVar[nd.pBeg:nd.pEnd]
			pm := parMul[nd.pBeg:nd.pEnd]
			pm = pm[:len(pv)]
			for j, p := range pv {
				off += x[p] * pm[j]
			}
			if e := nd.ev; e >= 0 {
				x[v] = e
				w *= prob[off+e]
				if w == 0 {
					continue sample
				}
				continue
			}
			s := pick(cum[off:off+nd.card], r.Float64())
			x[v] = s
			if nd.lik >= 0 {
				w *= lik[nd.lik+s]
				if w == 0 {
					continue sample
				}
			}
		}
		acc++
		sumW += w
		w2 := w * w
		sumW2 += w2
		if w > maxW {
			maxW = w
		}
		for t, v := range tVar {
			j := 2 * (tOff[t] + x[v])
			a := acc2[j : j+2 : j+2]
			a[0] += w
			a[1] += w2
		}
	}
	for j := range dst.StateW {
		dst.StateW[j], dst.StateW2[j] = acc2[2*j], acc2[2*j+1]
	}
	dst.Accepted, dst.SumW, dst.SumW2, dst.MaxW = acc, sumW, sumW2, maxW
	return true
}

// pick returns the state whose cumulative range holds u: the number of
// entries of the cumulative row c that are <= u. Small rows are scanned
// without branches, since u is random and a branch on it is mispredicted
// about every other time.
func pick(c []float64, u float64) int32 {
	if len(c) <= 4 {
		s := int32(0)
		for _, ck := range c[:len(c)-1] {
			s += b2i(u >= ck)
		}
		return s
	}
	s := int32(0)
	for u >= c[s] {
		s++
	}
	return s
}

func b2i(b bool) int32 {
	if b {
		return 1
	}
	return 0
}
