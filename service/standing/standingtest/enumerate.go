package standingtest

import (
	"fmt"

	"github.com/beliefd/beliefd/service/model"
)

// Enumerate computes P(target | evidence) by brute-force enumeration of
// the joint distribution over the ancestors of the target and the
// evidence variables (the other variables are barren and sum out to one,
// common practice), as a check value independent of the inference
// engines. It refuses sets of more than 2^24 joint states.
func Enumerate(net *model.Network, evidence map[string]string, target string) (map[string]float64, error) {
	t, ok := net.Index(target)
	if !ok {
		return nil, fmt.Errorf("enumerate: unknown target %q", target)
	}
	fixed := make([]int, len(net.Vars))
	for i := range fixed {
		fixed[i] = -1
	}
	keep := make([]bool, len(net.Vars))
	var mark func(v int)
	mark = func(v int) {
		if keep[v] {
			return
		}
		keep[v] = true
		for _, p := range net.Vars[v].Parents {
			mark(p)
		}
	}
	mark(t)
	for name, state := range evidence {
		v, ok := net.Index(name)
		if !ok {
			return nil, fmt.Errorf("enumerate: unknown evidence variable %q", name)
		}
		s, ok := net.Vars[v].StateIndex(state)
		if !ok {
			return nil, fmt.Errorf("enumerate: variable %q has no state %q", name, state)
		}
		fixed[v] = s
		mark(v)
	}
	var order []int // topological: net.Vars is in topological order
	space := 1.0
	for v := range net.Vars {
		if keep[v] {
			order = append(order, v)
			if fixed[v] < 0 {
				space *= float64(net.Vars[v].Card())
			}
		}
	}
	if space > 1<<24 {
		return nil, fmt.Errorf("enumerate: %g joint states is too many", space)
	}
	state := make([]int, len(net.Vars))
	sums := make([]float64, net.Vars[t].Card())
	var walk func(i int, p float64)
	walk = func(i int, p float64) {
		if p == 0 {
			return
		}
		if i == len(order) {
			sums[state[t]] += p
			return
		}
		v := order[i]
		n := &net.Vars[v]
		row := 0
		for j, par := range n.Parents {
			row += state[par] * n.Strides[j]
		}
		probs := n.Row(row)
		if fixed[v] >= 0 {
			state[v] = fixed[v]
			walk(i+1, p*probs[fixed[v]])
			return
		}
		for s := range probs {
			state[v] = s
			walk(i+1, p*probs[s])
		}
	}
	walk(0, 1)
	total := 0.0
	for _, x := range sums {
		total += x
	}
	if total == 0 {
		return nil, fmt.Errorf("enumerate: the evidence has probability zero")
	}
	out := make(map[string]float64, len(sums))
	for s, x := range sums {
		out[net.Vars[t].States[s]] = x / total
	}
	return out, nil
}
