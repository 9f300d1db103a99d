package model

import (
	"container/heap"
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
	"fmt"
	"math"
	"strings"
)

// Limits bound what Compile accepts. A zero field takes its default.
type Limits struct {
	MaxVariables    int // variables per model; default 100,000
	MaxStates       int // states per variable; default 512
	MaxParents      int // parents per variable; default 64
	MaxTableEntries int // expanded table entries over the whole model; default 20,000,000
}

// DefaultLimits are the limits used when a field of Limits is zero.
var DefaultLimits = Limits{MaxVariables: 100_000, MaxStates: 512, MaxParents: 64, MaxTableEntries: 20_000_000}

func (l Limits) withDefaults() Limits {
	if l.MaxVariables <= 0 {
		l.MaxVariables = DefaultLimits.MaxVariables
	}
	if l.MaxStates <= 0 {
		l.MaxStates = DefaultLimits.MaxStates
	}
	if l.MaxParents <= 0 {
		l.MaxParents = DefaultLimits.MaxParents
	}
	if l.MaxTableEntries <= 0 {
		l.MaxTableEntries = DefaultLimits.MaxTableEntries
	}
	return l
}

// RowTolerance is how far a table row may sum from 1.
const RowTolerance = 1e-6

// Network is a compiled model: variables in topological order with flat
// conditional probability tables. It is immutable and safe for concurrent use.
type Network struct {
	Name        string
	Description string
	Vars        []Node // topological order: parents before children
	// DocOrder lists variable indices in the order of the document.
	DocOrder []int
	// Hash is the hex SHA-256 of the canonical form (see the package comment).
	Hash  string
	Arcs  int
	index map[string]int
}

// Node is one compiled variable.
type Node struct {
	Name    string
	States  []string
	Parents []int // indices into Network.Vars, in the document's parent order
	// Strides gives the row of a parent configuration:
	// row = sum_j state(Parents[j]) * Strides[j]; the last parent has stride 1.
	Strides  []int
	Rows     int
	CPT      []float64 // Rows x Card, row-major: CPT[row*Card+state]
	Children []int
	Fault    []bool // per state: whether the state counts as failed/active
	Kind     string // table, rows, noisy_or, noisy_max, gate, failure_rate
}

// Card is the number of states.
func (n *Node) Card() int { return len(n.States) }

// Row returns the probabilities of the node's states for one table row.
func (n *Node) Row(r int) []float64 { c := len(n.States); return n.CPT[r*c : (r+1)*c] }

// StateIndex returns the index of the named state.
func (n *Node) StateIndex(s string) (int, bool) {
	for i, name := range n.States {
		if name == s {
			return i, true
		}
	}
	return 0, false
}

// Index returns the index of the named variable.
func (net *Network) Index(name string) (int, bool) {
	i, ok := net.index[name]
	return i, ok
}

// FreeParameters counts the independent table entries: rows*(card-1) summed.
func (net *Network) FreeParameters() int {
	total := 0
	for i := range net.Vars {
		total += net.Vars[i].Rows * (net.Vars[i].Card() - 1)
	}
	return total
}

// TableEntries counts all table entries.
func (net *Network) TableEntries() int {
	total := 0
	for i := range net.Vars {
		total += len(net.Vars[i].CPT)
	}
	return total
}

// Compile validates a document against the limits and compiles it.
// Errors wrap ErrInvalid (and ErrTooLarge when a limit is hit) and are
// *ValidationError values that name each variable and problem.
func Compile(doc *Document, limits Limits) (*Network, error) {
	lim := limits.withDefaults()
	var ps problems
	if doc == nil || len(doc.Variables) == 0 {
		ps.add("", "variables", "the model has no variables")
		return nil, ps.err()
	}
	if len(doc.Variables) > lim.MaxVariables {
		ps.addLimit("", "variables", "%d variables exceed the limit of %d", len(doc.Variables), lim.MaxVariables)
		return nil, ps.err()
	}
	index := make(map[string]int, len(doc.Variables))
	for i, v := range doc.Variables {
		if v.Name == "" {
			ps.add(fmt.Sprintf("#%d", i+1), "name", "variable has no name")
			continue
		}
		if _, dup := index[v.Name]; dup {
			ps.add(v.Name, "name", "duplicate variable name")
			continue
		}
		index[v.Name] = i
	}
	for i := range doc.Variables {
		checkShape(&doc.Variables[i], i, index, lim, &ps)
	}
	if err := ps.err(); err != nil {
		return nil, err
	}
	order, cycle := topoOrder(doc, index)
	if cycle != nil {
		ps.add(cycle[0], "parents", "cycle: %s", strings.Join(cycle, " -> "))
		return nil, ps.err()
	}
	net := &Network{Name: doc.Name, Description: doc.Description, Vars: make([]Node, len(order)), index: make(map[string]int, len(order))}
	pos := make([]int, len(order)) // document index -> compiled index
	for ci, di := range order {
		pos[di] = ci
		net.index[doc.Variables[di].Name] = ci
	}
	net.DocOrder = pos
	total := 0
	for ci, di := range order {
		v := &doc.Variables[di]
		n := &net.Vars[ci]
		n.Name, n.States = v.Name, append([]string(nil), v.States...)
		n.Parents = make([]int, len(v.Parents))
		n.Strides = make([]int, len(v.Parents))
		rows := 1
		overflow := false
		for j := len(v.Parents) - 1; j >= 0; j-- {
			p := pos[index[v.Parents[j]]]
			n.Parents[j] = p
			n.Strides[j] = rows
			rows *= len(doc.Variables[index[v.Parents[j]]].States)
			if rows > lim.MaxTableEntries {
				overflow = true
				break
			}
		}
		if overflow || rows*len(v.States) > lim.MaxTableEntries || total+rows*len(v.States) > lim.MaxTableEntries {
			ps.addLimit(v.Name, "", "its table would need more than the limit of %d entries for the whole model (%s)", lim.MaxTableEntries, tableSize(doc, index, v))
			break
		}
		n.Rows = rows
		total += rows * len(v.States)
		n.Fault = faultMask(v)
		net.Arcs += len(v.Parents)
	}
	if err := ps.err(); err != nil {
		return nil, err
	}
	for ci := range net.Vars {
		for _, p := range net.Vars[ci].Parents {
			net.Vars[p].Children = append(net.Vars[p].Children, ci)
		}
	}
	for ci, di := range order {
		expand(net, ci, &doc.Variables[di], &ps)
	}
	if err := ps.err(); err != nil {
		return nil, err
	}
	net.Hash = canonicalHash(net)
	return net, nil
}

func tableSize(doc *Document, index map[string]int, v *Variable) string {
	var parts []string
	for _, p := range v.Parents {
		parts = append(parts, fmt.Sprint(len(doc.Variables[index[p]].States)))
	}
	parts = append(parts, fmt.Sprint(len(v.States)))
	return strings.Join(parts, " x ") + " entries"
}

func checkShape(v *Variable, i int, index map[string]int, lim Limits, ps *problems) {
	name := v.Name
	if name == "" {
		return
	}
	if len(v.States) == 0 {
		ps.add(name, "states", "no states listed")
	} else if len(v.States) < 2 {
		ps.add(name, "states", "a variable needs at least two states, found %d", len(v.States))
	}
	if len(v.States) > lim.MaxStates {
		ps.addLimit(name, "states", "%d states exceed the limit of %d", len(v.States), lim.MaxStates)
		return
	}
	seen := map[string]bool{}
	for _, s := range v.States {
		if s == "" {
			ps.add(name, "states", "empty state name")
		} else if seen[s] {
			ps.add(name, "states", "duplicate state %q", s)
		}
		seen[s] = true
	}
	if len(v.Parents) > lim.MaxParents {
		ps.addLimit(name, "parents", "%d parents exceed the limit of %d", len(v.Parents), lim.MaxParents)
	}
	seenP := map[string]bool{}
	for _, p := range v.Parents {
		switch j, ok := index[p]; {
		case p == name:
			ps.add(name, "parents", "the variable is its own parent")
		case !ok:
			ps.add(name, "parents", "unknown parent %q", p)
		case seenP[p]:
			ps.add(name, "parents", "parent %q listed twice", p)
		default:
			_ = j
		}
		seenP[p] = true
	}
	for _, s := range v.FaultStates {
		if !seen[s] {
			ps.add(name, "fault_states", "unknown state %q", s)
		}
	}
	if len(v.FaultStates) > 0 && len(v.FaultStates) == len(v.States) {
		ps.add(name, "fault_states", "every state is a fault state; leave at least one normal state")
	}
	kinds := distributionKinds(v)
	switch len(kinds) {
	case 0:
		ps.add(name, "", "no distribution: give one of table, rows, noisy_or, noisy_max, gate, failure_rate")
	case 1:
	default:
		ps.add(name, "", "more than one distribution given (%s): give exactly one", strings.Join(kinds, ", "))
	}
}

func distributionKinds(v *Variable) []string {
	var k []string
	if v.Table != nil {
		k = append(k, "table")
	}
	if v.Rows != nil {
		k = append(k, "rows")
	}
	if v.NoisyOR != nil {
		k = append(k, "noisy_or")
	}
	if v.NoisyMAX != nil {
		k = append(k, "noisy_max")
	}
	if v.Gate != nil {
		k = append(k, "gate")
	}
	if v.FailureRate != nil {
		k = append(k, "failure_rate")
	}
	return k
}

func faultMask(v *Variable) []bool {
	m := make([]bool, len(v.States))
	if len(v.FaultStates) == 0 {
		for i := 1; i < len(m); i++ {
			m[i] = true
		}
		return m
	}
	for i, s := range v.States {
		for _, f := range v.FaultStates {
			if s == f {
				m[i] = true
			}
		}
	}
	return m
}

// docHeap orders ready variables by document position.
type docHeap []int

func (h docHeap) Len() int           { return len(h) }
func (h docHeap) Less(i, j int) bool { return h[i] < h[j] }
func (h docHeap) Swap(i, j int)      { h[i], h[j] = h[j], h[i] }
func (h *docHeap) Push(x any)        { *h = append(*h, x.(int)) }
func (h *docHeap) Pop() any          { old := *h; x := old[len(old)-1]; *h = old[:len(old)-1]; return x }

// topoOrder returns document indices in topological order, taking the
// earliest ready variable in document order first, or a cycle as a list of
// names whose first and last entries are equal.
func topoOrder(doc *Document, index map[string]int) ([]int, []string) {
	n := len(doc.Variables)
	indeg := make([]int, n)
	children := make([][]int, n)
	for i, v := range doc.Variables {
		for _, p := range v.Parents {
			j := index[p]
			children[j] = append(children[j], i)
			indeg[i]++
		}
	}
	h := &docHeap{}
	for i := range indeg {
		if indeg[i] == 0 {
			*h = append(*h, i)
		}
	}
	heap.Init(h)
	order := make([]int, 0, n)
	for h.Len() > 0 {
		i := heap.Pop(h).(int)
		order = append(order, i)
		for _, c := range children[i] {
			indeg[c]--
			if indeg[c] == 0 {
				heap.Push(h, c)
			}
		}
	}
	if len(order) == n {
		return order, nil
	}
	return nil, findCycle(doc, index, indeg)
}

// findCycle walks parent links among the variables left with positive
// in-degree, which always contain a cycle.
func findCycle(doc *Document, index map[string]int, indeg []int) []string {
	start := -1
	for i, d := range indeg {
		if d > 0 {
			start = i
			break
		}
	}
	seenAt := map[int]int{}
	var path []int
	cur := start
	for {
		if at, ok := seenAt[cur]; ok {
			cyc := path[at:]
			// path follows parent links (child -> parent); print in arc direction parent -> child.
			// Start at the variable that comes first in the document.
			arc := make([]int, 0, len(cyc))
			for k := len(cyc) - 1; k >= 0; k-- {
				arc = append(arc, cyc[k])
			}
			first := 0
			for k := range arc {
				if arc[k] < arc[first] {
					first = k
				}
			}
			names := make([]string, 0, len(arc)+1)
			for k := range arc {
				names = append(names, doc.Variables[arc[(first+k)%len(arc)]].Name)
			}
			names = append(names, names[0])
			return names
		}
		seenAt[cur] = len(path)
		path = append(path, cur)
		next := -1
		for _, p := range doc.Variables[cur].Parents {
			if j := index[p]; indeg[j] > 0 {
				next = j
				break
			}
		}
		cur = next
	}
}

func canonicalHash(net *Network) string {
	h := sha256.New()
	var buf [8]byte
	writeStr := func(s string) {
		binary.LittleEndian.PutUint64(buf[:], uint64(len(s)))
		h.Write(buf[:])
		h.Write([]byte(s))
	}
	writeInt := func(i int) {
		binary.LittleEndian.PutUint64(buf[:], uint64(i))
		h.Write(buf[:])
	}
	writeInt(len(net.Vars))
	for i := range net.Vars {
		n := &net.Vars[i]
		writeStr(n.Name)
		writeInt(len(n.States))
		for _, s := range n.States {
			writeStr(s)
		}
		writeInt(len(n.Parents))
		for _, p := range n.Parents {
			writeStr(net.Vars[p].Name)
		}
		for j, f := range n.Fault {
			if f {
				writeInt(j)
			}
		}
		writeInt(-1)
		for _, p := range n.CPT {
			binary.LittleEndian.PutUint64(buf[:], math.Float64bits(p))
			h.Write(buf[:])
		}
	}
	return hex.EncodeToString(h.Sum(nil))
}
