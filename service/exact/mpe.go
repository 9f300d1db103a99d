package exact

import (
	"math"

	"github.com/beliefd/beliefd/service/model"
)

// MPEResult is a most probable explanation.
type MPEResult struct {
	// Assignment holds a state for every variable (indexed like
	// Network.Vars); variables with hard evidence keep their observed state.
	Assignment []int
	// LogProb is the natural log of the joint probability of the whole
	// assignment times the soft likelihoods of its states.
	LogProb float64
}

// Log10Prob is LogProb in base 10.
func (r *MPEResult) Log10Prob() float64 { return Log10(r.LogProb) }

// MPE finds a most probable complete assignment consistent with the
// evidence, by max-product collect and traceback. Among equally probable
// assignments it picks, clique by clique from the root down, the one that
// comes first when the clique's states are read as a number with its
// variables as digits (so the lowest state indices win). Evidence of
// probability zero gives an error wrapping ErrZeroEvidence.
func (e *Engine) MPE(ev *model.Evidence) (*MPEResult, error) {
	if err := checkEvidence(e.net, ev); err != nil {
		return nil, err
	}
	w := e.pool.Get().(*workspace)
	defer e.pool.Put(w)

	e.applyEvidence(w, ev)
	// Collect with max in place of sum; messages are scaled to a maximum
	// of 1, which changes no argmax.
	for i := len(e.pre) - 1; i >= 0; i-- {
		cl := &e.cliques[e.pre[i]]
		if cl.parent < 0 {
			continue
		}
		msg := w.sep[cl.sepOff : cl.sepOff+cl.sepLen]
		blockMax(msg, w.pot[cl.off:cl.off+cl.size])
		m := 0.0
		for _, x := range msg {
			m = max(m, x)
		}
		if !(m > 0) {
			return nil, zeroEvidenceError()
		}
		if m != 1 {
			rescale(msg, m)
		}
		pl := &e.cliques[cl.parent]
		ppot := w.pot[pl.off : pl.off+pl.size]
		if mx := cl.down.mulFrom(ppot, msg, w.ctr); mx < rescaleBelow {
			if !(mx > 0) {
				return nil, zeroEvidenceError()
			}
			rescale(ppot, mx)
		}
	}

	asg := make([]int, len(e.net.Vars))
	for _, c := range e.pre {
		cl := &e.cliques[c]
		pot := w.pot[cl.off : cl.off+cl.size]
		// The separator variables are already assigned by the parent; they
		// select one block of this clique's table.
		s := 0
		for k := 0; k < cl.nsep; k++ {
			s = s*cl.cards[k] + asg[cl.vars[k]]
		}
		rest := cl.size / cl.sepLen
		block := pot[s*rest : (s+1)*rest]
		best, arg := 0.0, -1
		for j, x := range block {
			if x > best {
				best, arg = x, j
			}
		}
		if arg < 0 {
			return nil, zeroEvidenceError()
		}
		for k := len(cl.vars) - 1; k >= cl.nsep; k-- {
			asg[cl.vars[k]] = arg % cl.cards[k]
			arg /= cl.cards[k]
		}
	}

	// Score the assignment on the original tables, so the value is exact
	// whatever scaling happened above.
	logp := 0.0
	for v := range e.net.Vars {
		n := &e.net.Vars[v]
		row := 0
		for j, p := range n.Parents {
			row += asg[p] * n.Strides[j]
		}
		logp += logOf(n.CPT[row*n.Card()+asg[v]])
		if ev != nil && ev.Hard != nil && ev.Hard[v] >= 0 && ev.Hard[v] != asg[v] {
			return nil, zeroEvidenceError()
		}
		if ev != nil && ev.Soft != nil && ev.Soft[v] != nil {
			logp += logOf(ev.Soft[v][asg[v]])
		}
	}
	if math.IsInf(logp, -1) {
		return nil, zeroEvidenceError()
	}
	return &MPEResult{Assignment: asg, LogProb: logp}, nil
}
