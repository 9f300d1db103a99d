package adaptive

import (
	"errors"
	"fmt"
	"math"

	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
)

// Method is the method name of the adaptive importance sampler.
const Method = "adaptive-importance"

var (
	// ErrBadOptions is wrapped when Options cannot be used.
	ErrBadOptions = errors.New("bad adaptive sampling options")
	// ErrImpossibleEvidence is wrapped when propagation proves that the
	// evidence has probability zero.
	ErrImpossibleEvidence = errors.New("evidence has probability zero")
)

// node is one variable of the flattened network, in topological order.
type node struct {
	card int32 // number of states
	pBeg int32 // parents are parVar[pBeg:pEnd], row multipliers parMul[pBeg:pEnd]
	pEnd int32
	tab  int32 // offset of row 0 in the tables
	lik  int32 // offset of the soft likelihoods in lik, or -1
	cnt  int32 // offset of the variable's states in the main track's target statistics, or -1
}

// track is one importance function: the query's evidence (track 0) or the
// evidence plus one target state (a rare-state track).
type track struct {
	// v and state name the extra evidence (-1 for track 0).
	v, state int
	ev       []int32   // hard evidence per variable, -1 when unobserved
	q        []float64 // the importance tables, laid out like the CPTs
	q0       []float64 // the tables from propagation, kept as the defensive part
	floor    []float64 // the ε-cutoff's floor of every table entry
	qcum     []float64 // cumulative rows of q (see pick)
	ratio    []float64 // P(x|row)/Q(x|row) where Q > 0
	// log2Ref: weights are stored divided by 2^log2Ref (a power of two near
	// the estimate from learning), so that sums of squares of weights
	// around 1e-200 neither underflow nor lose precision.
	log2Ref int
	// log2Max is log2 of a bound on every stored (scaled) weight.
	log2Max float64
	// waste bounds the probability that a sample draws a state propagation
	// found impossible (weight 0): the sum over variables of the largest
	// such mass in a row. Samples that avoid them have a mean weight up to
	// 1/(1-waste) times the estimated probability.
	waste float64
	bp    *bpResult
	zero  [][]bool // per variable and state: propagation found no support
	// impossible is set when propagation proved the track's evidence
	// impossible: its weights are all 0 and it is not sampled.
	impossible bool
}

// Sampler is an adaptive importance sampler for one network, evidence and
// list of targets, with its importance functions learned and frozen. It is
// immutable after NewSampler and safe for concurrent use.
type Sampler struct {
	net     *model.Network
	targets []int
	opt     Options
	nodes   []node
	parVar  []int32
	parMul  []int32
	prob    []float64
	lik     []float64
	// Targets of the main track.
	tOff    []int32
	clamped []int
	states  int
	hasEv   bool
	baseEv  []int32
	tracks  []*track
	learn   LearningReport
	epsilon []float64 // per variable: the ε of the cutoff
}

// flatten lays the network out for sampling.
func (s *Sampler) flatten(ev *model.Evidence) error {
	net := s.net
	n := len(net.Vars)
	s.nodes = make([]node, n)
	s.baseEv = make([]int32, n)
	total := 0
	for v := range net.Vars {
		total += len(net.Vars[v].CPT)
	}
	if total > math.MaxInt32-1 {
		return fmt.Errorf("adaptive: %w: %d table entries exceed %d", sampling.ErrTooLarge, total, math.MaxInt32-1)
	}
	s.prob = make([]float64, 0, total)
	s.epsilon = make([]float64, n)
	for v := range net.Vars {
		x := &net.Vars[v]
		c := x.Card()
		nd := &s.nodes[v]
		nd.card, nd.lik, nd.cnt = int32(c), -1, -1
		nd.tab = int32(len(s.prob))
		nd.pBeg = int32(len(s.parVar))
		for j, p := range x.Parents {
			s.parVar = append(s.parVar, int32(p))
			s.parMul = append(s.parMul, int32(x.Strides[j]*c))
		}
		nd.pEnd = int32(len(s.parVar))
		s.prob = append(s.prob, x.CPT...)
		s.baseEv[v] = int32(ev.Hard[v])
		if l := ev.Soft[v]; l != nil {
			nd.lik = int32(len(s.lik))
			s.lik = append(s.lik, l...)
		}
		s.epsilon[v] = s.opt.epsilonFor(c)
	}
	s.clamped = make([]int, len(s.targets))
	for i, t := range s.targets {
		if t < 0 || t >= n {
			return fmt.Errorf("adaptive: %w: target index %d is not a variable (the network has %d)", model.ErrBadEvidence, t, n)
		}
		if s.nodes[t].cnt >= 0 {
			return fmt.Errorf("adaptive: %w: target %q listed twice", model.ErrBadEvidence, net.Vars[t].Name)
		}
		s.nodes[t].cnt = int32(s.states)
		s.tOff = append(s.tOff, int32(s.states))
		s.clamped[i] = ev.Hard[t]
		s.states += net.Vars[t].Card()
	}
	return nil
}

// newTrack builds the importance function of a track from loopy belief
// propagation: Q(x | row) ∝ P(x | row) · λ(x), then the ε-cutoff.
func (s *Sampler) newTrack(v, state int, soft [][]float64) *track {
	t := &track{v: v, state: state, ev: append([]int32(nil), s.baseEv...)}
	if v >= 0 {
		t.ev[v] = int32(state)
	}
	t.q = make([]float64, len(s.prob))
	t.floor = make([]float64, len(s.prob))
	t.qcum = make([]float64, len(s.prob))
	t.ratio = make([]float64, len(s.prob))
	// Two importance functions from propagation, mixed row by row: loopy
	// belief propagation to convergence, and a single upward pass. Loopy
	// propagation can settle on one of several explanations of the
	// evidence (explaining away around a loop) and all but exclude the
	// others; the upward pass credits every explanation, overconfidently.
	// The mixture keeps every explanation within reach of the learning
	// stages, which then correct the proportions.
	var lams [][][]float64
	if s.opt.NoPropagation {
		t.bp = &bpResult{lambda: make([][]float64, len(s.nodes))}
		for u := range s.nodes {
			t.bp.lambda[u] = ones(int(s.nodes[u].card))
			if h := t.ev[u]; h >= 0 {
				for k := range t.bp.lambda[u] {
					if k != int(h) {
						t.bp.lambda[u][k] = 0
					}
				}
			}
		}
		lams = [][][]float64{t.bp.lambda}
	} else {
		t.bp = propagate(s.net, t.ev, soft, bpMaxSweeps)
		up := propagate(s.net, t.ev, soft, 1)
		t.bp.contradiction = t.bp.contradiction || up.contradiction
		lams = [][][]float64{t.bp.lambda, up.lambda}
	}
	t.impossible = t.bp.contradiction
	// zero[u][k]: no propagation found support for state k of u.
	t.zero = make([][]bool, len(s.nodes))
	for u := range s.nodes {
		t.zero[u] = make([]bool, s.nodes[u].card)
		for k := range t.zero[u] {
			z := true
			for _, l := range lams {
				z = z && l[u][k] == 0
			}
			t.zero[u][k] = z
		}
	}
	tmp := make([]float64, 0, 16)
	for u := range s.nodes {
		nd := &s.nodes[u]
		c := int(nd.card)
		rows := s.net.Vars[u].Rows
		for r := 0; r < rows; r++ {
			off := int(nd.tab) + r*c
			p := s.prob[off : off+c]
			q := t.q[off : off+c]
			if t.ev[u] >= 0 {
				copy(q, p) // evidence variables are not sampled
				continue
			}
			clear(q)
			fl := t.floor[off : off+c]
			for k := range q {
				fl[k] = math.Min(p[k], s.epsilon[u])
				if t.zero[u][k] {
					// Propagation found no support for the state: it keeps a
					// tiny floor, so that the support of Q stays that of P.
					fl[k] *= zeroSupportFloor
				}
			}
			for _, lam := range lams {
				tmp = tmp[:0]
				sum := 0.0
				for k := range p {
					x := p[k] * lam[u][k]
					tmp = append(tmp, x)
					sum += x
				}
				if !(sum > 0) {
					tmp = append(tmp[:0], p...) // the row is impossible given the evidence: keep the prior
					sum = 1
				}
				for k := range q {
					q[k] += tmp[k] / sum / float64(len(lams))
				}
			}
			cutoff(q, p, fl)
		}
	}
	t.q0 = append([]float64(nil), t.q...)
	s.rebuild(t)
	return t
}

// zeroSupportFloor scales the floor of states that propagation found
// impossible given the evidence: such zeros are sound (propagation removes
// only states that no assignment consistent with the evidence uses), so
// sampling them is waste, but the floor keeps the estimator unbiased if a
// zero came from rounding.
const zeroSupportFloor = 1e-6

// cutoff applies the ε-cutoff to an importance row q against its prior row
// p and floors fl (min(p, ε), smaller for states without support): every
// state with p > 0 gets q ≥ its floor, the rest of the mass is rescaled,
// and states with p = 0 keep q = 0. So q > 0 exactly where p > 0 (the
// estimator stays unbiased) and each factor p/q of a weight is at most
// max(1, p/ε) ≤ 1/ε for states with support.
func cutoff(q, p, fl []float64) {
	for range len(q) + 1 {
		fixed, free := 0.0, 0.0
		for k := range q {
			if p[k] <= 0 {
				q[k] = 0
				continue
			}
			if f := fl[k]; q[k] <= f {
				q[k] = f
				fixed += f
			} else {
				free += q[k]
			}
		}
		if free <= 0 || fixed >= 1 {
			// Every positive state is at its floor: fall back to the prior.
			copy(q, p)
			return
		}
		scale := (1 - fixed) / free
		done := true
		for k := range q {
			if p[k] <= 0 {
				continue
			}
			if f := fl[k]; q[k] > f {
				q[k] *= scale
				if q[k] < f {
					done = false
				}
			}
		}
		if done {
			return
		}
	}
}

// rebuild recomputes the cumulative rows and weight ratios of t from t.q,
// and the bound on t's weights.
func (s *Sampler) rebuild(t *track) {
	log2Max := 0.0
	t.waste = 0
	for u := range s.nodes {
		nd := &s.nodes[u]
		c := int(nd.card)
		rows := s.net.Vars[u].Rows
		best, worst := 0.0, 0.0
		for r := 0; r < rows; r++ {
			off := int(nd.tab) + r*c
			p := s.prob[off : off+c]
			q := t.q[off : off+c]
			if e := t.ev[u]; e >= 0 {
				best = math.Max(best, p[e])
				continue
			}
			last := 0
			zero := 0.0
			for k := range q {
				if q[k] > 0 {
					last = k
				}
				if t.zero[u][k] {
					zero += q[k]
				}
			}
			worst = math.Max(worst, zero)
			cum := 0.0
			for k := range q {
				cum += q[k]
				if k >= last {
					cum = 2 // u < 1 always stops here, whatever the rounding
				}
				t.qcum[off+k] = cum
				t.ratio[off+k] = 0
				if q[k] > 0 {
					t.ratio[off+k] = p[k] / q[k]
					f := t.ratio[off+k]
					if nd.lik >= 0 {
						f *= s.lik[int(nd.lik)+k]
					}
					best = math.Max(best, f)
				}
			}
		}
		if best > 0 {
			log2Max += math.Log2(best)
		}
		t.waste += worst
	}
	t.waste = math.Min(1, t.waste)
	t.log2Max = log2Max - float64(t.log2Ref)
}

// draw draws one sample x from track t's importance function and returns
// its weight P(x, e)/Q(x) divided by 2^t.log2Ref. When offs is not nil it
// receives the table offset of every variable's row. A sample that
// contradicts the evidence returns 0 as soon as that is known.
func (s *Sampler) draw(t *track, r *sampling.Rand, x []int32, offs []int32) float64 {
	nodes, parVar, parMul, prob, lik := s.nodes, s.parVar, s.parMul, s.prob, s.lik
	ev, qcum, ratio := t.ev, t.qcum, t.ratio
	x = x[:len(nodes)]
	ev = ev[:len(nodes)]
	w := 1.0
	shift := 0
	for v := range nodes {
		nd := &nodes[v]
		off := nd.tab
		pv := parVar[nd.pBeg:nd.pEnd]
		pm := parMul[nd.pBeg:nd.pEnd]
		pm = pm[:len(pv)]
		for j, p := range pv {
			off += x[p] * pm[j]
		}
		if offs != nil {
			offs[v] = off
		}
		if e := ev[v]; e >= 0 {
			x[v] = e
			w *= prob[off+e]
		} else {
			st := pick(qcum[off:off+nd.card], r.Float64())
			x[v] = st
			w *= ratio[off+st]
			if nd.lik >= 0 {
				w *= lik[nd.lik+st]
			}
		}
		if w < 0x1p-500 {
			if w == 0 {
				return 0
			}
			w *= 0x1p500
			shift--
		} else if w > 0x1p500 {
			w *= 0x1p-500
			shift++
		}
	}
	return math.Ldexp(w, 500*shift-t.log2Ref)
}

// pick returns the state whose cumulative range holds u: the number of
// entries of the cumulative row c that are <= u.
func pick(c []float64, u float64) int32 {
	s := int32(0)
	for u >= c[s] {
		s++
	}
	return s
}
