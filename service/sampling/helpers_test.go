package sampling

import (
	"context"
	"math"
	"math/rand/v2"
	"testing"

	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/model"
	"gonum.org/v1/gonum/stat/distuv"
)

// exactAnswer is the result of brute-force enumeration of the joint
// distribution: the probability of the evidence (with soft evidence, the
// sum over all states of the joint times the likelihoods) and the posterior
// marginal of every variable.
type exactAnswer struct {
	pe   float64
	marg [][]float64
}

// enumerate sums the joint over every configuration of the network. It
// works from model.Network directly (not from the kernel's flattened
// tables), so it checks the kernel independently.
func enumerate(t testing.TB, net *model.Network, ev *model.Evidence) exactAnswer {
	t.Helper()
	n := len(net.Vars)
	configs := 1
	for i := range net.Vars {
		configs *= net.Vars[i].Card()
		if configs > 1<<22 {
			t.Fatalf("network too large to enumerate")
		}
	}
	if ev == nil {
		ev = net.NoEvidence()
	}
	marg := make([][]float64, n)
	for v := range marg {
		marg[v] = make([]float64, net.Vars[v].Card())
	}
	x := make([]int, n)
	pe := 0.0
	for c := 0; c < configs; c++ {
		rest := c
		for v := n - 1; v >= 0; v-- {
			card := net.Vars[v].Card()
			x[v] = rest % card
			rest /= card
		}
		p := 1.0
		for v := 0; v < n && p > 0; v++ {
			nd := &net.Vars[v]
			row := 0
			for j, par := range nd.Parents {
				row += x[par] * nd.Strides[j]
			}
			p *= nd.CPT[row*nd.Card()+x[v]]
			if h := ev.Hard[v]; h >= 0 && x[v] != h {
				p = 0
			}
			if l := ev.Soft[v]; l != nil {
				p *= l[x[v]]
			}
		}
		pe += p
		for v := range marg {
			marg[v][x[v]] += p
		}
	}
	for v := range marg {
		for s := range marg[v] {
			marg[v][s] /= pe
		}
	}
	return exactAnswer{pe: pe, marg: marg}
}

// chestClinic returns the chest-clinic network.
func chestClinic(t testing.TB) *model.Network {
	t.Helper()
	return testnets.MustCompile(testnets.ChestClinic())
}

// randomNet is a small random network for enumeration.
func randomNet(seed uint64, vars int, zeroProb float64) *model.Network {
	doc := testnets.Random(rand.New(rand.NewPCG(seed, 99)), testnets.RandomOptions{
		Vars: vars, MaxParents: 3, MaxStates: 3, ZeroProb: zeroProb})
	return testnets.MustCompile(doc)
}

func resolve(t testing.TB, net *model.Network, hard map[string]string, soft map[string][]float64) *model.Evidence {
	t.Helper()
	ev, err := net.ResolveEvidence(hard, soft)
	if err != nil {
		t.Fatal(err)
	}
	return ev
}

func indexOf(t testing.TB, net *model.Network, name string) int {
	t.Helper()
	i, ok := net.Index(name)
	if !ok {
		t.Fatalf("no variable %q", name)
	}
	return i
}

func mustRun(t testing.TB, net *model.Network, ev *model.Evidence, targets []int, opt Options) *Estimate {
	t.Helper()
	est, err := Run(context.Background(), net, ev, targets, opt)
	if err != nil {
		t.Fatal(err)
	}
	return est
}

// binomialLowerQuantile is the largest c with P(X < c) <= alpha for X ~
// Binomial(n, p): a count below c happens with probability at most alpha.
func binomialLowerQuantile(n int, p, alpha float64) int {
	b := distuv.Binomial{N: float64(n), P: p}
	c := 0
	for c < n && b.CDF(float64(c)) <= alpha {
		c++
	}
	return c // P(X <= c-1) <= alpha < P(X <= c)
}

// twoSidedZ is the normal quantile for a two-sided false-failure rate alpha.
func twoSidedZ(alpha float64) float64 {
	return distuv.UnitNormal.Quantile(1 - alpha/2)
}

// noNaN fails when any number in the estimate is NaN.
func noNaN(t testing.TB, est *Estimate) {
	t.Helper()
	bad := func(x float64) bool { return math.IsNaN(x) }
	if bad(est.EffectiveSamples) || bad(est.Log10Evidence) || bad(est.AcceptanceRate) || bad(est.MaxWeightShare) {
		t.Fatalf("NaN in estimate %+v", est)
	}
	if est.Evidence != nil && (bad(est.Evidence.P) || bad(est.Evidence.Lo) || bad(est.Evidence.Hi)) {
		t.Fatalf("NaN in evidence %+v", *est.Evidence)
	}
	for _, m := range est.Marginals {
		for _, iv := range m {
			if bad(iv.P) || bad(iv.Lo) || bad(iv.Hi) {
				t.Fatalf("NaN in marginal %+v", m)
			}
		}
	}
}

// sameEstimate fails unless two estimates agree bit for bit (Elapsed aside).
func sameEstimate(t testing.TB, what string, a, b *Estimate) {
	t.Helper()
	eq := func(x, y float64) bool { return math.Float64bits(x) == math.Float64bits(y) }
	if a.Method != b.Method || a.Seed != b.Seed || a.Samples != b.Samples || a.StopReason != b.StopReason ||
		!eq(a.EffectiveSamples, b.EffectiveSamples) || !eq(a.Log10Evidence, b.Log10Evidence) ||
		!eq(a.AcceptanceRate, b.AcceptanceRate) || !eq(a.MaxWeightShare, b.MaxWeightShare) ||
		(a.Evidence == nil) != (b.Evidence == nil) || len(a.Marginals) != len(b.Marginals) || len(a.Warnings) != len(b.Warnings) {
		t.Fatalf("%s: estimates differ:\n%+v\n%+v", what, a, b)
	}
	if a.Evidence != nil && (!eq(a.Evidence.P, b.Evidence.P) || !eq(a.Evidence.Lo, b.Evidence.Lo) || !eq(a.Evidence.Hi, b.Evidence.Hi)) {
		t.Fatalf("%s: evidence differs: %+v vs %+v", what, *a.Evidence, *b.Evidence)
	}
	for i := range a.Marginals {
		for j := range a.Marginals[i] {
			x, y := a.Marginals[i][j], b.Marginals[i][j]
			if !eq(x.P, y.P) || !eq(x.Lo, y.Lo) || !eq(x.Hi, y.Hi) {
				t.Fatalf("%s: marginal %d state %d differs: %+v vs %+v", what, i, j, x, y)
			}
		}
	}
	for i := range a.Warnings {
		if a.Warnings[i] != b.Warnings[i] {
			t.Fatalf("%s: warnings differ: %q vs %q", what, a.Warnings, b.Warnings)
		}
	}
}
