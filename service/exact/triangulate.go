package exact

import (
	"math"
	"slices"

	"github.com/beliefd/beliefd/service/model"
)

// Cost describes the junction tree that Compile builds for a network. Entry
// counts saturate at math.MaxInt for networks far beyond any limit.
type Cost struct {
	LargestClique int // entries in the largest clique table
	TotalEntries  int // sum of the clique table sizes
	Cliques       int // number of cliques
	Treewidth     int // variables in the largest clique, minus one
}

// structure is the evidence-independent result of triangulating a network.
type structure struct {
	order   []int32 // elimination order
	cliques [][]int // maximal cliques, variables sorted by index
	parent  []int   // tree parent of each clique, -1 for a root
	famHome []int   // variable -> clique that holds its family
	entries []int   // table entries per clique (saturating)
	cost    Cost
}

// EstimateCost triangulates the network with the same heuristic Compile
// uses and reports the size of the resulting junction tree without
// allocating any table. A network that fails validation gets the zero Cost;
// Compile reports what is wrong with it.
func EstimateCost(net *model.Network) Cost {
	if checkNetwork(net) != nil {
		return Cost{}
	}
	return triangulate(net).cost
}

// satMul multiplies non-negative ints, saturating at math.MaxInt.
func satMul(a, b int) int {
	if a == 0 || b == 0 {
		return 0
	}
	if a > math.MaxInt/b {
		return math.MaxInt
	}
	return a * b
}

// satAdd adds non-negative ints, saturating at math.MaxInt.
func satAdd(a, b int) int {
	if a > math.MaxInt-b {
		return math.MaxInt
	}
	return a + b
}

// bigClique is the state space above which clique weights are compared by
// their (approximate) logarithm; below it they are exact integers, so ties
// between equal state spaces are always recognised.
const bigClique = 1 << 62

// elim holds the graph during greedy elimination.
type elim struct {
	adj  [][]int32 // sorted neighbour lists of the remaining graph
	card []int64   // states per variable
	lg   []float64 // log2(card)
	sumC []int64   // sum of card over current neighbours
	fill []int64   // weighted fill: sum of card(x)*card(y) over non-adjacent neighbour pairs
	// The state space of the clique that eliminating u would create:
	// exactly in space[u] while at most bigClique, else big[u] is set and
	// only lspace[u], its log2, is kept.
	space  []uint64
	big    []bool
	lspace []float64

	heap []int32 // min-heap of remaining variables by (fill, cw, index)
	hpos []int32 // position of each variable in heap, -1 once eliminated
}

func (e *elim) less(a, b int32) bool {
	if e.fill[a] != e.fill[b] {
		return e.fill[a] < e.fill[b]
	}
	switch {
	case !e.big[a] && !e.big[b]:
		if e.space[a] != e.space[b] {
			return e.space[a] < e.space[b]
		}
	case e.big[a] != e.big[b]:
		return e.big[b]
	case e.lspace[a] != e.lspace[b]:
		return e.lspace[a] < e.lspace[b]
	}
	return a < b
}

// recount computes the clique state space of u from its neighbours.
func (e *elim) recount(u int32) {
	sp, big, l := uint64(e.card[u]), false, e.lg[u]
	for _, x := range e.adj[u] {
		l += e.lg[x]
		if !big {
			if c := uint64(e.card[x]); sp > bigClique/c {
				big = true
			} else {
				sp *= c
			}
		}
	}
	e.space[u], e.big[u], e.lspace[u] = sp, big, l
}

// grow accounts for x joining the neighbours of u.
func (e *elim) grow(u, x int32) {
	e.lspace[u] += e.lg[x]
	if e.big[u] {
		return
	}
	if c := uint64(e.card[x]); e.space[u] > bigClique/c {
		e.big[u] = true
	} else {
		e.space[u] *= c
	}
}

// shrink accounts for x leaving the neighbours of u (already removed from
// adj[u]).
func (e *elim) shrink(u, x int32) {
	e.lspace[u] -= e.lg[x]
	if !e.big[u] {
		e.space[u] /= uint64(e.card[x])
	} else if e.lspace[u] < 62.5 {
		e.recount(u)
	}
}

func (e *elim) swap(i, j int) {
	e.heap[i], e.heap[j] = e.heap[j], e.heap[i]
	e.hpos[e.heap[i]] = int32(i)
	e.hpos[e.heap[j]] = int32(j)
}

func (e *elim) up(i int) bool {
	moved := false
	for i > 0 {
		p := (i - 1) / 2
		if !e.less(e.heap[i], e.heap[p]) {
			break
		}
		e.swap(i, p)
		i = p
		moved = true
	}
	return moved
}

func (e *elim) down(i int) {
	n := len(e.heap)
	for {
		l := 2*i + 1
		if l >= n {
			return
		}
		m := l
		if r := l + 1; r < n && e.less(e.heap[r], e.heap[l]) {
			m = r
		}
		if !e.less(e.heap[m], e.heap[i]) {
			return
		}
		e.swap(i, m)
		i = m
	}
}

func (e *elim) fix(v int32) {
	i := int(e.hpos[v])
	if i < 0 {
		return
	}
	if !e.up(i) {
		e.down(i)
	}
}

func (e *elim) pop() int32 {
	v := e.heap[0]
	last := len(e.heap) - 1
	e.swap(0, last)
	e.heap = e.heap[:last]
	e.hpos[v] = -1
	if last > 0 {
		e.down(0)
	}
	return v
}

// contains reports whether sorted list a holds x.
func contains(a []int32, x int32) bool {
	_, ok := slices.BinarySearch(a, x)
	return ok
}

// common calls visit for every element of both sorted lists and returns
// the sum of card over them. It walks the shorter list and searches the
// longer one when their lengths differ a lot, and merges otherwise.
func (e *elim) common(a, b []int32, visit func(x int32)) int64 {
	if len(a) > len(b) {
		a, b = b, a
	}
	var sum int64
	if len(a) == 0 {
		return 0
	}
	if len(a)*8 < len(b) {
		for _, x := range a {
			if contains(b, x) {
				sum += e.card[x]
				if visit != nil {
					visit(x)
				}
			}
		}
		return sum
	}
	i, j := 0, 0
	for i < len(a) && j < len(b) {
		switch {
		case a[i] < b[j]:
			i++
		case a[i] > b[j]:
			j++
		default:
			x := a[i]
			sum += e.card[x]
			if visit != nil {
				visit(x)
			}
			i++
			j++
		}
	}
	return sum
}

// moralGraph returns the sorted neighbour lists of the moral graph.
func moralGraph(net *model.Network) [][]int32 {
	n := len(net.Vars)
	adj := make([][]int32, n)
	for v := range net.Vars {
		ps := net.Vars[v].Parents
		for i, p := range ps {
			adj[v] = append(adj[v], int32(p))
			adj[p] = append(adj[p], int32(v))
			for _, q := range ps[i+1:] {
				adj[p] = append(adj[p], int32(q))
				adj[q] = append(adj[q], int32(p))
			}
		}
	}
	for v := range adj {
		slices.Sort(adj[v])
		adj[v] = slices.Compact(adj[v])
	}
	return adj
}

// initialFill computes the weighted fill of u from scratch.
func (e *elim) initialFill(u int) int64 {
	var s, q, edges int64
	nu := e.adj[u]
	for _, x := range nu {
		c := e.card[x]
		s += c
		q += c * c
	}
	for _, x := range nu {
		edges += e.card[x] * e.common(e.adj[x], nu, nil)
	}
	return (s*s-q)/2 - edges/2
}

// eliminationOrder runs greedy weighted min-fill: at each step it
// eliminates the variable whose elimination adds the fill edges of least
// total weight, an edge {x,y} weighing states(x)*states(y); ties go to the
// variable whose clique has the smaller state space, then to the lower
// index. It returns the order and, for each step, the neighbours of the
// eliminated variable at that time (sorted).
//
// check, when not nil, is called after every step (for tests).
func eliminationOrder(net *model.Network, check func(*elim)) (order []int32, nbrStart []int, nbrs []int32) {
	n := len(net.Vars)
	e := &elim{
		adj:    moralGraph(net),
		card:   make([]int64, n),
		lg:     make([]float64, n),
		sumC:   make([]int64, n),
		fill:   make([]int64, n),
		space:  make([]uint64, n),
		big:    make([]bool, n),
		lspace: make([]float64, n),
		heap:   make([]int32, n),
		hpos:   make([]int32, n),
	}
	for v := range net.Vars {
		c := len(net.Vars[v].States)
		e.card[v] = int64(c)
		e.lg[v] = math.Log2(float64(c))
	}
	for u := 0; u < n; u++ {
		for _, x := range e.adj[u] {
			e.sumC[u] += e.card[x]
		}
		e.recount(int32(u))
		e.fill[u] = e.initialFill(u)
		e.heap[u] = int32(u)
		e.hpos[u] = int32(u)
	}
	for i := n/2 - 1; i >= 0; i-- {
		e.down(i)
	}

	dirtyAt := make([]int32, n) // step when last queued for a heap fix
	var dirty []int32
	queue := func(x int32, step int32) {
		if dirtyAt[x] != step {
			dirtyAt[x] = step
			dirty = append(dirty, x)
		}
	}
	// mark[x] == stamp flags x as a member of the list marked last.
	mark := make([]int64, n)
	var stamp int64
	markAll := func(list []int32) {
		stamp++
		for _, x := range list {
			mark[x] = stamp
		}
	}
	order = make([]int32, 0, n)
	nbrStart = make([]int, 0, n+1)
	nbrStart = append(nbrStart, 0)
	for step := int32(1); len(e.heap) > 0; step++ {
		v := e.pop()
		nv := e.adj[v]
		order = append(order, v)
		nbrs = append(nbrs, nv...)
		nbrStart = append(nbrStart, len(nbrs))
		dirty = dirty[:0]
		cv := e.card[v]
		// Remove v: pairs {v, x} in N(u) with x not adjacent to v stop
		// counting as fill.
		markAll(nv)
		for _, u := range nv {
			var cs int64 // states summed over N(u) ∩ N(v)
			if au := e.adj[u]; len(au) <= 8*len(nv) {
				for _, x := range au {
					if mark[x] == stamp {
						cs += e.card[x]
					}
				}
			} else {
				for _, x := range nv {
					if contains(au, x) {
						cs += e.card[x]
					}
				}
			}
			e.fill[u] -= cv * (e.sumC[u] - cv - cs)
			e.sumC[u] -= cv
			if i, ok := slices.BinarySearch(e.adj[u], v); ok {
				e.adj[u] = slices.Delete(e.adj[u], i, i+1)
			}
			e.shrink(u, v)
			queue(u, step)
		}
		// Connect the neighbours pairwise. Adding edge {a,b} removes the
		// pair from the fill of every common neighbour, and adds to the
		// fill of a the pairs {b, x} for x in N(a) not adjacent to b.
		for i, a := range nv {
			rest := nv[i+1:]
			if len(rest) == 0 {
				break
			}
			// Mark N(a) unless it is much longer than the work it saves.
			marked := len(e.adj[a]) <= 8*len(rest)
			if marked {
				markAll(e.adj[a])
			}
			for _, b := range rest {
				if marked && mark[b] == stamp || !marked && contains(e.adj[a], b) {
					continue
				}
				w := e.card[a] * e.card[b]
				var cs int64
				if ab := e.adj[b]; marked && len(ab) <= 8*len(e.adj[a]) {
					for _, x := range ab {
						if mark[x] == stamp {
							e.fill[x] -= w
							cs += e.card[x]
							queue(x, step)
						}
					}
				} else {
					cs = e.common(e.adj[a], ab, func(x int32) {
						e.fill[x] -= w
						queue(x, step)
					})
				}
				e.fill[a] += e.card[b] * (e.sumC[a] - cs)
				e.fill[b] += e.card[a] * (e.sumC[b] - cs)
				ia, _ := slices.BinarySearch(e.adj[a], b)
				e.adj[a] = slices.Insert(e.adj[a], ia, b)
				ib, _ := slices.BinarySearch(e.adj[b], a)
				e.adj[b] = slices.Insert(e.adj[b], ib, a)
				if marked {
					mark[b] = stamp
				}
				e.sumC[a] += e.card[b]
				e.sumC[b] += e.card[a]
				e.grow(a, b)
				e.grow(b, a)
			}
		}
		e.adj[v] = nil
		for _, x := range dirty {
			e.fix(x)
		}
		if check != nil {
			check(e)
		}
	}
	return order, nbrStart, nbrs
}

// triangulate eliminates the network's moral graph and builds the
// junction tree's cliques (maximal elimination cliques joined along the
// elimination tree).
func triangulate(net *model.Network) *structure {
	n := len(net.Vars)
	order, nbrStart, nbrs := eliminationOrder(net, nil)
	pos := make([]int32, n)
	for i, v := range order {
		pos[v] = int32(i)
	}
	// Elimination tree: the parent of step i is the step of the neighbour
	// eliminated first after it. Work in steps, not variables.
	parent := make([]int32, n)
	size := make([]int32, n) // clique size (variables) of each step
	for i := 0; i < n; i++ {
		parent[i] = -1
		size[i] = int32(nbrStart[i+1]-nbrStart[i]) + 1
		for _, x := range nbrs[nbrStart[i]:nbrStart[i+1]] {
			if p := pos[x]; parent[i] < 0 || p < parent[i] {
				parent[i] = p
			}
		}
	}
	// A step's clique is not maximal exactly when a child's clique has one
	// more variable, and then it is contained in that child's clique.
	rep := make([]int32, n)
	merged := make([]bool, n)
	for i := int32(0); i < int32(n); i++ {
		rep[i] = i
	}
	// Children come before parents in step order, so rep[i] is final by the
	// time step i passes it on to its parent.
	for i := 0; i < n; i++ {
		if p := parent[i]; p >= 0 && !merged[p] && size[i] == size[p]+1 {
			merged[p] = true
			rep[p] = rep[i]
		}
	}
	top := make([]int32, n) // last step merged into each representative
	for i := int32(0); i < int32(n); i++ {
		top[rep[i]] = i
	}
	index := make([]int, n) // representative step -> clique index
	st := &structure{order: order}
	for i := 0; i < n; i++ {
		if rep[i] != int32(i) {
			index[i] = -1
			continue
		}
		index[i] = len(st.cliques)
		vars := make([]int, 0, size[i])
		vars = append(vars, int(order[i]))
		for _, x := range nbrs[nbrStart[i]:nbrStart[i+1]] {
			vars = append(vars, int(x))
		}
		slices.Sort(vars)
		st.cliques = append(st.cliques, vars)
	}
	st.parent = make([]int, len(st.cliques))
	st.entries = make([]int, len(st.cliques))
	for i := 0; i < n; i++ {
		if rep[i] != int32(i) {
			continue
		}
		c := index[i]
		st.parent[c] = -1
		if p := parent[top[i]]; p >= 0 {
			st.parent[c] = index[rep[p]]
		}
		e := 1
		for _, v := range st.cliques[c] {
			e = satMul(e, len(net.Vars[v].States))
		}
		st.entries[c] = e
		st.cost.TotalEntries = satAdd(st.cost.TotalEntries, e)
		st.cost.LargestClique = max(st.cost.LargestClique, e)
		st.cost.Treewidth = max(st.cost.Treewidth, len(st.cliques[c])-1)
	}
	st.cost.Cliques = len(st.cliques)
	// The family of v is a clique of the moral graph, so the elimination
	// clique of its first-eliminated member contains it.
	st.famHome = make([]int, n)
	for v := range net.Vars {
		first := pos[v]
		for _, p := range net.Vars[v].Parents {
			first = min(first, pos[p])
		}
		st.famHome[v] = index[rep[first]]
	}
	return st
}
