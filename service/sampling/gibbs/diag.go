package gibbs

import (
	"errors"
	"fmt"
	"math"
	"sort"

	"github.com/beliefd/beliefd/service/sampling"
)

// ErrTooFewDraws is returned by SplitRHat and BulkESS when the chains are too
// short (or of unequal length) for the diagnostics to be defined.
var ErrTooFewDraws = errors.New("too few draws for convergence diagnostics")

// ErrConstantDraws is returned by SplitRHat and BulkESS when every draw of
// every chain has the same value, so that no variance can be estimated.
var ErrConstantDraws = errors.New("all draws are equal")

// minHalf is the fewest draws per split half-chain for which the diagnostics
// are computed.
const minHalf = 6

// Thresholds recommended by Vehtari et al. (2021): R-hat below 1.01 and a
// bulk ESS of at least 400 before trusting the estimates.
const (
	RHatLimit = 1.01
	ESSLimit  = 400
)

// MaxRHat caps R-hat values reported in an Estimate, so that chains that are
// each constant but disagree (an infinite R-hat) still give a finite number.
const MaxRHat = 1e6

// SplitRHat is the rank-normalised split R-hat of Vehtari, Gelman, Simpson,
// Carpenter & Bürkner (2021), "Rank-normalization, folding, and
// localization: an improved R-hat for assessing convergence of MCMC",
// Bayesian Analysis 16(2):667-718, section 4.3 and eq. (14): each chain is
// split in halves, all draws are replaced by the normal scores of their
// average ranks, and R-hat is computed from the between- and within-chain
// variances of the halves. draws[c] is chain c; all chains must have the same
// length, at least 12. It is +Inf when every half-chain is constant but they
// do not all agree.
func SplitRHat(draws [][]float64) (float64, error) {
	z, m, n, err := splitRankNormal(draws)
	if err != nil {
		return 0, err
	}
	centreChains(z, m, n)
	return rhatCentred(z.means, z.vars, n), nil
}

// BulkESS is the bulk effective sample size of Vehtari et al. (2021),
// section 4.3: the effective sample size of the rank-normalised split
// chains, with autocorrelations combined over chains as in their eq. (10)
// and truncated by Geyer's (1992) initial monotone sequence. The result is
// capped at N·log10(N) for N draws in total, as in that paper's reference
// implementation (from memory).
func BulkESS(draws [][]float64) (float64, error) {
	z, m, n, err := splitRankNormal(draws)
	if err != nil {
		return 0, err
	}
	centreChains(z, m, n)
	ess, _ := essCentred(z, m, n, make([]float64, n+1))
	return ess, nil
}

// chainSet holds m chains of n values each, flat (chain i is
// vals[i*n:(i+1)*n]), with per-chain means and unbiased variances filled in
// by centreChains, which also subtracts the means from the values.
type chainSet struct {
	vals  []float64
	means []float64
	vars  []float64
}

// splitRankNormal splits every chain in halves (dropping the middle draw of
// an odd-length chain) and replaces each draw by the normal score of its
// average rank among all split draws.
func splitRankNormal(draws [][]float64) (*chainSet, int, int, error) {
	if len(draws) == 0 {
		return nil, 0, 0, fmt.Errorf("gibbs: %w: no chains", ErrTooFewDraws)
	}
	l := len(draws[0])
	for c, d := range draws {
		if len(d) != l {
			return nil, 0, 0, fmt.Errorf("gibbs: %w: chain %d has %d draws, chain 0 has %d; chains must have equal length", ErrTooFewDraws, c, len(d), l)
		}
		for i, v := range d {
			if math.IsNaN(v) || math.IsInf(v, 0) {
				return nil, 0, 0, fmt.Errorf("gibbs: draw %d of chain %d is %g; draws must be finite", i, c, v)
			}
		}
	}
	n := l / 2
	if n < minHalf {
		return nil, 0, 0, fmt.Errorf("gibbs: %w: %d draws per chain, need at least %d", ErrTooFewDraws, l, 2*minHalf)
	}
	m := 2 * len(draws)
	total := m * n
	vals := make([]float64, total)
	for c, d := range draws {
		copy(vals[(2*c)*n:], d[:n])
		copy(vals[(2*c+1)*n:], d[l-n:])
	}
	idx := make([]int, total)
	for i := range idx {
		idx[i] = i
	}
	sort.Slice(idx, func(a, b int) bool { return vals[idx[a]] < vals[idx[b]] })
	if vals[idx[0]] == vals[idx[total-1]] {
		return nil, 0, 0, fmt.Errorf("gibbs: %w", ErrConstantDraws)
	}
	z := make([]float64, total)
	for i := 0; i < total; {
		j := i + 1
		for j < total && vals[idx[j]] == vals[idx[i]] {
			j++
		}
		// Positions i..j-1 (0-based) share the value: ranks i+1..j, average (i+1+j)/2.
		score := normalScore(float64(i+1+j)/2, total)
		for k := i; k < j; k++ {
			z[idx[k]] = score
		}
		i = j
	}
	return &chainSet{vals: z, means: make([]float64, m), vars: make([]float64, m)}, m, n, nil
}

// normalScore maps an average rank r among s draws to Φ⁻¹((r − 3/8)/(s − 1/4)),
// the fractional offset of Vehtari et al. (2021), eq. (14).
func normalScore(r float64, s int) float64 {
	return sampling.NormalQuantile((r - 3.0/8) / (float64(s) - 1.0/4))
}

// centreChains fills in chain means and unbiased variances and subtracts the
// means from the values.
func centreChains(z *chainSet, m, n int) {
	for c := 0; c < m; c++ {
		x := z.vals[c*n : (c+1)*n]
		mean, lo, hi := 0.0, x[0], x[0]
		for _, v := range x {
			mean += v
			lo, hi = math.Min(lo, v), math.Max(hi, v)
		}
		mean /= float64(n)
		if lo == hi {
			mean = lo // exactly zero variance for a constant chain
		}
		ss := 0.0
		for i := range x {
			x[i] -= mean
			ss += x[i] * x[i]
		}
		z.means[c] = mean
		z.vars[c] = ss / float64(n-1)
	}
}

// rhatCentred is R-hat from chain means and unbiased within-chain variances
// of chains with n draws each (Vehtari et al. 2021, eqs. 3-4):
// W = mean within-chain variance, B = n · variance of the chain means,
// var⁺ = (n−1)/n·W + B/n, R-hat = sqrt(var⁺/W).
func rhatCentred(means, vars []float64, n int) float64 {
	m := len(means)
	w := 0.0
	grand := 0.0
	for c := 0; c < m; c++ {
		w += vars[c]
		grand += means[c]
	}
	w /= float64(m)
	grand /= float64(m)
	b := 0.0
	for c := 0; c < m; c++ {
		d := means[c] - grand
		b += d * d
	}
	b = float64(n) * b / float64(m-1)
	varPlus := float64(n-1)/float64(n)*w + b/float64(n)
	if w <= 0 {
		if varPlus <= 0 {
			return 1
		}
		return math.Inf(1)
	}
	return math.Sqrt(varPlus / w)
}

// essCentred is the effective sample size of m centred chains of n draws;
// see essFrom. rho is scratch of length at least n+1.
func essCentred(z *chainSet, m, n int, rho []float64) (float64, int) {
	acovMean := func(t int) float64 {
		s := 0.0
		for c := 0; c < m; c++ {
			x := z.vals[c*n : (c+1)*n]
			a := 0.0
			for i := 0; i+t < n; i++ {
				a += x[i] * x[i+t]
			}
			s += a / float64(n)
		}
		return s / float64(m)
	}
	return essFrom(m, n, z.means, z.vars, acovMean, rho)
}

// essFrom is the effective sample size of m chains of n draws (Vehtari et
// al. 2021, section 3.2) from their means, unbiased variances and
// acovMean(t), the mean over chains of the autocovariance at lag t (divided
// by n). With W the mean within-chain variance and var⁺ as for R-hat, the
// combined autocorrelation at lag t is ρ̂_t = 1 − (W − acovMean(t)) / var⁺.
// Pairs P̂_k = ρ̂_{2k} + ρ̂_{2k+1} are summed while positive (Geyer's initial
// positive sequence), made non-increasing (initial monotone sequence), and
// τ̂ = −1 + 2·Σ P̂_k + max(0, ρ̂ of the first lag not summed); the last term
// reduces the variance for antithetic chains, as in the paper's reference
// implementation (from memory). ESS = m·n/τ̂, capped at m·n·log10(m·n).
// Autocovariances are computed only up to the truncation lag. rho is
// scratch of length at least n+1. The second result is the truncation lag
// (the number of autocorrelations summed).
func essFrom(m, n int, means, vars []float64, acovMean func(t int) float64, rho []float64) (float64, int) {
	total := float64(m * n)
	w := 0.0
	for c := 0; c < m; c++ {
		w += vars[c]
	}
	w /= float64(m)
	varPlus := w * float64(n-1) / float64(n)
	if m > 1 {
		grand := 0.0
		for _, mu := range means {
			grand += mu
		}
		grand /= float64(m)
		b := 0.0
		for _, mu := range means {
			d := mu - grand
			b += d * d
		}
		varPlus += b / float64(m-1)
	}
	if varPlus <= 0 {
		return total, 0
	}
	rhoAt := func(t int) float64 { return 1 - (w-acovMean(t))/varPlus }
	for i := range rho[:n+1] {
		rho[i] = 0
	}
	rho[0] = 1
	even, odd := 1.0, rhoAt(1)
	rho[1] = odd
	t := 0
	for t < n-5 && even+odd > 0 {
		t += 2
		even, odd = rhoAt(t), rhoAt(t+1)
		if even+odd >= 0 {
			rho[t], rho[t+1] = even, odd
		}
	}
	maxT := t
	if even > 0 {
		rho[maxT] = even
	}
	for k := 2; k <= maxT-2; k += 2 {
		if rho[k]+rho[k+1] > rho[k-2]+rho[k-1] {
			rho[k] = (rho[k-2] + rho[k-1]) / 2
			rho[k+1] = rho[k]
		}
	}
	tau := -1.0
	for k := 0; k < maxT; k++ {
		tau += 2 * rho[k]
	}
	tau += rho[maxT]
	if floor := 1 / math.Log10(total); tau < floor || math.IsNaN(tau) {
		tau = floor
	}
	return total / tau, maxT
}
