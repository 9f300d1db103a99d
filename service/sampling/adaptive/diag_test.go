package adaptive

import (
	"math"
	"math/rand/v2"
	"testing"

	"github.com/beliefd/beliefd/service/sampling"
)

// The tail-shape fit recovers the shape of generalized Pareto samples:
// for n exceedances the maximum-likelihood shape has asymptotic standard
// deviation (1 + k)/√n (Smith 1987, Ann. Statist. 15:1174-1207, from
// memory), and the estimator used here is asymptotically as efficient
// (Zhang & Stephens 2009); the weakly informative prior adds a bias of at
// most 10·|0.5 - k|/(n + 10). The check is at 99.9% (z = 3.29).
func TestParetoShape(t *testing.T) {
	const n = 3000
	rng := rand.New(rand.NewPCG(1, 2))
	for _, k := range []float64{0.2, 0.5, 0.9} {
		x := make([]float64, n)
		for i := range x {
			u := rng.Float64()
			x[i] = (math.Pow(1-u, -k) - 1) / k // GPD(k, σ = 1) by inversion
		}
		got, _ := gpdFit(sortedAsc(x))
		tol := z999*(1+k)/math.Sqrt(n) + 10*math.Abs(0.5-k)/(n+10)
		if math.Abs(got-k) > tol {
			t.Errorf("k = %v: estimate %v, beyond ±%v", k, got, tol)
		}
	}
}

// Weights from a Pareto distribution with tail index 1.25 (shape k = 0.8,
// infinite variance) raise the heavy-tail warning through the bounded
// buffer of largest weights; uniform weights (bounded, k < 0) do not.
func TestParetoFromTopBuffer(t *testing.T) {
	rng := rand.New(rand.NewPCG(3, 4))
	const n = 200_000
	var heavy, light topHeap
	for range n {
		u := rng.Float64()
		heavy.push(math.Pow(1-u, -0.8))
		light.push(rng.Float64())
	}
	kh := paretoK(heavy.sorted(nil), n)
	kl := paretoK(light.sorted(nil), n)
	// Tail of 2047 exceedances: sd (1+k)/√m ≈ 0.04; 99.9% bound ≈ 0.13.
	if tol := z999 * 1.8 / math.Sqrt(2047); math.Abs(kh-0.8) > tol+0.01 || kh <= ParetoKWarn {
		t.Errorf("Pareto weights: k̂ = %v, want 0.8 ± %v and above %v", kh, tol, ParetoKWarn)
	}
	if !(kl < 0) {
		t.Errorf("uniform weights: k̂ = %v, want negative (bounded tail)", kl)
	}
}

func sortedAsc(v []float64) []float64 {
	d := sortedDesc(v)
	for i, j := 0, len(d)-1; i < j; i, j = i+1, j-1 {
		d[i], d[j] = d[j], d[i]
	}
	return d
}

// Fieller's interval: with an exact denominator (variance 0) it is
// (a ± z√va)/b, and in general its ends solve (a - R b)² = z²(va + R² vb)
// (Fieller 1954, JRSS-B 16:175-185).
func TestFieller(t *testing.T) {
	z := sampling.TwoSidedZ(0.95)
	lo, hi, ok := fieller(3, 0.04, 2, 0, z)
	if !ok || math.Abs(lo-(3-z*0.2)/2) > 1e-15 || math.Abs(hi-(3+z*0.2)/2) > 1e-15 {
		t.Errorf("exact denominator: [%v, %v], want [%v, %v]", lo, hi, (3-z*0.2)/2, (3+z*0.2)/2)
	}
	a, va, b, vb := 1e-3, 1e-8, 0.5, 1e-3
	lo, hi, ok = fieller(a, va, b, vb, z)
	if !ok || !(lo < a/b && a/b < hi) {
		t.Fatalf("[%v, %v] around %v", lo, hi, a/b)
	}
	for _, r := range []float64{lo, hi} {
		lhs, rhs := (a-r*b)*(a-r*b), z*z*(va+r*r*vb)
		if math.Abs(lhs-rhs) > 1e-12*rhs {
			t.Errorf("end %v: (a - R b)² = %v, z²(va + R² vb) = %v", r, lhs, rhs)
		}
	}
	if _, _, ok := fieller(1, 0.1, 0.01, 1, z); ok {
		t.Errorf("a denominator indistinguishable from 0 must give no bounded interval")
	}
}

// Merging the buffers of largest weights keeps the largest of both in
// order, whatever the order of merging.
func TestMergeTop(t *testing.T) {
	rng := rand.New(rand.NewPCG(5, 6))
	var all topHeap
	parts := make([][]float64, 5)
	for p := range parts {
		var h topHeap
		for range 3000 {
			w := rng.ExpFloat64()
			h.push(w)
			all.push(w)
		}
		parts[p] = h.sorted(nil)
	}
	var fwd, bwd []float64
	for p := range parts {
		fwd = mergeTop(fwd, parts[p])
		bwd = mergeTop(bwd, parts[len(parts)-1-p])
	}
	want := all.sorted(nil)
	if len(fwd) != TopWeights || len(want) != TopWeights {
		t.Fatalf("kept %d and %d, want %d", len(fwd), len(want), TopWeights)
	}
	for i := range want {
		if fwd[i] != want[i] || bwd[i] != want[i] {
			t.Fatalf("entry %d: %v / %v, want %v", i, fwd[i], bwd[i], want[i])
		}
	}
}
