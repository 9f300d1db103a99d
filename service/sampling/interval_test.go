package sampling

import (
	"math"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"
)

func TestWilsonPublishedValues(t *testing.T) {
	cases := []struct {
		k, n   float64
		lo, hi float64
		tol    float64
		source string
	}{
		// Wilson (1927), JASA 22:209-212, closed form evaluated at 95%
		// (value given with the product's specification, 6 decimals).
		{5, 100, 0.021544, 0.111750, 5e-7, "Wilson 1927 closed form"},
		// Newcombe (1998), Stat Med 17:857-872, Table II, method 3 (score
		// interval without continuity correction), 4 decimals; from memory.
		{81, 263, 0.2553, 0.3662, 5e-5, "Newcombe 1998"},
		{15, 148, 0.0624, 0.1605, 5e-5, "Newcombe 1998"},
		{0, 20, 0, 0.1611, 5e-5, "Newcombe 1998"},
		{1, 29, 0.0061, 0.1718, 5e-5, "Newcombe 1998"},
		{29, 29, 0.8830, 1, 5e-5, "Newcombe 1998"},
	}
	for _, c := range cases {
		iv := Wilson(c.k, c.n, 0.95)
		if math.Abs(iv.Lo-c.lo) > c.tol || math.Abs(iv.Hi-c.hi) > c.tol {
			t.Errorf("Wilson(%v, %v) = [%.6f, %.6f], %s gives [%v, %v]", c.k, c.n, iv.Lo, iv.Hi, c.source, c.lo, c.hi)
		}
		if iv.P != c.k/c.n {
			t.Errorf("Wilson(%v, %v).P = %v", c.k, c.n, iv.P)
		}
	}
}

// The Wilson interval is the set of p with |p̂ - p| <= z sqrt(p(1-p)/n)
// (Wilson 1927): solve that by bisection and compare with the closed form.
func TestWilsonMatchesDirectSolve(t *testing.T) {
	for _, conf := range []float64{0.8, 0.95, 0.999} {
		z := TwoSidedZ(conf)
		for _, n := range []float64{1, 7, 50, 1000} {
			for k := 0.0; k <= n; k += math.Max(1, math.Floor(n/13)) {
				ph := k / n
				f := func(p float64) float64 { return (ph-p)*(ph-p) - z*z*p*(1-p)/n }
				// f > 0 outside the interval and <= 0 inside; f(ph) <= 0.
				solve := func(outside, inside float64) float64 {
					for range 200 {
						mid := (outside + inside) / 2
						if f(mid) > 0 {
							outside = mid
						} else {
							inside = mid
						}
					}
					return (outside + inside) / 2
				}
				lo, hi := 0.0, 1.0
				if f(0) > 0 {
					lo = solve(0, ph)
				}
				if f(1) > 0 {
					hi = solve(1, ph)
				}
				iv := Wilson(k, n, conf)
				if math.Abs(iv.Lo-lo) > 1e-9 || math.Abs(iv.Hi-hi) > 1e-9 {
					t.Errorf("conf %v, %v/%v: closed form [%v, %v], direct solve [%v, %v]", conf, k, n, iv.Lo, iv.Hi, lo, hi)
				}
			}
		}
	}
}

// clopperPearson is the exact interval of Clopper & Pearson (1934),
// Biometrika 26:404-413, from Beta quantiles.
func clopperPearson(k, n int, conf float64) (lo, hi float64) {
	a := (1 - conf) / 2
	lo, hi = 0, 1
	if k > 0 {
		lo = distuv.Beta{Alpha: float64(k), Beta: float64(n - k + 1)}.Quantile(a)
	}
	if k < n {
		hi = distuv.Beta{Alpha: float64(k + 1), Beta: float64(n - k)}.Quantile(1 - a)
	}
	return lo, hi
}

// The Clopper-Pearson interval guarantees coverage >= the nominal level at
// every p (Clopper & Pearson 1934) and is wider; the Wilson interval is
// shorter, covers less on average, and its coverage dips below the nominal level at some p
// (Brown, Cai & DasGupta 2001, Stat Sci 16:101-133, Fig. 5). Coverage is
// computed exactly by summing binomial probabilities over a grid of p.
func TestWilsonAgainstClopperPearson(t *testing.T) {
	const conf = 0.95
	for _, n := range []int{10, 30, 100} {
		wlo, whi := make([]float64, n+1), make([]float64, n+1)
		clo, chi := make([]float64, n+1), make([]float64, n+1)
		for k := 0; k <= n; k++ {
			iv := Wilson(float64(k), float64(n), conf)
			wlo[k], whi[k] = iv.Lo, iv.Hi
			clo[k], chi[k] = clopperPearson(k, n, conf)
			// At k = 0 and k = n Clopper-Pearson spends only half the
			// error on the one open side and can be the shorter one.
			if k > 0 && k < n && chi[k]-clo[k] <= whi[k]-wlo[k] {
				t.Errorf("n=%d k=%d: Clopper-Pearson [%v, %v] not wider than Wilson [%v, %v]", n, k, clo[k], chi[k], wlo[k], whi[k])
			}
		}
		wMin, cMin, wMean, cMean := 1.0, 1.0, 0.0, 0.0
		const grid = 999
		for i := 1; i <= grid; i++ {
			p := float64(i) / (grid + 1)
			b := distuv.Binomial{N: float64(n), P: p}
			var wc, cc float64
			for k := 0; k <= n; k++ {
				pk := b.Prob(float64(k))
				if wlo[k] <= p && p <= whi[k] {
					wc += pk
				}
				if clo[k] <= p && p <= chi[k] {
					cc += pk
				}
			}
			wMin, cMin = math.Min(wMin, wc), math.Min(cMin, cc)
			wMean, cMean = wMean+wc/grid, cMean+cc/grid
		}
		if cMin < conf-1e-9 {
			t.Errorf("n=%d: Clopper-Pearson coverage falls to %v below %v", n, cMin, conf)
		}
		if cMean <= wMean {
			t.Errorf("n=%d: mean coverage of Clopper-Pearson %v not above Wilson's %v", n, cMean, wMean)
		}
		if wMin >= conf {
			t.Errorf("n=%d: Wilson coverage never falls below %v; it is not meant to be conservative", n, conf)
		}
	}
}

func TestNormalInterval(t *testing.T) {
	// z for 95% is 1.959964 (standard normal table, common practice).
	iv := NormalInterval(0.5, 0.1, 0.95, 0, 1)
	if math.Abs(iv.Lo-(0.5-0.1959964)) > 1e-6 || math.Abs(iv.Hi-(0.5+0.1959964)) > 1e-6 {
		t.Errorf("NormalInterval = %+v", iv)
	}
	if iv := NormalInterval(0.05, 0.1, 0.95, 0, 1); iv.Lo != 0 {
		t.Errorf("not clipped at 0: %+v", iv)
	}
}
