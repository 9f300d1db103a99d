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
	// tab is what a draw reads, one row next to the other so that a row
	// sits in one or two cache lines: the row at table offset off (c
	// states) is tab[2·off : 2·off+c], the cumulative row of q (see pick),
	// followed by tab[2·off+c : 2·off+2c], the factor each state
	// contributes to the weight: P(x|row)/Q(x|row) times the soft
	// likelihood (0 where Q = 0), or P(e|row) for an observed variable.
	tab []float64
	// steps are the variables a draw visits, in topological order:
	// relevant ones (see Sampler.relevant) except observed variables
	// whose parents are all observed, whose factor P(e|parents) is the
	// same in every sample and is folded into constM·2^constE. sampled
	// lists the unobserved ones among them.
	steps   []step
	sampled []int32
	constM  float64
	constE  int
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

// step is one variable as a track's draw visits it.
type step struct {
	v    int32 // the variable
	card int32
	tab2 int32 // 2·(offset of row 0): where its rows start in track.tab
	pBeg int32 // parents are parVar[pBeg:pEnd], multipliers parMul2[pBeg:pEnd]
	pEnd int32
	ev   int32 // observed state in this track, or -1
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
	parMul2 []int32 // 2·parMul: row offsets in track.tab
	// relevant[v]: v is a target, observed, or an ancestor of one. The
	// other variables are barren (Shachter 1986, Operations Research
	// 34:871-882): summing them out leaves P(targets, evidence) unchanged,
	// so draws skip them.
	relevant []bool
	rowCard  []int32 // the number of states at the start offset of every table row
	prob     []float64
	lik      []float64
	// Targets of the main track.
	tOff    []int32
	clamped []int
	states  int
	hasEv   bool
	baseEv  []int32
	tracks  []*track
	learn   LearningReport
	initial *Stats    // the initial block of every track
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
	s.rowCard = make([]int32, 0, total)
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
			s.parMul2 = append(s.parMul2, int32(2*x.Strides[j]*c))
		}
		nd.pEnd = int32(len(s.parVar))
		s.prob = append(s.prob, x.CPT...)
		for len(s.rowCard) < len(s.prob) {
			s.rowCard = append(s.rowCard, int32(c))
			for range c - 1 {
				s.rowCard = append(s.rowCard, 0)
			}
		}
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
	s.relevant = make([]bool, n)
	for v := range net.Vars {
		s.relevant[v] = s.baseEv[v] >= 0 || ev.Soft[v] != nil
	}
	for _, t := range s.targets {
		s.relevant[t] = true
	}
	for v := n - 1; v >= 0; v-- {
		if s.relevant[v] {
			for _, p := range net.Vars[v].Parents {
				s.relevant[p] = true
			}
		}
	}
	return nil
}

// plan lists the steps of track t and folds the factors of observed
// variables whose parents are all observed into constM·2^constE.
func (s *Sampler) plan(t *track) {
	t.steps, t.sampled = t.steps[:0], t.sampled[:0]
	t.constM, t.constE = 1, 0
	for v := range s.nodes {
		if !s.relevant[v] {
			continue
		}
		nd := &s.nodes[v]
		e := t.ev[v]
		if e >= 0 {
			off := int(nd.tab)
			fixed := true
			for j := nd.pBeg; j < nd.pEnd; j++ {
				pe := t.ev[s.parVar[j]]
				if pe < 0 {
					fixed = false
					break
				}
				off += int(pe * s.parMul[j])
			}
			if fixed {
				m, x := math.Frexp(t.constM * s.prob[off+int(e)])
				t.constM, t.constE = m, t.constE+x
				continue
			}
		} else {
			t.sampled = append(t.sampled, int32(v))
		}
		t.steps = append(t.steps, step{v: int32(v), card: nd.card, tab2: 2 * nd.tab, pBeg: nd.pBeg, pEnd: nd.pEnd, ev: e})
	}
}

// fillEvidence sets the observed variables of track t in x.
func fillEvidence(t *track, x []int32) {
	for v, e := range t.ev {
		if e >= 0 {
			x[v] = e
		}
	}
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
	t.tab = make([]float64, 2*len(s.prob))
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
		// The two propagations are independent: with more than one
		// worker the upward pass runs beside the loopy one.
		var up *bpResult
		done := make(chan struct{})
		if s.opt.Workers > 1 {
			go func() {
				defer close(done)
				up = propagate(s.net, t.ev, soft, 1)
			}()
		} else {
			up = propagate(s.net, t.ev, soft, 1)
			close(done)
		}
		t.bp = propagate(s.net, t.ev, soft, bpMaxSweeps)
		<-done
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
	s.plan(t)
	if t.constM == 0 {
		t.impossible = true
	}
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

// rebuild recomputes the draw table of t from t.q, the bound on t's
// weights (over the steps of a draw) and the mass a draw may waste on
// states without support.
func (s *Sampler) rebuild(t *track) {
	log2Max := math.Log2(t.constM) + float64(t.constE)
	t.waste = 0
	for _, st := range t.steps {
		u := int(st.v)
		nd := &s.nodes[u]
		c := int(nd.card)
		rows := s.net.Vars[u].Rows
		best, worst := 0.0, 0.0
		for r := 0; r < rows; r++ {
			off := int(nd.tab) + r*c
			p := s.prob[off : off+c]
			q := t.q[off : off+c]
			cum := t.tab[2*off : 2*off+c]
			fac := t.tab[2*off+c : 2*off+2*c]
			if e := t.ev[u]; e >= 0 {
				// An observed variable is not drawn: its factor is P(e|row).
				for k := range cum {
					cum[k] = 2
				}
				copy(fac, p)
				best = math.Max(best, p[e])
				continue
			}
			last := 0
			zero := 0.0
			supported := false
			for k := range q {
				if q[k] > 0 {
					last = k
				}
				if t.zero[u][k] {
					zero += q[k]
				} else if p[k] > 0 {
					supported = true
				}
			}
			// A row none of whose possible states has support gives
			// weight 0 whatever it draws: the waste lies in reaching it,
			// which the parents' rows account for (or which samples show).
			if supported {
				worst = math.Max(worst, zero)
			}
			sum := 0.0
			for k := range q {
				sum += q[k]
				cum[k] = sum
				if k >= last {
					cum[k] = 2 // u < 1 always stops here, whatever the rounding
				}
				fac[k] = 0
				if q[k] > 0 {
					f := p[k] / q[k]
					if nd.lik >= 0 {
						f *= s.lik[int(nd.lik)+k]
					}
					fac[k] = f
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
// its weight P(x, e)/Q(x) divided by 2^t.log2Ref. x must hold t's
// observed states (fillEvidence); a draw sets the sampled ones. A sample
// that contradicts the evidence returns 0 as soon as that is known.
// drawRows is the same draw (the same numbers) that also records, for
// learning, the table offset of the drawn entry (row offset plus state) of
// the j-th sampled variable in cells[j], in the order of t.sampled.
func (s *Sampler) draw(t *track, r *sampling.Rand, x []int32) float64 {
	steps, parVar, parMul2, tab := t.steps, s.parVar, s.parMul2, t.tab
	w := t.constM
	shift := 0
	for i := range steps {
		st := &steps[i]
		off := st.tab2
		pv := parVar[st.pBeg:st.pEnd]
		pm := parMul2[st.pBeg:st.pEnd]
		pm = pm[:len(pv)]
		for j, p := range pv {
			off += x[p] * pm[j]
		}
		c := st.card
		row := tab[off : off+2*c]
		if e := st.ev; e >= 0 {
			w *= row[c+e]
		} else {
			k := pick(row[:c], r.Float64())
			x[st.v] = k
			w *= row[c+k]
		}
		if outOfRange(w) {
			if w == 0 {
				return 0
			}
			w, shift = rescale(w, shift)
		}
	}
	return math.Ldexp(w, 500*shift+t.constE-t.log2Ref)
}

func (s *Sampler) drawRows(t *track, r *sampling.Rand, x, cells []int32) float64 {
	steps, parVar, parMul2, tab := t.steps, s.parVar, s.parMul2, t.tab
	w := t.constM
	shift := 0
	j := 0
	for i := range steps {
		st := &steps[i]
		off := st.tab2
		pv := parVar[st.pBeg:st.pEnd]
		pm := parMul2[st.pBeg:st.pEnd]
		pm = pm[:len(pv)]
		for j, p := range pv {
			off += x[p] * pm[j]
		}
		c := st.card
		row := tab[off : off+2*c]
		if e := st.ev; e >= 0 {
			w *= row[c+e]
		} else {
			k := pick(row[:c], r.Float64())
			x[st.v] = k
			w *= row[c+k]
			cells[j] = off>>1 + k
			j++
		}
		if outOfRange(w) {
			if w == 0 {
				return 0
			}
			w, shift = rescale(w, shift)
		}
	}
	return math.Ldexp(w, 500*shift+t.constE-t.log2Ref)
}

// outOfRange reports whether w (≥ 0) lies outside [2^-500, 2^501): one
// comparison on the exponent bits.
func outOfRange(w float64) bool {
	return (math.Float64bits(w)>>52)-(1023-500) >= 1001
}

// rescale brings a positive w back into range, counting the shift in
// units of 2^500.
func rescale(w float64, shift int) (float64, int) {
	if w < 0x1p-500 {
		return w * 0x1p500, shift - 1
	}
	return w * 0x1p-500, shift + 1
}

// pick returns the state whose cumulative range holds u: the number of
// entries of the cumulative row c that are <= u. Small rows are scanned
// without branches, since u is random and a branch on it is mispredicted
// about every other time (the last entry is 2, so it is never counted).
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
