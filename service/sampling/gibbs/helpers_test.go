package gibbs

import (
	"math/rand/v2"
	"testing"

	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/model"
	"gonum.org/v1/gonum/stat/distuv"
)

// enumerate computes exact posterior marginals of the targets by summing
// the joint P(x) · Π soft(x) over every configuration that agrees with the
// hard evidence (brute-force enumeration, the definition of the posterior).
// It also returns P(evidence) including the soft likelihoods.
func enumerate(t *testing.T, net *model.Network, ev *model.Evidence, targets []int) ([][]float64, float64) {
	t.Helper()
	n := len(net.Vars)
	size := 1
	for v := range net.Vars {
		size *= net.Vars[v].Card()
		if size > 1<<22 {
			t.Fatalf("enumerate: model too large for brute force")
		}
	}
	out := make([][]float64, len(targets))
	for i, tv := range targets {
		out[i] = make([]float64, net.Vars[tv].Card())
	}
	x := make([]int, n)
	total := 0.0
	for {
		ok := true
		for v := 0; v < n; v++ {
			if ev != nil && ev.Hard[v] >= 0 && x[v] != ev.Hard[v] {
				ok = false
				break
			}
		}
		if ok {
			w := 1.0
			for v := 0; v < n && w > 0; v++ {
				nd := &net.Vars[v]
				r := 0
				for j, q := range nd.Parents {
					r += x[q] * nd.Strides[j]
				}
				w *= nd.CPT[r*nd.Card()+x[v]]
				if ev != nil && ev.Soft[v] != nil {
					w *= ev.Soft[v][x[v]]
				}
			}
			total += w
			for i, tv := range targets {
				out[i][x[tv]] += w
			}
		}
		// next configuration (mixed radix, variable 0 fastest)
		v := 0
		for v < n {
			x[v]++
			if x[v] < net.Vars[v].Card() {
				break
			}
			x[v] = 0
			v++
		}
		if v == n {
			break
		}
	}
	for i := range out {
		for s := range out[i] {
			out[i][s] /= total
		}
	}
	return out, total
}

// nearGateChestClinic is the chest-clinic network with the deterministic
// "either = tub OR lung" gate replaced by a nearly deterministic table:
// P(either = yes | tub, lung) = 0.001 when both are "no", else 0.999.
func nearGateChestClinic() *model.Network {
	doc := testnets.ChestClinic()
	for i := range doc.Variables {
		if doc.Variables[i].Name == "either" {
			doc.Variables[i].Gate = nil
			// rows: (tub, lung) = (no,no), (no,yes), (yes,no), (yes,yes)
			doc.Variables[i].Table = [][]float64{{0.999, 0.001}, {0.001, 0.999}, {0.001, 0.999}, {0.001, 0.999}}
		}
	}
	return testnets.MustCompile(doc)
}

func randomNet(seed uint64, vars, maxParents, maxStates int) *model.Network {
	rng := rand.New(rand.NewPCG(seed, 0x5eed))
	return testnets.MustCompile(testnets.Random(rng, testnets.RandomOptions{Vars: vars, MaxParents: maxParents, MaxStates: maxStates}))
}

func mustIndex(t *testing.T, net *model.Network, name string) int {
	t.Helper()
	v, ok := net.Index(name)
	if !ok {
		t.Fatalf("no variable %q", name)
	}
	return v
}

// twoSidedZ is the standard normal quantile leaving alpha/2 in each tail
// (gonum's normal quantile, independent of the package's own).
func twoSidedZ(alpha float64) float64 {
	return distuv.UnitNormal.Quantile(1 - alpha/2)
}

// binomialBand returns [lo, hi] such that a Binomial(n, p) count falls
// below lo, or above hi, with probability at most alpha/2 each.
func binomialBand(n int, p, alpha float64) (int, int) {
	b := distuv.Binomial{N: float64(n), P: p}
	lo := 0
	for k := 0; k <= n; k++ {
		if b.CDF(float64(k)) > alpha/2 { // P(X <= k) > alpha/2: k is the smallest allowed
			lo = k
			break
		}
	}
	hi := n
	for k := n; k >= 0; k-- {
		if 1-b.CDF(float64(k-1)) > alpha/2 { // P(X >= k) > alpha/2
			hi = k
			break
		}
	}
	return lo, hi
}
