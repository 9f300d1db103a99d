package model

import (
	"fmt"
	"math"
	"sort"
	"strings"
)

// expand fills net.Vars[ci].CPT from the document's distribution.
func expand(net *Network, ci int, v *Variable, ps *problems) {
	n := &net.Vars[ci]
	card := n.Card()
	n.CPT = make([]float64, n.Rows*card)
	switch {
	case v.Table != nil:
		n.Kind = "table"
		expandTable(net, n, v, ps)
	case v.Rows != nil:
		n.Kind = "rows"
		expandKeyed(net, n, v, ps)
	case v.NoisyOR != nil:
		n.Kind = "noisy_or"
		expandNoisyOR(net, n, v, ps)
	case v.NoisyMAX != nil:
		n.Kind = "noisy_max"
		expandNoisyMAX(net, n, v, ps)
	case v.Gate != nil:
		n.Kind = "gate"
		expandGate(net, n, v, ps)
	case v.FailureRate != nil:
		n.Kind = "failure_rate"
		expandRate(n, v, ps)
	}
}

// checkProb reports a value that is NaN, infinite or outside [0,1].
func checkProb(ps *problems, name, field, where string, p float64) bool {
	switch {
	case math.IsNaN(p):
		ps.add(name, field, "%s is NaN", where)
	case math.IsInf(p, 0):
		ps.add(name, field, "%s is infinite", where)
	case p < 0 || p > 1:
		ps.add(name, field, "%s = %g is outside [0, 1]", where, p)
	default:
		return true
	}
	return false
}

// checkRow validates one distribution over the variable's states.
func checkRow(ps *problems, name, field, where string, row []float64, card int) bool {
	if len(row) != card {
		ps.add(name, field, "%s has %d values, want one per state (%d)", where, len(row), card)
		return false
	}
	sum := 0.0
	for k, p := range row {
		if !checkProb(ps, name, field, fmt.Sprintf("%s value %d", where, k+1), p) {
			return false
		}
		sum += p
	}
	if math.Abs(sum-1) > RowTolerance {
		ps.add(name, field, "%s sums to %.9g, not 1 (tolerance %g)", where, sum, RowTolerance)
		return false
	}
	return true
}

func expandTable(net *Network, n *Node, v *Variable, ps *problems) {
	card := n.Card()
	if len(v.Table) != n.Rows {
		ps.add(n.Name, "table", "%d rows given, want %d (%s, last parent varying fastest)", len(v.Table), n.Rows, rowCountExplain(net, n))
		return
	}
	for r, row := range v.Table {
		where := fmt.Sprintf("row %d", r)
		if len(n.Parents) > 0 {
			where = fmt.Sprintf("row %d (%s)", r, configName(net, n, r))
		}
		if !checkRow(ps, n.Name, "table", where, row, card) {
			return
		}
		copy(n.CPT[r*card:], row)
	}
}

func rowCountExplain(net *Network, n *Node) string {
	if len(n.Parents) == 0 {
		return "a variable without parents has one row"
	}
	var parts []string
	for _, p := range n.Parents {
		parts = append(parts, fmt.Sprintf("%s:%d", net.Vars[p].Name, net.Vars[p].Card()))
	}
	return "one per parent configuration: " + strings.Join(parts, " x ")
}

// configName renders the parent configuration of row r as "a=x, b=y".
func configName(net *Network, n *Node, r int) string {
	parts := make([]string, len(n.Parents))
	for j, p := range n.Parents {
		s := (r / n.Strides[j]) % net.Vars[p].Card()
		parts[j] = net.Vars[p].Name + "=" + net.Vars[p].States[s]
	}
	return strings.Join(parts, ", ")
}

// parentStates decodes row r into the state of each parent.
func parentStates(net *Network, n *Node, r int, out []int) {
	for j, p := range n.Parents {
		out[j] = (r / n.Strides[j]) % net.Vars[p].Card()
	}
}

func expandKeyed(net *Network, n *Node, v *Variable, ps *problems) {
	card := n.Card()
	filled := make([]bool, n.Rows)
	for i, kr := range v.Rows {
		where := fmt.Sprintf("rows[%d]", i)
		r := 0
		ok := true
		for j, p := range n.Parents {
			pn := &net.Vars[p]
			s, given := kr.Given[pn.Name]
			if !given {
				ps.add(n.Name, "rows", "%s does not give a state for parent %q", where, pn.Name)
				ok = false
				break
			}
			k, found := pn.StateIndex(s)
			if !found {
				ps.add(n.Name, "rows", "%s: parent %q has no state %q (states: %s)", where, pn.Name, s, strings.Join(pn.States, ", "))
				ok = false
				break
			}
			r += k * n.Strides[j]
		}
		if !ok {
			return
		}
		if len(kr.Given) != len(n.Parents) {
			for name := range kr.Given {
				if !isParent(net, n, name) {
					ps.add(n.Name, "rows", "%s names %q, which is not a parent", where, name)
					return
				}
			}
		}
		if filled[r] {
			ps.add(n.Name, "rows", "%s repeats the configuration %s", where, configName(net, n, r))
			return
		}
		if !checkRow(ps, n.Name, "rows", fmt.Sprintf("%s (%s)", where, configName(net, n, r)), kr.P, card) {
			return
		}
		filled[r] = true
		copy(n.CPT[r*card:], kr.P)
	}
	for r, f := range filled {
		if !f {
			ps.add(n.Name, "rows", "no row for the configuration %s (%d rows given, %d needed)", configName(net, n, r), len(v.Rows), n.Rows)
			return
		}
	}
}

func isParent(net *Network, n *Node, name string) bool {
	for _, p := range n.Parents {
		if net.Vars[p].Name == name {
			return true
		}
	}
	return false
}

// binaryFault returns the index of the fault state of a two-state variable
// used by a compact form, or reports why it has none.
func binaryFault(n *Node, field string, ps *problems) (int, bool) {
	if n.Card() != 2 {
		ps.add(n.Name, field, "%s needs a variable with exactly two states, found %d", field, n.Card())
		return 0, false
	}
	if n.Fault[0] == n.Fault[1] {
		ps.add(n.Name, field, "%s needs exactly one fault state", field)
		return 0, false
	}
	if n.Fault[0] {
		return 0, true
	}
	return 1, true
}

// checkLinkNames reports links for variables that are not parents and
// parents without a link.
func checkLinkNames(net *Network, n *Node, field string, names []string, ps *problems) bool {
	ok := true
	sort.Strings(names)
	for _, name := range names {
		if !isParent(net, n, name) {
			ps.add(n.Name, field, "link for %q, which is not a parent", name)
			ok = false
		}
	}
	has := map[string]bool{}
	for _, name := range names {
		has[name] = true
	}
	for _, p := range n.Parents {
		if !has[net.Vars[p].Name] {
			ps.add(n.Name, field, "no link given for parent %q", net.Vars[p].Name)
			ok = false
		}
	}
	return ok
}

func expandNoisyOR(net *Network, n *Node, v *Variable, ps *problems) {
	f, ok := binaryFault(n, "noisy_or", ps)
	if !ok {
		return
	}
	no := v.NoisyOR
	if !checkProb(ps, n.Name, "noisy_or", "leak", no.Leak) {
		return
	}
	names := make([]string, 0, len(no.Links))
	for name, c := range no.Links {
		names = append(names, name)
		if !checkProb(ps, n.Name, "noisy_or", fmt.Sprintf("link for %q", name), c) {
			return
		}
	}
	if !checkLinkNames(net, n, "noisy_or", names, ps) {
		return
	}
	inhibit := make([]float64, len(n.Parents))
	for j, p := range n.Parents {
		inhibit[j] = 1 - no.Links[net.Vars[p].Name]
	}
	states := make([]int, len(n.Parents))
	for r := 0; r < n.Rows; r++ {
		parentStates(net, n, r, states)
		q := 1 - no.Leak
		for j, p := range n.Parents {
			if net.Vars[p].Fault[states[j]] {
				q *= inhibit[j]
			}
		}
		n.CPT[r*2+f] = 1 - q
		n.CPT[r*2+1-f] = q
	}
}

func expandNoisyMAX(net *Network, n *Node, v *Variable, ps *problems) {
	nm := v.NoisyMAX
	card := n.Card()
	if !checkRow(ps, n.Name, "noisy_max", "leak", nm.Leak, card) {
		return
	}
	names := make([]string, 0, len(nm.Links))
	for name := range nm.Links {
		names = append(names, name)
	}
	if !checkLinkNames(net, n, "noisy_max", names, ps) {
		return
	}
	// cum[j][s][y] = P(level <= y) produced by parent j in state s.
	cum := make([][][]float64, len(n.Parents))
	for j, p := range n.Parents {
		pn := &net.Vars[p]
		links := nm.Links[pn.Name]
		cum[j] = make([][]float64, pn.Card())
		for s := range pn.States {
			c := make([]float64, card)
			if s == 0 {
				if _, given := links[pn.States[0]]; given {
					ps.add(n.Name, "noisy_max", "link for %q in its first (normal) state %q: the normal state causes nothing", pn.Name, pn.States[0])
					return
				}
				for y := range c {
					c[y] = 1
				}
				cum[j][s] = c
				continue
			}
			dist, given := links[pn.States[s]]
			if !given {
				ps.add(n.Name, "noisy_max", "no link for parent %q in state %q", pn.Name, pn.States[s])
				return
			}
			if !checkRow(ps, n.Name, "noisy_max", fmt.Sprintf("link for %s=%s", pn.Name, pn.States[s]), dist, card) {
				return
			}
			acc := 0.0
			for y := range c {
				acc += dist[y]
				c[y] = acc
			}
			c[card-1] = 1
			cum[j][s] = c
		}
		for s := range links {
			if _, ok := pn.StateIndex(s); !ok {
				ps.add(n.Name, "noisy_max", "parent %q has no state %q", pn.Name, s)
				return
			}
		}
	}
	leakCum := make([]float64, card)
	acc := 0.0
	for y := range leakCum {
		acc += nm.Leak[y]
		leakCum[y] = acc
	}
	leakCum[card-1] = 1
	states := make([]int, len(n.Parents))
	for r := 0; r < n.Rows; r++ {
		parentStates(net, n, r, states)
		prev := 0.0
		for y := 0; y < card; y++ {
			c := leakCum[y]
			for j := range n.Parents {
				c *= cum[j][states[j]][y]
			}
			p := c - prev
			if p < 0 {
				p = 0
			}
			n.CPT[r*card+y] = p
			prev = c
		}
	}
}

func expandGate(net *Network, n *Node, v *Variable, ps *problems) {
	f, ok := binaryFault(n, "gate", ps)
	if !ok {
		return
	}
	np := len(n.Parents)
	if np == 0 {
		ps.add(n.Name, "gate", "a gate needs at least one parent")
		return
	}
	g := v.Gate
	var need int
	switch g.Type {
	case GateAnyOf:
		need = 1
	case GateAllOf:
		need = np
	case GateKOfN:
		if g.K < 1 || g.K > np {
			ps.add(n.Name, "gate", "k_of_n needs 1 <= k <= %d (the number of parents), found k = %d", np, g.K)
			return
		}
		need = g.K
	default:
		ps.add(n.Name, "gate", "unknown gate type %q (want %s, %s or %s)", g.Type, GateAnyOf, GateAllOf, GateKOfN)
		return
	}
	if g.Type != GateKOfN && g.K != 0 {
		ps.add(n.Name, "gate", "k is only used by k_of_n gates")
		return
	}
	states := make([]int, np)
	for r := 0; r < n.Rows; r++ {
		parentStates(net, n, r, states)
		failed := 0
		for j, p := range n.Parents {
			if net.Vars[p].Fault[states[j]] {
				failed++
			}
		}
		if failed >= need {
			n.CPT[r*2+f] = 1
		} else {
			n.CPT[r*2+1-f] = 1
		}
	}
}

func expandRate(n *Node, v *Variable, ps *problems) {
	f, ok := binaryFault(n, "failure_rate", ps)
	if !ok {
		return
	}
	if len(n.Parents) > 0 {
		ps.add(n.Name, "failure_rate", "a failure rate describes a root event: remove the parents or use a table")
		return
	}
	fr := v.FailureRate
	for _, x := range []struct {
		name string
		val  float64
	}{{"lambda", fr.Lambda}, {"mission_time", fr.MissionTime}} {
		if math.IsNaN(x.val) || math.IsInf(x.val, 0) || x.val < 0 {
			ps.add(n.Name, "failure_rate", "%s = %g must be a finite number >= 0", x.name, x.val)
			return
		}
	}
	p := -math.Expm1(-fr.Lambda * fr.MissionTime)
	n.CPT[f] = p
	n.CPT[1-f] = 1 - p
}
