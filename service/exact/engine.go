package exact

import (
	"fmt"
	"math"
	"slices"
	"sync"

	"github.com/beliefd/beliefd/service/model"
)

// DefaultMaxEntries is the limit on total clique table entries used when
// Options.MaxEntries is zero. Each query works on a copy of the tables, so
// the limit bounds memory per concurrent query (8 bytes an entry).
const DefaultMaxEntries = 50_000_000

// Options tunes Compile. The zero value is ready to use.
type Options struct {
	// MaxEntries bounds the total number of clique table entries; Compile
	// refuses larger networks with a *TooCostlyError. Zero means
	// DefaultMaxEntries.
	MaxEntries int
}

// Engine answers exact queries on one network. It is built once by Compile
// and is safe for concurrent use by many goroutines.
type Engine struct {
	net     *model.Network
	cost    Cost
	cliques []clique
	pre     []int     // cliques in preorder: every parent before its children
	init    []float64 // product of the assigned tables, all cliques back to back
	// initLogZ is the log of the factors taken out of init.
	initLogZ float64
	sepLen   int // total separator entries
	maxSep   int
	maxCard  int
	width    int    // most variables in a clique
	home     []axis // per variable: the smallest clique holding it
	pool     sync.Pool
}

// clique is one node of the junction tree. Its variables are laid out
// row-major, the variables it shares with its parent first (slowest), so
// that each separator entry owns one contiguous block of the table.
type clique struct {
	vars   []int
	cards  []int
	off    int    // offset of the table in Engine.init and workspace.pot
	size   int    // table entries
	parent int    // -1 for a root
	nsep   int    // leading variables shared with the parent
	sepOff int    // offset of the separator table in workspace.sep
	sepLen int    // separator entries; the block length is size/sepLen
	down   sepMap // parent table -> separator
}

// workspace is the per-query scratch memory.
type workspace struct {
	pot  []float64
	sep  []float64
	tmp  []float64
	lik  []float64
	ctr  []int
	need []bool
}

// Compile validates the network, triangulates it, and builds the junction
// tree and its evidence-free tables. It fails with a *TooCostlyError
// (wrapping ErrTooCostly) when the tables would exceed opt.MaxEntries, and
// with an error wrapping model.ErrInvalid when the network is malformed.
func Compile(net *model.Network, opt Options) (*Engine, error) {
	if err := checkNetwork(net); err != nil {
		return nil, err
	}
	limit := opt.MaxEntries
	if limit <= 0 {
		limit = DefaultMaxEntries
	}
	st := triangulate(net)
	if st.cost.TotalEntries > limit || st.cost.TotalEntries == math.MaxInt {
		return nil, &TooCostlyError{Estimate: st.cost, Limit: limit}
	}
	e := &Engine{net: net, cost: st.cost, cliques: make([]clique, len(st.cliques))}
	inClique := make([]int, len(net.Vars)) // scratch: 1 for the variables of the current parent
	// Lay out each clique: separator variables first, in index order.
	for c, vars := range st.cliques {
		cl := &e.cliques[c]
		cl.parent = st.parent[c]
		var sep, rest []int
		if cl.parent >= 0 {
			for _, v := range st.cliques[cl.parent] {
				inClique[v] = 1
			}
		}
		for _, v := range vars {
			if cl.parent >= 0 && inClique[v] == 1 {
				sep = append(sep, v)
			} else {
				rest = append(rest, v)
			}
		}
		if cl.parent >= 0 {
			for _, v := range st.cliques[cl.parent] {
				inClique[v] = 0
			}
		}
		cl.vars = append(sep, rest...)
		cl.nsep = len(sep)
		cl.cards = make([]int, len(cl.vars))
		cl.size = 1
		cl.sepLen = 1
		for k, v := range cl.vars {
			cl.cards[k] = net.Vars[v].Card()
			cl.size *= cl.cards[k]
			if k < cl.nsep {
				cl.sepLen *= cl.cards[k]
			}
			e.maxCard = max(e.maxCard, cl.cards[k])
		}
		e.width = max(e.width, len(cl.vars))
	}
	off, sepOff := 0, 0
	for c := range e.cliques {
		cl := &e.cliques[c]
		cl.off = off
		off += cl.size
		if cl.parent >= 0 {
			cl.sepOff = sepOff
			sepOff += cl.sepLen
			e.maxSep = max(e.maxSep, cl.sepLen)
			cl.down.o = e.parentMap(cl, &e.cliques[cl.parent])
		}
	}
	// Explicit index maps make the parent side of each message a plain
	// gather; they cost 4 bytes per parent entry per child, so they are
	// built while their total stays within about the tables' own memory.
	budget := satAdd(satMul(2, off), 1<<20)
	for c := range e.cliques {
		cl := &e.cliques[c]
		if cl.parent < 0 {
			continue
		}
		pl := &e.cliques[cl.parent]
		if pl.size > budget || cl.sepLen > math.MaxInt32 {
			continue
		}
		budget -= pl.size
		cl.down.idx = make([]int32, pl.size)
		cl.down.o.fill(cl.down.idx)
	}
	e.sepLen = sepOff
	e.pre = preorder(e.cliques)
	// Evidence-free tables: the product of the tables assigned to each clique.
	e.init = make([]float64, off)
	for i := range e.init {
		e.init[i] = 1
	}
	ctr := make([]int, e.width+1)
	strides := make([]int, e.width)
	for v := range net.Vars {
		node := &net.Vars[v]
		cl := &e.cliques[st.famHome[v]]
		for k, x := range cl.vars {
			strides[k] = 0
			if x == v {
				strides[k] = 1
				continue
			}
			for j, p := range node.Parents {
				if p == x {
					strides[k] = node.Strides[j] * node.Card()
				}
			}
		}
		m := newOdo(cl.cards, strides[:len(cl.vars)])
		pot := e.init[cl.off : cl.off+cl.size]
		m.mulFrom(pot, node.CPT, ctr)
		// Keep the largest entry at 1 (the scale goes into every
		// P(evidence)), so products of many small entries cannot underflow.
		if mx := maxOf(pot); mx > 0 && mx != 1 {
			rescale(pot, mx)
			e.initLogZ += logOf(mx)
		}
	}
	// Home of each variable: the smallest clique that holds it.
	e.home = make([]axis, len(net.Vars))
	for v := range e.home {
		e.home[v].clique = -1
	}
	for c := range e.cliques {
		cl := &e.cliques[c]
		for k, v := range cl.vars {
			h := &e.home[v]
			if h.clique >= 0 && e.cliques[h.clique].size <= cl.size {
				continue
			}
			outer, inner := 1, 1
			for _, cd := range cl.cards[:k] {
				outer *= cd
			}
			for _, cd := range cl.cards[k+1:] {
				inner *= cd
			}
			*h = axis{clique: c, outer: outer, card: cl.cards[k], inner: inner}
		}
	}
	e.pool.New = func() any {
		return &workspace{
			pot:  make([]float64, len(e.init)),
			sep:  make([]float64, e.sepLen),
			tmp:  make([]float64, max(e.maxSep, e.maxCard, 1)),
			lik:  make([]float64, max(e.maxCard, 1)),
			ctr:  make([]int, e.width+1),
			need: make([]bool, len(e.cliques)),
		}
	}
	return e, nil
}

// parentMap maps the parent's table onto the child's separator, whose
// layout is the child's leading nsep variables.
func (e *Engine) parentMap(child, parent *clique) odo {
	sepStride := make(map[int]int, child.nsep)
	s := 1
	for k := child.nsep - 1; k >= 0; k-- {
		sepStride[child.vars[k]] = s
		s *= child.cards[k]
	}
	strides := make([]int, len(parent.vars))
	for k, v := range parent.vars {
		strides[k] = sepStride[v]
	}
	return newOdo(parent.cards, strides)
}

// preorder lists cliques so that every parent comes before its children.
func preorder(cl []clique) []int {
	children := make([][]int, len(cl))
	var stack []int
	for c := range cl {
		if p := cl[c].parent; p >= 0 {
			children[p] = append(children[p], c)
		} else {
			stack = append(stack, c)
		}
	}
	slices.Reverse(stack)
	out := make([]int, 0, len(cl))
	for len(stack) > 0 {
		c := stack[len(stack)-1]
		stack = stack[:len(stack)-1]
		out = append(out, c)
		for i := len(children[c]) - 1; i >= 0; i-- {
			stack = append(stack, children[c][i])
		}
	}
	return out
}

// Cost reports the size of the engine's junction tree.
func (e *Engine) Cost() Cost { return e.cost }

// Network returns the network the engine was compiled from.
func (e *Engine) Network() *model.Network { return e.net }

// checkNetwork verifies the invariants that model.Compile guarantees, for
// networks assembled by other means.
func checkNetwork(net *model.Network) error {
	if net == nil || len(net.Vars) == 0 {
		return fmt.Errorf("exact: %w: the network has no variables", model.ErrInvalid)
	}
	if len(net.Vars) > math.MaxInt32 {
		return fmt.Errorf("exact: %w: %d variables are more than the engine can index", model.ErrInvalid, len(net.Vars))
	}
	for v := range net.Vars {
		n := &net.Vars[v]
		card := n.Card()
		if card < 1 {
			return fmt.Errorf("exact: %w: variable %q has no states", model.ErrInvalid, n.Name)
		}
		if len(n.Strides) != len(n.Parents) {
			return fmt.Errorf("exact: %w: variable %q has %d parents but %d strides", model.ErrInvalid, n.Name, len(n.Parents), len(n.Strides))
		}
		rows := 1
		for j := len(n.Parents) - 1; j >= 0; j-- {
			p := n.Parents[j]
			if p < 0 || p >= v {
				return fmt.Errorf("exact: %w: variable %q has parent index %d; parents must come earlier in Vars", model.ErrInvalid, n.Name, p)
			}
			if slices.Contains(n.Parents[j+1:], p) {
				return fmt.Errorf("exact: %w: variable %q lists parent %q twice", model.ErrInvalid, n.Name, net.Vars[p].Name)
			}
			if n.Strides[j] != rows {
				return fmt.Errorf("exact: %w: variable %q: stride of parent %q is %d, want %d", model.ErrInvalid, n.Name, net.Vars[p].Name, n.Strides[j], rows)
			}
			rows = satMul(rows, net.Vars[p].Card())
		}
		if rows != n.Rows || satMul(rows, card) != len(n.CPT) {
			return fmt.Errorf("exact: %w: variable %q has a table of %d entries, want %d rows x %d states", model.ErrInvalid, n.Name, len(n.CPT), rows, card)
		}
		for i, p := range n.CPT {
			if !(p >= 0) || math.IsInf(p, 0) {
				return fmt.Errorf("exact: %w: variable %q: table entry %d is %g; entries must be finite and >= 0", model.ErrInvalid, n.Name, i, p)
			}
		}
	}
	return nil
}

// checkEvidence validates evidence against the network.
func checkEvidence(net *model.Network, ev *model.Evidence) error {
	if ev == nil {
		return nil
	}
	n := len(net.Vars)
	if ev.Hard != nil && len(ev.Hard) != n {
		return fmt.Errorf("exact: %w: hard evidence lists %d variables, the model has %d", model.ErrBadEvidence, len(ev.Hard), n)
	}
	if ev.Soft != nil && len(ev.Soft) != n {
		return fmt.Errorf("exact: %w: soft evidence lists %d variables, the model has %d", model.ErrBadEvidence, len(ev.Soft), n)
	}
	for v, h := range ev.Hard {
		if h < -1 || h >= net.Vars[v].Card() {
			return fmt.Errorf("exact: %w: variable %q observed in state %d; it has %d states (use -1 for unobserved)", model.ErrBadEvidence, net.Vars[v].Name, h, net.Vars[v].Card())
		}
	}
	for v, lik := range ev.Soft {
		if lik == nil {
			continue
		}
		if len(lik) != net.Vars[v].Card() {
			return fmt.Errorf("exact: %w: soft evidence on %q has %d likelihoods, want one per state (%d)", model.ErrBadEvidence, net.Vars[v].Name, len(lik), net.Vars[v].Card())
		}
		positive := false
		for k, l := range lik {
			if !(l >= 0) || math.IsInf(l, 0) {
				return fmt.Errorf("exact: %w: soft evidence on %q: likelihood %d = %g must be finite and >= 0", model.ErrBadEvidence, net.Vars[v].Name, k+1, l)
			}
			positive = positive || l > 0
		}
		if !positive {
			return fmt.Errorf("exact: %w: soft evidence on %q is zero for every state", model.ErrBadEvidence, net.Vars[v].Name)
		}
	}
	return nil
}

// applyEvidence copies the evidence-free tables into the workspace and
// enters the evidence. Soft likelihoods are divided by their largest value
// to keep tables bounded by 1; the log of the divisors is returned.
func (e *Engine) applyEvidence(w *workspace, ev *model.Evidence) float64 {
	copy(w.pot, e.init)
	if ev == nil {
		return 0
	}
	logScale := 0.0
	for v, h := range ev.Hard {
		if h >= 0 {
			a := e.home[v]
			cl := &e.cliques[a.clique]
			a.keep(w.pot[cl.off:cl.off+cl.size], h)
		}
	}
	for v, lik := range ev.Soft {
		if lik == nil {
			continue
		}
		m := slices.Max(lik)
		scaled := w.lik[:len(lik)]
		for k, l := range lik {
			scaled[k] = l / m
		}
		logScale += logOf(m)
		a := e.home[v]
		cl := &e.cliques[a.clique]
		a.scale(w.pot[cl.off:cl.off+cl.size], scaled)
	}
	return logScale
}
