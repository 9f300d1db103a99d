package sampling

import (
	"fmt"
	"math/rand/v2"
	"testing"

	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/model"
	"gonum.org/v1/gonum/stat/distuv"
)

// withJointNode returns a small random network plus a variable "joint"
// whose parents are all the others and whose state is, deterministically,
// the index of their joint configuration. The marginal of "joint" counted
// by the sampler is then the histogram of whole samples, drawn by the
// production sampling loop.
func withJointNode(seed uint64) *model.Network {
	doc := testnets.Random(rand.New(rand.NewPCG(seed, 5)), testnets.RandomOptions{Vars: 5, MaxParents: 2, MaxStates: 3, ZeroProb: 0.15})
	configs := 1
	var parents []string
	for _, v := range doc.Variables {
		configs *= len(v.States)
		parents = append(parents, v.Name)
	}
	states := make([]string, configs)
	table := make([][]float64, configs)
	for r := range table {
		states[r] = fmt.Sprintf("c%d", r)
		table[r] = make([]float64, configs)
		table[r][r] = 1 // rows run over parent configurations, last parent fastest
	}
	doc.Variables = append(doc.Variables, model.Variable{Name: "joint", States: states, Parents: parents, Table: table})
	return testnets.MustCompile(doc)
}

// chiSquareTest compares counts with the exact cell probabilities by
// Pearson's chi-square goodness-of-fit test (common practice: cells with
// an expected count below 5 are pooled), failing with probability alpha
// when the sampler is right. A count in a cell of probability exactly 0
// fails at once.
func chiSquareTest(t *testing.T, what string, counts, probs []float64, alpha float64) {
	t.Helper()
	n := 0.0
	for _, c := range counts {
		n += c
	}
	var stat, poolO, poolE float64
	cells := 0
	for i, p := range probs {
		if p == 0 {
			if counts[i] != 0 {
				t.Fatalf("%s: %v samples in cell %d of probability 0", what, counts[i], i)
			}
			continue
		}
		e := n * p
		if e < 5 {
			poolO += counts[i]
			poolE += e
			continue
		}
		stat += (counts[i] - e) * (counts[i] - e) / e
		cells++
	}
	if poolE > 0 {
		stat += (poolO - poolE) * (poolO - poolE) / poolE
		cells++
	}
	df := float64(cells - 1)
	crit := distuv.ChiSquared{K: df}.Quantile(1 - alpha)
	t.Logf("%s: chi-square %.1f on %v degrees of freedom (critical %.1f at %g)", what, stat, df, crit, alpha)
	if stat > crit {
		t.Errorf("%s: chi-square %.1f exceeds %.1f (df %v, false-failure rate %g)", what, stat, crit, df, alpha)
	}
}

// runKernel draws `blocks` blocks of n samples and merges them in order.
func runKernel(t *testing.T, k *Kernel, seed uint64, blocks, n int) *Stats {
	t.Helper()
	merged, st := k.NewStats(), k.NewStats()
	for b := range blocks {
		k.RunBlock(seed, int64(b), n, st)
		if err := merged.Merge(st); err != nil {
			t.Fatal(err)
		}
	}
	return merged
}

// Forward samples are draws from the joint distribution of the network
// (exact joint by enumeration).
func TestForwardJointChiSquare(t *testing.T) {
	for _, seed := range []uint64{1, 2} {
		net := withJointNode(seed)
		joint := indexOf(t, net, "joint")
		k, err := NewKernel(net, nil, MethodForward, []int{joint})
		if err != nil {
			t.Fatal(err)
		}
		st := runKernel(t, k, 11, 16, 8192)
		exact := enumerate(t, net, nil)
		chiSquareTest(t, fmt.Sprintf("forward, network %d", seed), st.StateW, exact.marg[joint], 1e-4)
	}
}

// Accepted rejection samples are draws from the joint posterior given hard
// and soft evidence (exact posterior by enumeration with the likelihoods).
func TestRejectionJointChiSquare(t *testing.T) {
	net := withJointNode(3)
	joint := indexOf(t, net, "joint")
	ev := net.NoEvidence()
	ev.Hard[indexOf(t, net, "v1")] = 0
	v3 := indexOf(t, net, "v3")
	lik := make([]float64, net.Vars[v3].Card())
	for s := range lik {
		lik[s] = 0.2 + 0.3*float64(s) // soft evidence favouring later states
	}
	ev.Soft[v3] = lik
	k, err := NewKernel(net, ev, MethodRejection, []int{joint})
	if err != nil {
		t.Fatal(err)
	}
	st := runKernel(t, k, 12, 25, 8192)
	if st.Accepted < 10000 {
		t.Fatalf("only %d accepted samples; pick more likely evidence", st.Accepted)
	}
	exact := enumerate(t, net, ev)
	chiSquareTest(t, "rejection with soft evidence", st.StateW, exact.marg[joint], 1e-4)
}
