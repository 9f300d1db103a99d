package adaptive

import (
	"math"
	"slices"
)

// ParetoKWarn is the tail-shape estimate above which the weights are
// called heavy-tailed: with k̂ > 0.7 importance sampling estimates become
// unreliable and their intervals are not to be trusted (Vehtari, Simpson,
// Gelman, Yao & Gabry, "Pareto smoothed importance sampling", 2015/2024).
const ParetoKWarn = 0.7

// tailSize is the number of largest weights the tail fit uses for a run of
// n samples: min(n/5, 3√n) as in Pareto smoothed importance sampling,
// capped by the buffer.
func tailSize(n int64, kept int) int {
	m := int(math.Min(0.2*float64(n), 3*math.Sqrt(float64(n))))
	return min(m, kept-1)
}

// paretoK estimates the shape k of a generalized Pareto distribution fitted
// to the largest weights: top holds the largest weights in decreasing
// order, n is the number of samples they come from. It returns NaN when
// there are too few weights for a fit (fewer than 10 in the tail) or the
// tail is flat (all tail weights equal, as when the importance function is
// exact).
func paretoK(top []float64, n int64) float64 {
	m := tailSize(n, len(top))
	if m < 10 {
		return math.NaN()
	}
	threshold := top[m]
	x := make([]float64, m)
	for i := 0; i < m; i++ {
		x[m-1-i] = top[i] - threshold // increasing
	}
	if !(x[m-1] > 0) || x[m-1] <= 1e-12*threshold {
		return math.NaN()
	}
	// Drop leading zeros (ties at the threshold) from the fit.
	i0 := 0
	for i0 < m && x[i0] <= 0 {
		i0++
	}
	x = x[i0:]
	if len(x) < 10 {
		return math.NaN()
	}
	k, _ := gpdFit(x)
	return k
}

// gpdFit fits a generalized Pareto distribution to the increasing positive
// exceedances x by the empirical-Bayes estimator of Zhang & Stephens (2009,
// Technometrics 51:316-325), with the weakly informative prior on k that
// Pareto smoothed importance sampling adds (constants from memory). It
// returns the shape k (k > 0: heavy tail; 1/k moments exist) and the scale.
func gpdFit(x []float64) (k, sigma float64) {
	n := len(x)
	const prior = 3
	m := 30 + int(math.Sqrt(float64(n)))
	q1 := x[max(0, int(float64(n)/4+0.5)-1)]
	if q1 <= 0 {
		q1 = x[n/2]
	}
	bs := make([]float64, m)
	ls := make([]float64, m)
	for j := 0; j < m; j++ {
		bs[j] = 1 - math.Sqrt(float64(m)/(float64(j+1)-0.5))
		bs[j] = bs[j]/(prior*q1) + 1/x[n-1]
		kk := 0.0
		for _, xi := range x {
			kk += math.Log1p(-bs[j] * xi)
		}
		kk /= float64(n)
		ls[j] = float64(n) * (math.Log(-bs[j]/kk) - kk - 1)
	}
	// Posterior weights w_j = 1 / Σ_i exp(L_i - L_j).
	ws := make([]float64, m)
	for j := range ws {
		s := 0.0
		for i := range ls {
			s += math.Exp(ls[i] - ls[j])
		}
		ws[j] = 1 / s
	}
	b, wsum := 0.0, 0.0
	for j := range ws {
		if ws[j] >= 10*0x1p-52 && !math.IsNaN(ws[j]) && !math.IsNaN(bs[j]) {
			b += bs[j] * ws[j]
			wsum += ws[j]
		}
	}
	if !(wsum > 0) {
		return math.NaN(), math.NaN()
	}
	b /= wsum
	for _, xi := range x {
		k += math.Log1p(-b * xi)
	}
	k /= float64(n)
	sigma = -k / b
	// Weakly informative prior shrinking k towards 0.5 (a = 10).
	const a = 10
	k = k*float64(n)/(float64(n)+a) + a*0.5/(float64(n)+a)
	return k, sigma
}

// sortedDesc returns a copy of v in decreasing order.
func sortedDesc(v []float64) []float64 {
	out := slices.Clone(v)
	slices.SortFunc(out, func(a, b float64) int {
		switch {
		case a > b:
			return -1
		case a < b:
			return 1
		}
		return 0
	})
	return out
}
