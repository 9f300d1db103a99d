package sampling

import (
	"errors"
	"fmt"
	"math"
	"strings"

	"github.com/beliefd/beliefd/service/model"
)

// Method names.
const (
	MethodForward             = "forward"
	MethodRejection           = "rejection"
	MethodLikelihoodWeighting = "likelihood-weighting"
)

// Methods lists the block samplers of this package.
var Methods = []string{MethodForward, MethodRejection, MethodLikelihoodWeighting}

var (
	// ErrUnknownMethod is wrapped when a method name is not one of Methods.
	ErrUnknownMethod = errors.New("unknown sampling method")
	// ErrEvidenceNotSupported is wrapped when forward sampling is asked to
	// condition on evidence.
	ErrEvidenceNotSupported = errors.New("method does not take evidence")
	// ErrTooLarge is wrapped when a network's tables are too large to flatten.
	ErrTooLarge = errors.New("network too large for the sampler")
)

// maxFlat bounds the flattened table entries and state counts, which the
// kernel indexes with int32.
const maxFlat = math.MaxInt32 - 1

// node is one variable of the flattened network, in topological order.
type node struct {
	card int32 // number of states
	ev   int32 // hard evidence state, or -1
	pBeg int32 // parents are parVar[pBeg:pEnd], multipliers parMul[pBeg:pEnd]
	pEnd int32
	tab  int32 // offset of row 0 in cum and prob
	lik  int32 // offset of the soft likelihoods in lik, or -1
	cnt  int32 // offset of the variable's states in the statistics when it is a target, or -1
	_    int32
}

// Kernel is a network flattened for one sampling method, evidence and list
// of targets. It draws blocks of samples into Stats. A Kernel is immutable
// and safe for concurrent use: many goroutines may run blocks at once.
type Kernel struct {
	method  string
	net     *model.Network
	targets []int
	// Flat network.
	nodes  []node
	parVar []int32   // parent variable indices
	parMul []int32   // parent stride times the child's card: offset of a row in cum
	cum    []float64 // cumulative rows; the entry of the last positive state and after are 2
	prob   []float64 // the rows themselves
	lik    []float64 // soft likelihoods: raw for weighting, divided by their maximum for rejection
	// Targets: variable and offset of its states in the statistics.
	tVar   []int32
	tOff   []int32
	states int // total target states = length of Stats.StateW
	// clamped[i] is the hard evidence state of target i, or -1.
	clamped []int
	// Evidence facts.
	hasEvidence bool
	// likScale is the product over soft-evidence variables of their largest
	// likelihood: rejection sampling accepts with P(evidence) / likScale.
	likScale float64
	// maxWeight bounds every likelihood weight: the product over hard
	// evidence of the largest table entry of the observed state, times likScale.
	maxWeight float64
}

// NewKernel flattens net for method under evidence ev (nil for none) and
// the target variables (indices into net.Vars; empty for every variable
// without hard evidence, in document order).
func NewKernel(net *model.Network, ev *model.Evidence, method string, targets []int) (*Kernel, error) {
	if net == nil || len(net.Vars) == 0 {
		return nil, fmt.Errorf("sampling: %w: the network has no variables", model.ErrInvalid)
	}
	switch method {
	case MethodForward, MethodRejection, MethodLikelihoodWeighting:
	default:
		return nil, fmt.Errorf("sampling: %w %q (use one of %s)", ErrUnknownMethod, method, strings.Join(Methods, ", "))
	}
	if ev == nil {
		ev = net.NoEvidence()
	}
	if err := checkEvidence(net, ev); err != nil {
		return nil, err
	}
	if method == MethodForward && !ev.Empty() {
		return nil, fmt.Errorf("sampling: %w: forward sampling draws from the prior and cannot condition on evidence; use %q or %q",
			ErrEvidenceNotSupported, MethodRejection, MethodLikelihoodWeighting)
	}
	if len(targets) == 0 {
		var err error
		if targets, err = net.ResolveTargets(nil, ev); err != nil {
			return nil, fmt.Errorf("sampling: %w", err)
		}
	}
	k := &Kernel{method: method, net: net, targets: append([]int(nil), targets...), hasEvidence: !ev.Empty(), likScale: 1, maxWeight: 1}
	n := len(net.Vars)
	k.nodes = make([]node, n)
	total, pars := 0, 0
	for v := range net.Vars {
		total += len(net.Vars[v].CPT)
		pars += len(net.Vars[v].Parents)
	}
	if total > maxFlat {
		return nil, fmt.Errorf("sampling: %w: %d table entries exceed %d", ErrTooLarge, total, maxFlat)
	}
	k.cum = make([]float64, 0, total)
	k.prob = make([]float64, 0, total)
	k.parVar = make([]int32, 0, pars)
	k.parMul = make([]int32, 0, pars)
	for v := range net.Vars {
		x := &net.Vars[v]
		card := x.Card()
		nd := &k.nodes[v]
		nd.card, nd.ev, nd.lik, nd.cnt = int32(card), int32(ev.Hard[v]), -1, -1
		nd.tab = int32(len(k.cum))
		nd.pBeg = int32(len(k.parVar))
		for j, p := range x.Parents {
			k.parVar = append(k.parVar, int32(p))
			k.parMul = append(k.parMul, int32(x.Strides[j]*card))
		}
		nd.pEnd = int32(len(k.parVar))
		k.prob = append(k.prob, x.CPT...)
		for r := 0; r < x.Rows; r++ {
			row := x.CPT[r*card : (r+1)*card]
			last := 0
			for s, p := range row {
				if p > 0 {
					last = s
				}
			}
			c := 0.0
			for s, p := range row {
				c += p
				if s >= last {
					c = 2 // u < 1 always stops here, whatever the rounding of the sum
				}
				k.cum = append(k.cum, c)
			}
		}
		if e := ev.Hard[v]; e >= 0 {
			best := 0.0
			for r := 0; r < x.Rows; r++ {
				best = math.Max(best, x.CPT[r*card+e])
			}
			k.maxWeight *= best
		}
		if lik := ev.Soft[v]; lik != nil {
			mx := 0.0
			for _, l := range lik {
				mx = math.Max(mx, l)
			}
			k.likScale *= mx
			k.maxWeight *= mx
			nd.lik = int32(len(k.lik))
			for _, l := range lik {
				if method == MethodRejection {
					l /= mx
				}
				k.lik = append(k.lik, l)
			}
		}
	}
	k.clamped = make([]int, len(k.targets))
	for i, t := range k.targets {
		if t < 0 || t >= n {
			return nil, fmt.Errorf("sampling: %w: target index %d is not a variable (the network has %d)", model.ErrBadEvidence, t, n)
		}
		if k.nodes[t].cnt >= 0 {
			return nil, fmt.Errorf("sampling: %w: target %q listed twice", model.ErrBadEvidence, net.Vars[t].Name)
		}
		k.nodes[t].cnt = int32(k.states)
		k.tVar = append(k.tVar, int32(t))
		k.tOff = append(k.tOff, int32(k.states))
		k.clamped[i] = ev.Hard[t]
		k.states += net.Vars[t].Card()
		if k.states > maxFlat {
			return nil, fmt.Errorf("sampling: %w: too many target states", ErrTooLarge)
		}
	}
	return k, nil
}

// checkEvidence validates evidence built by hand; evidence from
// model.ResolveEvidence always passes.
func checkEvidence(net *model.Network, ev *model.Evidence) error {
	n := len(net.Vars)
	if len(ev.Hard) != n || len(ev.Soft) != n {
		return fmt.Errorf("sampling: %w: evidence has %d hard and %d soft entries, the network has %d variables",
			model.ErrBadEvidence, len(ev.Hard), len(ev.Soft), n)
	}
	for v, h := range ev.Hard {
		x := &net.Vars[v]
		if h >= x.Card() || h < -1 {
			return fmt.Errorf("sampling: %w: variable %q has no state %d", model.ErrBadEvidence, x.Name, h)
		}
		lik := ev.Soft[v]
		if lik == nil {
			continue
		}
		if h >= 0 {
			return fmt.Errorf("sampling: %w: variable %q has both hard and soft evidence", model.ErrBadEvidence, x.Name)
		}
		if len(lik) != x.Card() {
			return fmt.Errorf("sampling: %w: soft evidence on %q has %d likelihoods for %d states", model.ErrBadEvidence, x.Name, len(lik), x.Card())
		}
		pos := false
		for _, l := range lik {
			if math.IsNaN(l) || math.IsInf(l, 0) || l < 0 {
				return fmt.Errorf("sampling: %w: soft evidence on %q has likelihood %g; want finite and >= 0", model.ErrBadEvidence, x.Name, l)
			}
			pos = pos || l > 0
		}
		if !pos {
			return fmt.Errorf("sampling: %w: soft evidence on %q is zero for every state", model.ErrBadEvidence, x.Name)
		}
	}
	return nil
}

// Method returns the kernel's method name.
func (k *Kernel) Method() string { return k.method }

// Network returns the network the kernel samples.
func (k *Kernel) Network() *model.Network { return k.net }

// Targets returns the target variables, in the order of Estimate.Marginals
// and of the states in Stats.StateW.
func (k *Kernel) Targets() []int { return append([]int(nil), k.targets...) }

// HasEvidence reports whether the kernel conditions on any evidence.
func (k *Kernel) HasEvidence() bool { return k.hasEvidence }

// NewStats returns empty statistics laid out for this kernel.
func (k *Kernel) NewStats() *Stats {
	s := &Stats{}
	k.reset(s)
	return s
}

// reset empties s and lays it out for k, reusing its storage.
func (k *Kernel) reset(s *Stats) {
	s.Blocks, s.N, s.Accepted, s.SumW, s.SumW2, s.MaxW = 0, 0, 0, 0, 0, 0
	s.StateW = zeroed(s.StateW, k.states)
	if k.method == MethodLikelihoodWeighting {
		s.StateW2 = zeroed(s.StateW2, k.states)
	} else {
		s.StateW2 = nil
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
