package gibbs

import (
	"errors"
	"fmt"
	"math"

	"github.com/beliefd/beliefd/service/model"
)

// ErrReducible is wrapped (by a *ReducibleError) when the model has zero
// probabilities where single-site Gibbs sampling could get stuck in part of
// the posterior and silently return wrong numbers.
var ErrReducible = errors.New("gibbs sampling may not reach every state")

// ErrImpossibleEvidence is wrapped when no starting state consistent with
// the evidence can be found: the evidence has probability zero (or is so
// constrained that forward draws never meet it).
var ErrImpossibleEvidence = errors.New("impossible evidence")

// ReducibleError names where a zero probability makes the Gibbs chain
// possibly reducible.
type ReducibleError struct {
	// Variable is an unobserved variable the sampler would have to move.
	Variable string
	// Table is the variable whose table holds the zero (Variable itself or
	// one of its children).
	Table string
	// Row and State locate the zero: Table's CPT row (last parent fastest)
	// and state index; Given and StateName spell them out.
	Row, State int
	Given      string // the parents' states of Row, such as "tub=no, lung=no"
	StateName  string
}

func (e *ReducibleError) Error() string {
	where := "its own table"
	if e.Table != e.Variable {
		where = fmt.Sprintf("the table of its child %q", e.Table)
	}
	given := ""
	if e.Given != "" {
		given = " | " + e.Given
	}
	return fmt.Sprintf("gibbs: %v: unobserved variable %q meets a zero probability in %s: P(%s=%s%s) = 0; "+
		"deterministic or zero entries can trap a single-site Gibbs chain and bias its answer, "+
		"so use likelihood weighting or exact inference for this model", ErrReducible, e.Variable, where, e.Table, e.StateName, given)
}

// Unwrap lets errors.Is find ErrReducible.
func (e *ReducibleError) Unwrap() error { return ErrReducible }

// plan is the network prepared for sampling: flat tables, the variables that
// matter for the query, and precomputed Markov-blanket links.
type plan struct {
	net    *model.Network
	card   []int32
	cpt    []float64 // all tables, concatenated
	cptOff []int     // start of variable v's table in cpt
	hard   []int32   // observed state or -1
	soft   [][]float64
	// order lists the relevant variables (ancestors of targets and
	// evidence, themselves included) in topological order; free lists the
	// unobserved ones among them, the Gibbs scan order.
	order []int32
	free  []int32
	// Parents of v: parVar[parStart[v]:parStart[v+1]] with their strides.
	parStart  []int32
	parVar    []int32
	parStride []int32
	// Relevant children of v and v's stride in each child's rows.
	chStart  []int32
	chVar    []int32
	chStride []int32
	// The scan: one entry per free variable, with its child links packed
	// for the inner loop.
	scan    []scanVar
	links   []childLink
	maxCard int
	targets []int
	// tOff[t] is the offset of target t's states in flat per-state arrays.
	tOff   []int
	nState int
}

// newPlan validates evidence and targets against the network and prepares
// the sampler. It refuses models where the chain could be reducible.
func newPlan(net *model.Network, ev *model.Evidence, targets []int) (*plan, error) {
	if net == nil || len(net.Vars) == 0 {
		return nil, fmt.Errorf("gibbs: no network given")
	}
	n := len(net.Vars)
	p := &plan{net: net, card: make([]int32, n), cptOff: make([]int, n+1), hard: make([]int32, n), soft: make([][]float64, n)}
	if err := p.setEvidence(ev); err != nil {
		return nil, err
	}
	if len(targets) == 0 {
		return nil, fmt.Errorf("gibbs: %w: no target variables given", model.ErrBadEvidence)
	}
	for _, t := range targets {
		if t < 0 || t >= n {
			return nil, fmt.Errorf("gibbs: %w: target index %d is out of range (the model has %d variables)", model.ErrBadEvidence, t, n)
		}
	}
	p.targets = append([]int(nil), targets...)
	p.tOff = make([]int, len(targets)+1)
	for i, t := range targets {
		p.tOff[i+1] = p.tOff[i] + net.Vars[t].Card()
	}
	p.nState = p.tOff[len(targets)]

	for v := range net.Vars {
		nd := &net.Vars[v]
		p.card[v] = int32(nd.Card())
		p.cptOff[v+1] = p.cptOff[v] + len(nd.CPT)
		if nd.Card() > p.maxCard {
			p.maxCard = nd.Card()
		}
	}
	p.cpt = make([]float64, p.cptOff[n])
	for v := range net.Vars {
		copy(p.cpt[p.cptOff[v]:], net.Vars[v].CPT)
	}

	// Relevant variables: the ancestral closure of targets and evidence.
	// Everything else is barren (unobserved with no evidence or target
	// below it) and sums out exactly, so it is neither sampled nor checked.
	rel := make([]bool, n)
	for _, t := range targets {
		rel[t] = true
	}
	for v := 0; v < n; v++ {
		if p.hard[v] >= 0 || p.soft[v] != nil {
			rel[v] = true
		}
	}
	for v := n - 1; v >= 0; v-- {
		if rel[v] {
			for _, q := range net.Vars[v].Parents {
				rel[q] = true
			}
		}
	}
	p.parStart = make([]int32, n+1)
	p.chStart = make([]int32, n+1)
	for v := 0; v < n; v++ {
		nd := &net.Vars[v]
		p.parStart[v+1] = p.parStart[v]
		p.chStart[v+1] = p.chStart[v]
		if !rel[v] {
			continue
		}
		p.order = append(p.order, int32(v))
		if p.hard[v] < 0 {
			p.free = append(p.free, int32(v))
		}
		for j, q := range nd.Parents {
			p.parVar = append(p.parVar, int32(q))
			p.parStride = append(p.parStride, int32(nd.Strides[j]))
			p.parStart[v+1]++
		}
		for _, c := range nd.Children {
			if !rel[c] {
				continue
			}
			cn := &net.Vars[c]
			for j, q := range cn.Parents {
				if q == v {
					p.chVar = append(p.chVar, int32(c))
					p.chStride = append(p.chStride, int32(cn.Strides[j]))
					p.chStart[v+1]++
				}
			}
		}
	}
	if err := p.checkSupport(); err != nil {
		return nil, err
	}
	for _, v32 := range p.free {
		v := int(v32)
		sv := scanVar{v: v32, card: p.card[v], off: p.cptOff[v], ls: int32(len(p.links)), soft: p.soft[v]}
		for j := p.chStart[v]; j < p.chStart[v+1]; j++ {
			c := p.chVar[j]
			s, cc := p.chStride[j], p.card[c]
			p.links = append(p.links, childLink{c: c, stride: s, card: cc, step: int(s) * int(cc), off: p.cptOff[c]})
		}
		sv.le = int32(len(p.links))
		p.scan = append(p.scan, sv)
	}
	return p, nil
}

// scanVar is a free variable as the sweep needs it.
type scanVar struct {
	v, card int32
	ls, le  int32 // its links: links[ls:le]
	off     int   // start of its table in plan.cpt
	soft    []float64
}

// childLink is a relevant child c of a free variable X: X's stride in c's
// rows, c's card, the distance between the entries for successive states of
// X (stride·card) and the start of c's table.
type childLink struct {
	c, stride, card int32
	step, off       int
}

func (p *plan) setEvidence(ev *model.Evidence) error {
	n := len(p.net.Vars)
	for v := range p.hard {
		p.hard[v] = -1
	}
	if ev == nil {
		return nil
	}
	if ev.Hard != nil && len(ev.Hard) != n {
		return fmt.Errorf("gibbs: %w: hard evidence has %d entries, the model has %d variables", model.ErrBadEvidence, len(ev.Hard), n)
	}
	if ev.Soft != nil && len(ev.Soft) != n {
		return fmt.Errorf("gibbs: %w: soft evidence has %d entries, the model has %d variables", model.ErrBadEvidence, len(ev.Soft), n)
	}
	for v, h := range ev.Hard {
		nd := &p.net.Vars[v]
		if h < -1 || h >= nd.Card() {
			return fmt.Errorf("gibbs: %w: hard evidence on %q is state %d, want -1 or 0..%d", model.ErrBadEvidence, nd.Name, h, nd.Card()-1)
		}
		p.hard[v] = int32(h)
	}
	for v, lik := range ev.Soft {
		if lik == nil {
			continue
		}
		nd := &p.net.Vars[v]
		if p.hard[v] >= 0 {
			return fmt.Errorf("gibbs: %w: variable %q has both hard and soft evidence; give one", model.ErrBadEvidence, nd.Name)
		}
		if len(lik) != nd.Card() {
			return fmt.Errorf("gibbs: %w: soft evidence on %q has %d likelihoods, want %d", model.ErrBadEvidence, nd.Name, len(lik), nd.Card())
		}
		pos := false
		for k, l := range lik {
			if math.IsNaN(l) || math.IsInf(l, 0) || l < 0 {
				return fmt.Errorf("gibbs: %w: soft evidence on %q: likelihood %d = %g must be finite and >= 0", model.ErrBadEvidence, nd.Name, k+1, l)
			}
			pos = pos || l > 0
		}
		if !pos {
			return fmt.Errorf("gibbs: %w: soft evidence on %q is zero for every state", model.ErrBadEvidence, nd.Name)
		}
		p.soft[v] = lik
	}
	return nil
}

// checkSupport applies the reducibility rule. The posterior over the free
// (unobserved, relevant) variables is proportional to a product of table
// entries and soft likelihoods. If every table entry that can multiply into
// it is positive, the posterior is positive on the product of the soft
// evidence supports, a product set on which single-site Gibbs sampling is
// irreducible and aperiodic. So for every relevant table that involves a
// free variable (its own, or a parent's), every entry in the rows allowed by
// the observed parents must be positive: all states for a free variable,
// the observed state for an observed one. A table whose variable and
// parents are all observed is a constant factor; a zero there makes the
// evidence impossible.
func (p *plan) checkSupport() error {
	net := p.net
	for _, v32 := range p.order {
		v := int(v32)
		nd := &net.Vars[v]
		involved := -1 // a free variable among v and its parents
		if p.hard[v] < 0 {
			involved = v
		} else {
			for _, q := range nd.Parents {
				if p.hard[q] < 0 {
					involved = q
					break
				}
			}
		}
		c := nd.Card()
		off := p.cptOff[v]
		for r := 0; r < nd.Rows; r++ {
			if !p.rowAllowed(nd, r) {
				continue
			}
			lo, hi := 0, c
			if h := int(p.hard[v]); h >= 0 {
				lo, hi = h, h+1
			}
			for k := lo; k < hi; k++ {
				if p.cpt[off+r*c+k] > 0 {
					continue
				}
				if involved < 0 {
					given := ""
					if len(nd.Parents) > 0 {
						given = " given its observed parents " + p.rowText(nd, r)
					}
					return fmt.Errorf("gibbs: %w: the observed state %q of %q has probability zero%s",
						ErrImpossibleEvidence, nd.States[k], nd.Name, given)
				}
				given := ""
				if len(nd.Parents) > 0 {
					given = p.rowText(nd, r)
				}
				return &ReducibleError{Variable: net.Vars[involved].Name, Table: nd.Name, Row: r, State: k, Given: given, StateName: nd.States[k]}
			}
		}
	}
	return nil
}

// rowAllowed reports whether row r of nd's table agrees with the hard
// evidence on nd's parents.
func (p *plan) rowAllowed(nd *model.Node, r int) bool {
	for j, q := range nd.Parents {
		if h := p.hard[q]; h >= 0 && (r/nd.Strides[j])%int(p.card[q]) != int(h) {
			return false
		}
	}
	return true
}

func (p *plan) rowText(nd *model.Node, r int) string {
	s := ""
	for j, q := range nd.Parents {
		if j > 0 {
			s += ", "
		}
		pn := &p.net.Vars[q]
		s += pn.Name + "=" + pn.States[(r/nd.Strides[j])%pn.Card()]
	}
	return s
}
