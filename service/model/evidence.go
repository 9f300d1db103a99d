package model

import (
	"errors"
	"fmt"
	"math"
	"sort"
	"strings"
)

// ErrBadEvidence is wrapped by every error about evidence or targets that do
// not fit the model.
var ErrBadEvidence = errors.New("bad evidence")

// Evidence is evidence resolved against a network.
type Evidence struct {
	// Hard[v] is the observed state of variable v, or -1.
	Hard []int
	// Soft[v] is a likelihood vector over v's states, or nil. Soft evidence
	// multiplies the joint by Soft[v][state(v)].
	Soft [][]float64
}

// Empty reports whether there is no evidence at all.
func (e *Evidence) Empty() bool {
	if e == nil {
		return true
	}
	for _, h := range e.Hard {
		if h >= 0 {
			return false
		}
	}
	for _, s := range e.Soft {
		if s != nil {
			return false
		}
	}
	return true
}

// HasSoft reports whether any soft evidence is present.
func (e *Evidence) HasSoft() bool {
	if e == nil {
		return false
	}
	for _, s := range e.Soft {
		if s != nil {
			return true
		}
	}
	return false
}

// NoEvidence returns empty evidence for the network.
func (net *Network) NoEvidence() *Evidence {
	e := &Evidence{Hard: make([]int, len(net.Vars)), Soft: make([][]float64, len(net.Vars))}
	for i := range e.Hard {
		e.Hard[i] = -1
	}
	return e
}

// ResolveEvidence turns named evidence into indices, naming any unknown
// variable or state. A variable may carry hard or soft evidence, not both.
// Soft likelihoods must be in [0, 1], one per state, and not all zero.
func (net *Network) ResolveEvidence(hard map[string]string, soft map[string][]float64) (*Evidence, error) {
	e := net.NoEvidence()
	for _, name := range sortedKeys(hard) {
		v, ok := net.index[name]
		if !ok {
			return nil, fmt.Errorf("%w: unknown variable %q%s", ErrBadEvidence, name, net.suggest(name))
		}
		s, ok := net.Vars[v].StateIndex(hard[name])
		if !ok {
			return nil, fmt.Errorf("%w: variable %q has no state %q (states: %s)", ErrBadEvidence, name, hard[name], strings.Join(net.Vars[v].States, ", "))
		}
		e.Hard[v] = s
	}
	for _, name := range sortedKeys(soft) {
		v, ok := net.index[name]
		if !ok {
			return nil, fmt.Errorf("%w: unknown variable %q in soft evidence%s", ErrBadEvidence, name, net.suggest(name))
		}
		if e.Hard[v] >= 0 {
			return nil, fmt.Errorf("%w: variable %q has both hard and soft evidence; give one", ErrBadEvidence, name)
		}
		lik := soft[name]
		if len(lik) != net.Vars[v].Card() {
			return nil, fmt.Errorf("%w: soft evidence on %q has %d likelihoods, want one per state (%d: %s)", ErrBadEvidence, name, len(lik), net.Vars[v].Card(), strings.Join(net.Vars[v].States, ", "))
		}
		any := false
		for k, l := range lik {
			if math.IsNaN(l) || math.IsInf(l, 0) || l < 0 {
				return nil, fmt.Errorf("%w: soft evidence on %q: likelihood %d = %g must be finite and >= 0", ErrBadEvidence, name, k+1, l)
			}
			if l > 1 {
				// Larger values would let the samplers' weights overflow.
				return nil, fmt.Errorf("%w: soft evidence on %q: likelihood %d = %g is above 1 (a likelihood is P(reading | state)); divide the vector by its largest value", ErrBadEvidence, name, k+1, l)
			}
			if l > 0 {
				any = true
			}
		}
		if !any {
			return nil, fmt.Errorf("%w: soft evidence on %q is zero for every state", ErrBadEvidence, name)
		}
		e.Soft[v] = append([]float64(nil), lik...)
	}
	return e, nil
}

// ResolveTargets turns variable names into indices; no names means every
// variable without hard evidence, in document order.
func (net *Network) ResolveTargets(names []string, ev *Evidence) ([]int, error) {
	if len(names) == 0 {
		out := make([]int, 0, len(net.Vars))
		for _, v := range net.DocOrder {
			if ev == nil || ev.Hard[v] < 0 {
				out = append(out, v)
			}
		}
		return out, nil
	}
	seen := map[int]bool{}
	out := make([]int, 0, len(names))
	for _, name := range names {
		v, ok := net.index[name]
		if !ok {
			return nil, fmt.Errorf("%w: unknown target variable %q%s", ErrBadEvidence, name, net.suggest(name))
		}
		if !seen[v] {
			out = append(out, v)
			seen[v] = true
		}
	}
	return out, nil
}

// suggest names a variable whose name differs only in case, if any.
func (net *Network) suggest(name string) string {
	for other := range net.index {
		if strings.EqualFold(other, name) {
			return fmt.Sprintf(" (did you mean %q?)", other)
		}
	}
	return ""
}

func sortedKeys[V any](m map[string]V) []string {
	keys := make([]string, 0, len(m))
	for k := range m {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	return keys
}
