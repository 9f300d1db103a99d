package adaptive

import (
	"math"
	"testing"

	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
)

// binomTail is P(at least k of n independent events of probability p).
func binomTail(n, k int, p float64) float64 {
	s := 0.0
	for j := k; j <= n; j++ {
		s += math.Exp(lchoose(n, j) + float64(j)*math.Log(p) + float64(n-j)*math.Log1p(-p))
	}
	return s
}

func lchoose(n, k int) float64 {
	a, _ := math.Lgamma(float64(n + 1))
	b, _ := math.Lgamma(float64(k + 1))
	c, _ := math.Lgamma(float64(n - k + 1))
	return a - b - c
}

// Rare top events of fault-tree gates over independent basic events come
// out with a relative interval that covers the closed form.
func TestRareGatesClosedForm(t *testing.T) {
	ps := []float64{2e-4, 5e-4, 1e-3, 3e-4}
	prod, notAny := 1.0, 1.0
	for _, p := range ps {
		prod *= p
		notAny *= 1 - p
	}
	cs := []float64{0.9, 0.6, 0.75, 0.5}
	links := map[string]float64{"c0": cs[0], "c1": cs[1], "c2": cs[2], "c3": cs[3]}
	const leak = 1e-7
	// Noisy-OR over independent roots: each parent contributes a fault with
	// probability p_i·c_i, independently, so P = 1 - (1-L)·Π(1 - p_i c_i)
	// (Díez 1993; closed form).
	q := 1 - leak
	for i, p := range ps {
		q *= 1 - p*cs[i]
	}
	noisy := 1 - q
	cases := []struct {
		name string
		top  model.Variable
		ps   []float64
		want float64
	}{
		// NUREG-0492 (Fault Tree Handbook, 1981), ch. VI: AND gate
		// P = Π p_i; OR gate P = 1 - Π(1 - p_i), for independent inputs.
		{"all_of", model.Variable{Gate: &model.Gate{Type: model.GateAllOf}}, ps, prod},
		{"any_of", model.Variable{Gate: &model.Gate{Type: model.GateAnyOf}}, ps, 1 - notAny},
		// k-of-n with equal p: the binomial tail Σ_{j≥k} C(n,j) p^j (1-p)^(n-j).
		{"3_of_6", model.Variable{Gate: &model.Gate{Type: model.GateKOfN, K: 3}}, []float64{1e-3, 1e-3, 1e-3, 1e-3, 1e-3, 1e-3}, binomTail(6, 3, 1e-3)},
		{"noisy_or", model.Variable{NoisyOR: &model.NoisyOR{Leak: leak, Links: links}}, ps, noisy},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			net := compile(t, gateNet(c.ps, c.top))
			top := index(t, net, "top")
			res := run(t, net, nil, []int{top}, Options{Seed: 11, RareTargets: []int{top},
				Stop: sampling.Stop{MaxSamples: 60_000, Confidence: 0.999}, Workers: 2})
			iv := res.Estimate.Marginals[0][1]
			if !covers(iv, c.want) {
				t.Errorf("P(top) = %v [%v, %v], closed form %v", iv.P, iv.Lo, iv.Hi, c.want)
			}
			// Relative precision: not zero, and a relative half-width that a
			// rare event needs (10% at 99.9%).
			if !(iv.P > 0) || iv.HalfWidth() > 0.1*c.want {
				t.Errorf("P(top) = %v [%v, %v]: relative half-width %.3g, want <= 0.1 of %v", iv.P, iv.Lo, iv.Hi, iv.HalfWidth()/c.want, c.want)
			}
			if len(res.Tracks) != 2 || res.Tracks[1].Variable != top || res.Tracks[1].State != 1 {
				t.Errorf("tracks %+v: want the main one and top=failed", res.Tracks)
			}
		})
	}
}

// An AND gate observed failed: the evidence has probability Π p_i (1e-12
// here), which likelihood weighting never meets (its weights are the
// deterministic gate's 0 or 1), while the adaptive sampler gets it with a
// tight interval and sees the parents' posterior (all failed).
func TestDeterministicZeros(t *testing.T) {
	ps := []float64{1e-2, 1e-2, 1e-2, 1e-2, 1e-2, 1e-2}
	net := compile(t, gateNet(ps, model.Variable{Gate: &model.Gate{Type: model.GateAllOf}}))
	ev := evidence(t, net, map[string]string{"top": "failed"})
	want := math.Pow(1e-2, 6) // NUREG-0492 AND gate: Π p_i
	lw, err := sampling.Run(t.Context(), net, ev, nil, sampling.Options{Method: sampling.MethodLikelihoodWeighting, Seed: 3, Stop: sampling.Stop{MaxSamples: 100_000}})
	if err != nil {
		t.Fatal(err)
	}
	if lw.Evidence.P != 0 {
		// Hitting 1e-12 in 1e5 draws has probability about 1e-7.
		t.Fatalf("likelihood weighting found P(evidence) = %v; expected its weights to collapse to 0", lw.Evidence.P)
	}
	res := run(t, net, ev, nil, Options{Seed: 3, Stop: sampling.Stop{MaxSamples: 20_000, Confidence: 0.999}})
	e := res.Estimate
	if e.Evidence == nil || !covers(*e.Evidence, want) || e.Evidence.HalfWidth() > 0.01*want {
		t.Fatalf("P(evidence) = %+v, closed form %v", e.Evidence, want)
	}
	for i, m := range e.Marginals {
		// Given the AND gate failed, every input failed (probability 1).
		if m[1].P != 1 {
			t.Errorf("posterior of c%d failed = %+v, want 1", i, m[1])
		}
	}
	if n := res.Tracks[0].Samples; e.EffectiveSamples < 0.99*float64(n) {
		t.Errorf("effective samples %v of %d: propagation is exact on a tree, so the weights should be constant", e.EffectiveSamples, n)
	}
}
