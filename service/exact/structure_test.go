package exact

import (
	"math"
	"math/rand/v2"
	"slices"
	"testing"

	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/model"
)

// naiveOrder is weighted min-fill written straight from its definition:
// at every step recompute, for every remaining variable, the total weight
// states(x)*states(y) of the missing edges among its neighbours, and
// eliminate the lightest (ties: smaller clique state space, then lower
// index). It checks the incremental bookkeeping of eliminationOrder.
func naiveOrder(net *model.Network) []int32 {
	n := len(net.Vars)
	adj := make([][]bool, n)
	for i := range adj {
		adj[i] = make([]bool, n)
	}
	for v := range net.Vars {
		ps := net.Vars[v].Parents
		for i, p := range ps {
			adj[v][p], adj[p][v] = true, true
			for _, q := range ps[i+1:] {
				adj[p][q], adj[q][p] = true, true
			}
		}
	}
	card := func(v int) int64 { return int64(net.Vars[v].Card()) }
	gone := make([]bool, n)
	var order []int32
	for len(order) < n {
		best, bestFill, bestW := -1, int64(0), int64(0)
		for u := 0; u < n; u++ {
			if gone[u] {
				continue
			}
			var nb []int
			for x := 0; x < n; x++ {
				if !gone[x] && adj[u][x] {
					nb = append(nb, x)
				}
			}
			var fill int64
			w := card(u) // networks here are small: the product fits
			for i, x := range nb {
				w *= card(x)
				for _, y := range nb[i+1:] {
					if !adj[x][y] {
						fill += card(x) * card(y)
					}
				}
			}
			if best < 0 || fill < bestFill || fill == bestFill && w < bestW {
				best, bestFill, bestW = u, fill, w
			}
		}
		for x := 0; x < n; x++ {
			if gone[x] || !adj[best][x] {
				continue
			}
			for y := 0; y < n; y++ {
				if y != x && !gone[y] && adj[best][y] {
					adj[x][y] = true
				}
			}
		}
		gone[best] = true
		order = append(order, int32(best))
	}
	return order
}

// TestIncrementalBookkeeping recomputes, after every elimination step, the
// fill and clique state space of every remaining variable from its current
// neighbours and compares them with the incrementally updated values,
// including networks dense enough for clique state spaces beyond 2^62.
func TestIncrementalBookkeeping(t *testing.T) {
	bigSeen := false
	for seed := uint64(1); seed <= 6; seed++ {
		o := testnets.RandomOptions{Vars: 30 + int(seed*11%50), MaxParents: 2 + int(seed%7), MaxStates: 2 + int(seed%4)}
		if seed == 6 {
			o = testnets.RandomOptions{Vars: 60, MaxParents: 8, MaxStates: 5}
		}
		net := randomNet(seed, o)
		failed := false
		eliminationOrder(net, func(e *elim) {
			if failed {
				return
			}
			for u := range e.adj {
				if e.hpos[u] < 0 {
					continue
				}
				if want := e.initialFill(u); e.fill[u] != want {
					t.Errorf("seed %d: fill of %d is %d, recomputed %d", seed, u, e.fill[u], want)
					failed = true
				}
				var sum int64
				space, big := uint64(e.card[u]), false
				l := math.Log2(float64(e.card[u]))
				for _, x := range e.adj[u] {
					sum += e.card[x]
					l += math.Log2(float64(e.card[x]))
					if !big && space > bigClique/uint64(e.card[x]) {
						big = true
					} else if !big {
						space *= uint64(e.card[x])
					}
				}
				if sum != e.sumC[u] || big != e.big[u] || !big && space != e.space[u] || math.Abs(l-e.lspace[u]) > 1e-9 {
					t.Errorf("seed %d: variable %d: states sum %d/%d, space %d/%d, big %v/%v, log %g/%g (incremental/recomputed)",
						seed, u, e.sumC[u], sum, e.space[u], space, e.big[u], big, e.lspace[u], l)
					failed = true
				}
				bigSeen = bigSeen || big
			}
		})
	}
	if !bigSeen {
		t.Error("no clique state space passed 2^62: the test misses that branch")
	}
}

func randomNet(seed uint64, o testnets.RandomOptions) *model.Network {
	return testnets.MustCompile(testnets.Random(rand.New(rand.NewPCG(seed, 99)), o))
}

// TestEliminationOrderMatchesDefinition compares the incremental weighted
// min-fill with the from-scratch definition on random networks whose
// moral graphs range from trees to dense.
func TestEliminationOrderMatchesDefinition(t *testing.T) {
	for seed := uint64(1); seed <= 60; seed++ {
		o := testnets.RandomOptions{Vars: 5 + int(seed%40), MaxParents: 1 + int(seed%5), MaxStates: 2 + int(seed%3)}
		if seed%4 == 0 {
			o.Window = 4
		}
		net := randomNet(seed, o)
		got, _, _ := eliminationOrder(net, nil)
		want := naiveOrder(net)
		if !slices.Equal(got, want) {
			t.Errorf("seed %d (%+v): order %v, definition gives %v", seed, o, got, want)
		}
	}
}

// components counts the connected components of the network's graph.
func components(net *model.Network) int {
	n := len(net.Vars)
	root := make([]int, n)
	for i := range root {
		root[i] = i
	}
	var find func(int) int
	find = func(i int) int {
		for root[i] != i {
			root[i] = root[root[i]]
			i = root[i]
		}
		return i
	}
	count := n
	for v := range net.Vars {
		for _, p := range net.Vars[v].Parents {
			if a, b := find(v), find(p); a != b {
				root[a] = b
				count--
			}
		}
	}
	return count
}

func isSubset(a, b []int) bool {
	for _, x := range a {
		if !slices.Contains(b, x) {
			return false
		}
	}
	return true
}

// TestJunctionTreeProperties checks the structure against the definition
// of a junction tree (common practice): every family lies in its assigned
// clique, the cliques holding any variable form a connected subtree
// (running intersection), no clique is contained in another, there is one
// tree per connected component, and the Cost matches the cliques.
func TestJunctionTreeProperties(t *testing.T) {
	for seed := uint64(1); seed <= 80; seed++ {
		o := testnets.RandomOptions{Vars: 1 + int(seed*7%120), MaxParents: int(seed % 5), MaxStates: 2 + int(seed%3)}
		if seed%3 == 0 {
			o.Window = 6
		}
		net := randomNet(seed, o)
		st := triangulate(net)
		nc := len(st.cliques)
		roots := 0
		for c := range st.cliques {
			if !slices.IsSorted(st.cliques[c]) {
				t.Fatalf("seed %d: clique %d not sorted", seed, c)
			}
			p := st.parent[c]
			if p < -1 || p >= nc || p == c {
				t.Fatalf("seed %d: clique %d has parent %d", seed, c, p)
			}
			if p < 0 {
				roots++
			}
			// Walk to the root: must end within nc steps (no cycle).
			steps := 0
			for q := c; q >= 0; q = st.parent[q] {
				if steps++; steps > nc {
					t.Fatalf("seed %d: cycle through clique %d", seed, c)
				}
			}
		}
		if want := components(net); roots != want {
			t.Errorf("seed %d: %d trees for %d connected components", seed, roots, want)
		}
		for v := range net.Vars {
			fam := append([]int{v}, net.Vars[v].Parents...)
			if h := st.famHome[v]; h < 0 || h >= nc || !isSubset(fam, st.cliques[h]) {
				t.Errorf("seed %d: family of %d not in its clique", seed, v)
			}
			// Running intersection: exactly one clique holding v has a
			// parent that does not hold v (or is a root).
			tops := 0
			for c := range st.cliques {
				if slices.Contains(st.cliques[c], v) {
					if p := st.parent[c]; p < 0 || !slices.Contains(st.cliques[p], v) {
						tops++
					}
				}
			}
			if tops != 1 {
				t.Errorf("seed %d: variable %d spans %d disconnected parts of the tree", seed, v, tops)
			}
		}
		for a := range st.cliques {
			for b := range st.cliques {
				if a != b && isSubset(st.cliques[a], st.cliques[b]) {
					t.Errorf("seed %d: clique %v lies inside clique %v", seed, st.cliques[a], st.cliques[b])
				}
			}
		}
		var want Cost
		want.Cliques = nc
		for _, c := range st.cliques {
			e := 1
			for _, v := range c {
				e *= net.Vars[v].Card()
			}
			want.TotalEntries += e
			want.LargestClique = max(want.LargestClique, e)
			want.Treewidth = max(want.Treewidth, len(c)-1)
		}
		if st.cost != want {
			t.Errorf("seed %d: cost %+v, cliques give %+v", seed, st.cost, want)
		}
	}
}

// TestSeparatorLayout: every clique lists first the variables it shares
// with its parent, so separator entries own contiguous blocks.
func TestSeparatorLayout(t *testing.T) {
	net := randomNet(5, testnets.RandomOptions{Vars: 60, MaxParents: 3, MaxStates: 3, Window: 8})
	eng, err := Compile(net, Options{})
	if err != nil {
		t.Fatal(err)
	}
	for c, cl := range eng.cliques {
		if cl.parent < 0 {
			if cl.nsep != 0 || cl.sepLen != 1 {
				t.Errorf("root %d has a separator", c)
			}
			continue
		}
		pl := eng.cliques[cl.parent]
		for k, v := range cl.vars {
			if shared := slices.Contains(pl.vars, v); shared != (k < cl.nsep) {
				t.Errorf("clique %d: variable %d at %d, shared with parent %v, nsep %d", c, v, k, shared, cl.nsep)
			}
		}
	}
}

// TestTieBreakOrder: with equal fill, the smaller clique state space goes
// first, and a state space beyond 2^62 always loses to one below it.
func TestTieBreakOrder(t *testing.T) {
	e := &elim{
		fill:   []int64{5, 5, 5, 5},
		space:  []uint64{8, 9, bigClique, 0},
		big:    []bool{false, false, false, true},
		lspace: []float64{3, math.Log2(9), 62, 61.9}, // 61.9 is stale on purpose: big decides
	}
	for _, c := range []struct {
		a, b int32
		want bool
	}{{0, 1, true}, {1, 0, false}, {1, 2, true}, {2, 3, true}, {3, 2, false}, {0, 0, false}} {
		if got := e.less(c.a, c.b); got != c.want {
			t.Errorf("less(%d, %d) = %v, want %v", c.a, c.b, got, c.want)
		}
	}
	e.fill[3] = 4
	if !e.less(3, 0) {
		t.Error("smaller fill must win over clique size")
	}
}
