package exact

import (
	"fmt"
	"math"

	"github.com/beliefd/beliefd/service/model"
)

// Posterior is the answer to a marginal query.
type Posterior struct {
	// Marginals[i] is the posterior distribution over the states of
	// targets[i]; a target with hard evidence gets its point mass.
	Marginals [][]float64
	// LogEvidence is the natural log of the probability of the evidence
	// (the joint probability of the hard evidence times the soft
	// likelihoods, summed over everything else); 0 with no evidence.
	LogEvidence float64
}

// Log10Evidence is LogEvidence in base 10.
func (p *Posterior) Log10Evidence() float64 { return Log10(p.LogEvidence) }

// Log10 converts a natural log to base 10.
func Log10(ln float64) float64 { return ln / math.Ln10 }

// Posterior computes the posterior marginal of every target and the
// probability of the evidence in one collect and one distribute pass.
// ev may be nil for no evidence; targets may be empty to get only
// LogEvidence. Evidence of probability zero gives an error wrapping
// ErrZeroEvidence; evidence or targets that do not fit the network give an
// error wrapping model.ErrBadEvidence.
func (e *Engine) Posterior(ev *model.Evidence, targets []int) (*Posterior, error) {
	p := new(Posterior)
	if err := e.PosteriorInto(p, ev, targets); err != nil {
		return nil, err
	}
	return p, nil
}

// PosteriorInto is Posterior writing into dst, reusing its slices when
// they are large enough: a caller that repeats queries with the same
// targets allocates nothing after the first one. On error dst may be
// partly overwritten.
func (e *Engine) PosteriorInto(dst *Posterior, ev *model.Evidence, targets []int) error {
	if err := checkEvidence(e.net, ev); err != nil {
		return err
	}
	for i, t := range targets {
		if t < 0 || t >= len(e.net.Vars) {
			return fmt.Errorf("exact: %w: target %d is variable index %d; the model has %d variables", model.ErrBadEvidence, i, t, len(e.net.Vars))
		}
	}
	w := e.pool.Get().(*workspace)
	defer e.pool.Put(w)

	logZ := e.initLogZ + e.applyEvidence(w, ev)
	// Collect: each clique sends its separator marginal to its parent.
	// Messages are normalised to sum 1 and their sums kept in log space.
	for i := len(e.pre) - 1; i >= 0; i-- {
		c := e.pre[i]
		cl := &e.cliques[c]
		pot := w.pot[cl.off : cl.off+cl.size]
		if cl.parent < 0 {
			z := sum(pot)
			if !(z > 0) {
				return zeroEvidenceError()
			}
			logZ += logOf(z)
			continue
		}
		msg := w.sep[cl.sepOff : cl.sepOff+cl.sepLen]
		blockSums(msg, pot)
		z := sum(msg)
		if !(z > 0) {
			return zeroEvidenceError()
		}
		if z != 1 {
			rescale(msg, z)
			logZ += logOf(z)
		}
		pl := &e.cliques[cl.parent]
		ppot := w.pot[pl.off : pl.off+pl.size]
		if mx := cl.down.mulFrom(ppot, msg, w.ctr); mx < rescaleBelow {
			if !(mx > 0) {
				return zeroEvidenceError()
			}
			rescale(ppot, mx)
			logZ += logOf(mx)
		}
	}

	// Distribute, only along the paths from the roots to the cliques that
	// hold targets.
	hard := func(v int) int {
		if ev == nil || ev.Hard == nil {
			return -1
		}
		return ev.Hard[v]
	}
	need := w.need
	clear(need)
	for _, t := range targets {
		if hard(t) >= 0 {
			continue
		}
		for c := e.home[t].clique; c >= 0 && !need[c]; c = e.cliques[c].parent {
			need[c] = true
		}
	}
	for _, c := range e.pre {
		cl := &e.cliques[c]
		if cl.parent < 0 || !need[c] {
			continue
		}
		pl := &e.cliques[cl.parent]
		tmp := w.tmp[:cl.sepLen]
		clear(tmp)
		cl.down.sumTo(tmp, w.pot[pl.off:pl.off+pl.size], w.ctr)
		z := sum(tmp)
		if !(z > 0) {
			return zeroEvidenceError()
		}
		rescale(tmp, z)
		blockMulRatio(w.pot[cl.off:cl.off+cl.size], tmp, w.sep[cl.sepOff:cl.sepOff+cl.sepLen])
	}

	// Read the marginals.
	if cap(dst.Marginals) < len(targets) {
		dst.Marginals = make([][]float64, len(targets))
	}
	dst.Marginals = dst.Marginals[:len(targets)]
	short := 0
	for i, t := range targets {
		if cap(dst.Marginals[i]) < e.net.Vars[t].Card() {
			short += e.net.Vars[t].Card()
		}
	}
	var flat []float64
	if short > 0 {
		flat = make([]float64, short)
	}
	for i, t := range targets {
		k := e.net.Vars[t].Card()
		out := dst.Marginals[i]
		if cap(out) < k {
			out, flat = flat[:k:k], flat[k:]
		}
		out = out[:k]
		dst.Marginals[i] = out
		if h := hard(t); h >= 0 {
			clear(out)
			out[h] = 1
			continue
		}
		a := e.home[t]
		cl := &e.cliques[a.clique]
		a.sum(w.pot[cl.off:cl.off+cl.size], out)
		z := sum(out)
		if !(z > 0) {
			return zeroEvidenceError()
		}
		rescale(out, z)
	}
	dst.LogEvidence = logZ
	if ev.Empty() {
		dst.LogEvidence = 0
	}
	return nil
}

// rescaleBelow is the largest table entry below which a clique table is
// scaled back up during collect, far enough above the float64 range limit
// that one more message cannot underflow it.
const rescaleBelow = 1e-150

func sum(xs []float64) float64 {
	acc := 0.0
	for _, x := range xs {
		acc += x
	}
	return acc
}
