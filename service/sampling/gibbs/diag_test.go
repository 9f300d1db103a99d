package gibbs

import (
	"errors"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"
)

// Family-wise false-failure rate of each statistical check in this file.
const diagAlpha = 0.001

func iidNormalChains(seed uint64, chains, n int) [][]float64 {
	rng := rand.New(rand.NewPCG(seed, 1))
	d := make([][]float64, chains)
	for c := range d {
		d[c] = make([]float64, n)
		for i := range d[c] {
			d[c][i] = rng.NormFloat64()
		}
	}
	return d
}

// ar1Chains draws stationary Gaussian AR(1) chains x_t = ρ x_{t−1} + ε_t,
// ε_t ~ N(0, 1), started from the stationary law N(0, 1/(1−ρ²)).
func ar1Chains(seed uint64, chains, n int, rho float64) [][]float64 {
	rng := rand.New(rand.NewPCG(seed, 2))
	d := make([][]float64, chains)
	for c := range d {
		d[c] = make([]float64, n)
		x := rng.NormFloat64() / math.Sqrt(1-rho*rho)
		for i := range d[c] {
			d[c][i] = x
			x = rho*x + rng.NormFloat64()
		}
	}
	return d
}

// twoStateChains draws stationary two-state Markov chains (values 0 and 1)
// switching 0→1 with probability a and 1→0 with probability b.
func twoStateChains(seed uint64, chains, n int, a, b float64) [][]float64 {
	rng := rand.New(rand.NewPCG(seed, 3))
	d := make([][]float64, chains)
	for c := range d {
		d[c] = make([]float64, n)
		x := 0.0
		if rng.Float64() < a/(a+b) { // stationary P(1) = a/(a+b)
			x = 1
		}
		for i := range d[c] {
			d[c][i] = x
			u := rng.Float64()
			if x == 0 && u < a {
				x = 1
			} else if x == 1 && u < b {
				x = 0
			}
		}
	}
	return d
}

// essWithLag returns the bulk ESS and the truncation lag (the number of
// autocorrelations summed), which sets the variance of the estimate.
func essWithLag(t *testing.T, draws [][]float64) (float64, int) {
	t.Helper()
	z, m, n, err := splitRankNormal(draws)
	if err != nil {
		t.Fatal(err)
	}
	centreChains(z, m, n)
	return essCentred(z, m, n, make([]float64, n+1))
}

// essBand is the relative tolerance for an ESS estimate from N draws with a
// truncation window of w lags: the integrated autocorrelation time
// estimated over a window of w lags has variance ≈ 2(2w+1)/N · τ² (Madras &
// Sokal 1988, J. Stat. Phys. 50:109-186, eq. 2.22; Sokal 1997, "Monte Carlo
// methods in statistical mechanics", eq. 3.19 — from memory), so ESS = N/τ
// has relative standard deviation ≈ sqrt(2(2w+1)/N).
func essBand(total float64, w int) float64 {
	return twoSidedZ(diagAlpha) * math.Sqrt(2*float64(2*w+1)/total)
}

func TestRankNormalisationAverageRanksForTies(t *testing.T) {
	// One chain of 12 draws, split into halves of 6. Values with ties:
	// sorted, 0 appears 5 times (ranks 1-5, average 3), 1 appears 4 times
	// (ranks 6-9, average 7.5), 2 once (rank 10), 3 twice (ranks 11-12,
	// average 11.5). Scores: Φ⁻¹((r − 3/8)/(S − 1/4)) with S = 12
	// (Vehtari et al. 2021, eq. 14); Φ⁻¹ from gonum.
	draws := [][]float64{{0, 1, 3, 0, 2, 1, 0, 0, 1, 3, 1, 0}}
	avgRank := map[float64]float64{0: 3, 1: 7.5, 2: 10, 3: 11.5}
	z, m, n, err := splitRankNormal(draws)
	if err != nil {
		t.Fatal(err)
	}
	if m != 2 || n != 6 {
		t.Fatalf("split gave %d chains of %d, want 2 of 6", m, n)
	}
	for i, v := range draws[0] {
		want := distuv.UnitNormal.Quantile((avgRank[v] - 3.0/8) / (12 - 1.0/4))
		if math.Abs(z.vals[i]-want) > 1e-12 {
			t.Errorf("draw %d (value %g): score %v, want %v", i, v, z.vals[i], want)
		}
	}

	// An odd-length chain drops its middle draw.
	_, m, n, err = splitRankNormal([][]float64{{5, 4, 3, 2, 1, 0, 9, 8, 7, 6, 5, 4, 3}})
	if err != nil || m != 2 || n != 6 {
		t.Fatalf("odd chain: m=%d n=%d err=%v, want 2 halves of 6", m, n, err)
	}
}

func TestSplitRHatIIDNormal(t *testing.T) {
	// For iid normal draws split into M = 8 half-chains of n = 500, the ratio
	// of the between to the within mean square is F(M−1, M(n−1))
	// distributed (one-way analysis of variance, common practice), and
	// R-hat² = (n−1)/n + F/n. Rank normalisation of normal draws keeps them
	// (almost exactly) normal. Bounds: F quantiles at diagAlpha/2 each side.
	const chains, perChain = 4, 1000
	m, n := 2*chains, perChain/2
	f := distuv.F{D1: float64(m - 1), D2: float64(m * (n - 1))}
	lo := math.Sqrt(float64(n-1)/float64(n) + f.Quantile(diagAlpha/2)/float64(n))
	hi := math.Sqrt(float64(n-1)/float64(n) + f.Quantile(1-diagAlpha/2)/float64(n))
	rhat, err := SplitRHat(iidNormalChains(11, chains, perChain))
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("iid R-hat %.5f in [%.5f, %.5f]", rhat, lo, hi)
	if rhat < lo || rhat > hi {
		t.Errorf("R-hat of iid draws = %.5f, want within [%.5f, %.5f]", rhat, lo, hi)
	}
	if hi > RHatLimit {
		t.Errorf("test design: upper bound %.5f should sit below the 1.01 threshold", hi)
	}
}

func TestSplitRHatShiftedChain(t *testing.T) {
	// Three chains iid N(0,1), the fourth N(1,1). Two of the eight half
	// chains are shifted by δ ≈ 1 (a bit less on the normal-score scale);
	// their means then give a between mean square of about n·1.5δ²/7 ≈ 107δ²
	// for n = 500, so R-hat² ≈ 1 + 0.21δ², far above 1.01² = 1.0201 for any
	// δ ≥ 0.35, while the no-shift fluctuation of F/n is below 0.008 at the
	// 0.9995 quantile (previous test).
	d := iidNormalChains(12, 4, 1000)
	for i := range d[3] {
		d[3][i]++
	}
	rhat, err := SplitRHat(d)
	if err != nil {
		t.Fatal(err)
	}
	if rhat <= RHatLimit {
		t.Errorf("R-hat with a shifted chain = %.5f, want > %.2f", rhat, RHatLimit)
	}
	// A chain whose halves disagree (a trend) is caught by the split even
	// when there is only one chain.
	one := iidNormalChains(13, 1, 2000)
	for i := range one[0] {
		if i >= 1000 {
			one[0][i] += 1
		}
	}
	rhat, err = SplitRHat(one)
	if err != nil {
		t.Fatal(err)
	}
	if rhat <= RHatLimit {
		t.Errorf("split R-hat of a chain with a level shift = %.5f, want > %.2f", rhat, RHatLimit)
	}
}

func TestBulkESSIIDNormal(t *testing.T) {
	// Independent draws: ESS = N (closed form, common practice).
	const chains, perChain = 4, 2500
	total := float64(chains * perChain)
	ess, lag := essWithLag(t, iidNormalChains(21, chains, perChain))
	t.Logf("iid: ESS %.0f of %.0f, band ±%.4f, lag %d", ess, total, essBand(total, lag), lag)
	if tol := essBand(total, lag); math.Abs(ess/total-1) > tol {
		t.Errorf("ESS of %v iid draws = %.0f, want within ±%.1f%%", total, ess, 100*tol)
	}
	got, err := BulkESS(iidNormalChains(21, chains, perChain))
	if err != nil || got != ess {
		t.Errorf("BulkESS = %v, %v; want %v", got, err, ess)
	}
}

func TestBulkESSAR1(t *testing.T) {
	// Stationary AR(1) with coefficient ρ: autocorrelation ρ^t, so
	// τ = (1+ρ)/(1−ρ) and ESS = N(1−ρ)/(1+ρ) (closed form, common practice).
	// Normal scores of a Gaussian series are close to the series itself, so
	// the rank-normalised ESS has the same target.
	for _, tc := range []struct {
		rho      float64
		perChain int
		seed     uint64
	}{{0.5, 10000, 31}, {0.9, 50000, 32}} {
		const chains = 4
		total := float64(chains * tc.perChain)
		want := total * (1 - tc.rho) / (1 + tc.rho)
		ess, lag := essWithLag(t, ar1Chains(tc.seed, chains, tc.perChain, tc.rho))
		t.Logf("ρ=%.1f: ESS %.0f, closed form %.0f, ratio %.4f, band ±%.4f, lag %d", tc.rho, ess, want, ess/want, essBand(total, lag), lag)
		if tol := essBand(total, lag); math.Abs(ess/want-1) > tol {
			t.Errorf("ρ=%.1f: ESS = %.0f, want %.0f within ±%.1f%% (truncation lag %d)", tc.rho, ess, want, 100*tol, lag)
		}
	}
}

func TestBulkESSTwoStateChain(t *testing.T) {
	// A stationary two-state Markov chain with switch probabilities a (0→1)
	// and b (1→0) has autocorrelation λ^t with λ = 1−a−b, so
	// ESS = N(1−λ)/(1+λ) (closed form, common practice). Its draws are all
	// ties, the case average ranks must handle; the indicator fast path used
	// by the sampler must agree with the general one exactly.
	const chains, perChain = 4, 20000
	a, b := 0.1, 0.2
	lambda := 1 - a - b
	total := float64(chains * perChain)
	want := total * (1 - lambda) / (1 + lambda)
	d := twoStateChains(41, chains, perChain, a, b)
	ess, lag := essWithLag(t, d)
	t.Logf("two-state: ESS %.0f, closed form %.0f, ratio %.4f, band ±%.4f, lag %d", ess, want, ess/want, essBand(total, lag), lag)
	if tol := essBand(total, lag); math.Abs(ess/want-1) > tol {
		t.Errorf("two-state chain: ESS = %.0f, want %.0f within ±%.1f%%", ess, want, 100*tol)
	}
	rhat, err := SplitRHat(d)
	if err != nil {
		t.Fatal(err)
	}

	// Same draws through the sampler's indicator path (state 1 of a
	// two-state target).
	r := &runner{chains: make([]*chain, chains)}
	for c := range r.chains {
		s := series{u8: make([]uint8, perChain)}
		for i, v := range d[c] {
			s.u8[i] = uint8(v)
		}
		r.chains[c] = &chain{store: []series{s}}
	}
	n := perChain / 2
	sc := newDiagScratch(2*chains, n)
	rh1, es1, varies := r.indicatorDiag(0, 1, n, sc)
	if !varies {
		t.Fatal("indicator path: draws reported constant")
	}
	if math.Abs(rh1-rhat) > 1e-9 || math.Abs(es1-ess) > 1e-6*ess {
		t.Errorf("indicator path R-hat %v ESS %v, general path R-hat %v ESS %v", rh1, es1, rhat, ess)
	}
	// The indicator of state 0 is an affine image of that of state 1:
	// R-hat and ESS are invariant.
	rh0, es0, _ := r.indicatorDiag(0, 0, n, sc)
	if math.Abs(rh0-rh1) > 1e-9 || math.Abs(es0-es1) > 1e-6*es1 {
		t.Errorf("state 0: R-hat %v ESS %v; state 1: R-hat %v ESS %v", rh0, es0, rh1, es1)
	}
}

func TestSplitRHatMatchesClassicFormulaOnBinaryDraws(t *testing.T) {
	// For draws with two distinct values, rank normalisation is an affine
	// map, and R-hat is affine invariant, so the rank-normalised split R-hat
	// equals the classic split R-hat of the raw draws: Gelman et al. (2013),
	// Bayesian Data Analysis, 3rd ed., section 11.4, computed here directly.
	d := twoStateChains(51, 3, 601, 0.05, 0.1)
	for i := range d[2] {
		if i%7 == 0 {
			d[2][i] = 1 // make one chain disagree a little
		}
	}
	got, err := SplitRHat(d)
	if err != nil {
		t.Fatal(err)
	}
	l := len(d[0])
	n := l / 2
	var halves [][]float64
	for _, c := range d {
		halves = append(halves, c[:n], c[l-n:])
	}
	m := float64(len(halves))
	means := make([]float64, len(halves))
	grand, w := 0.0, 0.0
	for j, h := range halves {
		for _, v := range h {
			means[j] += v
		}
		means[j] /= float64(n)
		grand += means[j] / m
		s2 := 0.0
		for _, v := range h {
			s2 += (v - means[j]) * (v - means[j])
		}
		w += s2 / float64(n-1) / m
	}
	b := 0.0
	for _, mu := range means {
		b += (mu - grand) * (mu - grand)
	}
	b *= float64(n) / (m - 1)
	want := math.Sqrt((float64(n-1)/float64(n)*w + b/float64(n)) / w)
	if math.Abs(got-want) > 1e-9 {
		t.Errorf("rank-normalised split R-hat %v, classic split R-hat %v", got, want)
	}
}

func TestDiagnosticsBadInput(t *testing.T) {
	if _, err := SplitRHat(nil); !errors.Is(err, ErrTooFewDraws) {
		t.Errorf("no chains: err = %v, want ErrTooFewDraws", err)
	}
	if _, err := BulkESS([][]float64{make([]float64, 11)}); !errors.Is(err, ErrTooFewDraws) {
		t.Errorf("11 draws: err = %v, want ErrTooFewDraws", err)
	}
	if _, err := BulkESS([][]float64{make([]float64, 20), make([]float64, 21)}); !errors.Is(err, ErrTooFewDraws) {
		t.Errorf("unequal chains: err = %v, want ErrTooFewDraws", err)
	}
	if _, err := SplitRHat([][]float64{make([]float64, 20)}); !errors.Is(err, ErrConstantDraws) {
		t.Errorf("constant draws: err = %v, want ErrConstantDraws", err)
	}
	bad := make([]float64, 20)
	bad[3] = math.NaN()
	if _, err := SplitRHat([][]float64{bad}); err == nil {
		t.Error("NaN draw accepted")
	}
	// Each half-chain constant, halves disagreeing: R-hat is infinite.
	split := make([]float64, 20)
	for i := 10; i < 20; i++ {
		split[i] = 1
	}
	if r, err := SplitRHat([][]float64{split}); err != nil || !math.IsInf(r, 1) {
		t.Errorf("disagreeing constant halves: R-hat %v, %v; want +Inf", r, err)
	}
}

func TestLagCountMatchesBruteForce(t *testing.T) {
	// The bitset lag products used for indicators, against a direct count
	// over every lag of random bit strings with lengths around word edges.
	rng := rand.New(rand.NewPCG(61, 4))
	for _, n := range []int{1, 63, 64, 65, 127, 128, 129, 300} {
		x := make([]bool, n)
		b := make([]uint64, (n+63)/64)
		for i := range x {
			if rng.Float64() < 0.6 {
				x[i] = true
				b[i>>6] |= 1 << (i & 63)
			}
		}
		for lag := 0; lag < n; lag++ {
			want := 0
			for i := 0; i+lag < n; i++ {
				if x[i] && x[i+lag] {
					want++
				}
			}
			if got := lagCount(b, n, lag); got != want {
				t.Fatalf("n=%d lag=%d: lagCount %d, brute force %d", n, lag, got, want)
			}
		}
	}
}
