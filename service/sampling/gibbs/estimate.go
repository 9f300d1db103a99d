package gibbs

import (
	"fmt"
	"math"
	"math/bits"
	"sync"
	"sync/atomic"

	"github.com/beliefd/beliefd/service/sampling"
)

// diagScratch is reused across the states of one estimate: per half-chain,
// the indicator as a bitset and its prefix counts.
type diagScratch struct {
	bits   [][]uint64
	prefix [][]int32
	means  []float64
	vars   []float64
	rho    []float64
}

func newDiagScratch(halves, n int) *diagScratch {
	sc := &diagScratch{bits: make([][]uint64, halves), prefix: make([][]int32, halves),
		means: make([]float64, halves), vars: make([]float64, halves), rho: make([]float64, n+1)}
	for j := range sc.bits {
		sc.bits[j] = make([]uint64, (n+63)/64)
		sc.prefix[j] = make([]int32, n+1)
	}
	return sc
}

// estimate builds the estimate from the committed statistics of all chains
// (which are at the same round boundary). Targets are spread over the
// workers; each writes only its own entries, so the result does not depend
// on scheduling.
func (r *runner) estimate() *sampling.Estimate {
	p := r.p
	m := len(r.chains)
	samples := r.chains[0].kept * int64(m)
	nt := len(p.targets)
	est := &sampling.Estimate{
		Method:    Method,
		Seed:      r.seed,
		Samples:   samples,
		Marginals: make([][]sampling.Interval, nt),
		RHat:      make([]float64, nt),
		ESS:       make([]float64, nt),
	}
	n := r.chains[0].storeLen / 2
	diagOK := n >= minHalf
	workers := max(1, min(r.s.workers, nt))
	var next atomic.Int64
	var wg sync.WaitGroup
	for w := 0; w < workers; w++ {
		wg.Add(1)
		go func() {
			defer wg.Done()
			var sc *diagScratch
			if diagOK {
				sc = newDiagScratch(2*m, n)
			}
			for i := int(next.Add(1) - 1); i < nt; i = int(next.Add(1) - 1) {
				est.Marginals[i], est.RHat[i], est.ESS[i] = r.target(i, samples, n, diagOK, sc)
			}
		}()
	}
	wg.Wait()

	minESS := math.Inf(1)
	var badR, badE []int
	for i, t := range p.targets {
		if p.hard[t] >= 0 {
			continue
		}
		minESS = math.Min(minESS, est.ESS[i])
		if !diagOK {
			continue
		}
		if est.RHat[i] > RHatLimit {
			badR = append(badR, i)
		}
		if est.ESS[i] < ESSLimit {
			badE = append(badE, i)
		}
	}
	if math.IsInf(minESS, 1) {
		est.EffectiveSamples = float64(samples) // every target is observed
	} else {
		est.EffectiveSamples = minESS
	}
	est.Warnings = r.warnings(est, diagOK, badR, badE)
	return est
}

// target computes the intervals, R-hat and ESS of target i. Observed
// targets are exact, with R-hat 1 and ESS the number of samples. Without
// enough stored draws for the diagnostics, intervals are [0, 1] and R-hat
// and ESS are 0.
func (r *runner) target(i int, samples int64, n int, diagOK bool, sc *diagScratch) ([]sampling.Interval, float64, float64) {
	p := r.p
	t := p.targets[i]
	card := int(p.card[t])
	ivs := make([]sampling.Interval, card)
	if h := p.hard[t]; h >= 0 {
		ivs[h] = sampling.Interval{P: 1, Lo: 1, Hi: 1}
		return ivs, 1, float64(samples)
	}
	phat := make([]float64, card)
	for s := range phat {
		var k int64
		for _, ch := range r.chains {
			k += ch.counts[p.tOff[i]+s]
		}
		if samples > 0 {
			phat[s] = float64(k) / float64(samples)
		}
	}
	if !diagOK {
		for s := range ivs {
			ivs[s] = sampling.Interval{P: phat[s], Lo: 0, Hi: 1}
		}
		return ivs, 0, 0
	}
	stateESS := make([]float64, card)
	worstR, worstE := 0.0, math.Inf(1)
	for s := 0; s < card; s++ {
		if card == 2 && s == 1 {
			// The indicator of state 1 is one minus that of state 0:
			// same R-hat and ESS.
			stateESS[1] = stateESS[0]
			break
		}
		rh, es, varies := r.indicatorDiag(i, s, n, sc)
		if !varies {
			stateESS[s] = math.NaN()
			continue
		}
		stateESS[s] = es
		worstR = math.Max(worstR, rh)
		worstE = math.Min(worstE, es)
	}
	if math.IsInf(worstE, 1) {
		// The stored draws of this target never change: nothing
		// disagrees, and the stored draws are all there is to count.
		worstR, worstE = 1, float64(2*len(r.chains)*n)
	}
	conf := r.s.stop.Confidence
	for s := range ivs {
		ph := phat[s]
		if math.IsNaN(stateESS[s]) || ph <= 0 || ph >= 1 {
			// No variation to estimate a standard error from: the Wilson
			// score interval with the target's ESS as the number of
			// trials stays honest at 0 and 1.
			ivs[s] = sampling.Wilson(ph*worstE, worstE, conf)
			continue
		}
		ivs[s] = sampling.NormalInterval(ph, math.Sqrt(ph*(1-ph)/stateESS[s]), conf, 0, 1)
	}
	return ivs, math.Min(worstR, MaxRHat), worstE
}

// indicatorDiag computes the rank-normalised split R-hat and bulk ESS of the
// indicator of state s of target i over the stored draws, of which each
// chain half contributes n. With only two distinct values, the average
// ranks are (n0+1)/2 for the n0 draws not in s and n0+(n1+1)/2 for the n1
// draws in s, so the normal scores are z = z0 + (z1−z0)·x for the indicator
// x. Means, variances and autocovariances on the z scale follow from those
// of x (scaled by z1−z0, squared for the second moments); the lag products
// of x are counted on bitsets, 64 draws per word. varies is false when
// every stored draw is, or none is, in s.
func (r *runner) indicatorDiag(i, s, n int, sc *diagScratch) (rhat, ess float64, varies bool) {
	m := 2 * len(r.chains)
	total := m * n
	n1 := 0
	for c, ch := range r.chains {
		ser := &ch.store[i]
		l := ser.len()
		for h := 0; h < 2; h++ {
			start := 0
			if h == 1 {
				start = l - n
			}
			b, pre := sc.bits[2*c+h], sc.prefix[2*c+h]
			for k := range b {
				b[k] = 0
			}
			ones := int32(0)
			for k := 0; k < n; k++ {
				pre[k] = ones
				if ser.at(start+k) == s {
					b[k>>6] |= 1 << (k & 63)
					ones++
				}
			}
			pre[n] = ones
			n1 += int(ones)
		}
	}
	if n1 == 0 || n1 == total {
		return 0, 0, false
	}
	n0 := total - n1
	z0 := normalScore(float64(n0+1)/2, total)
	z1 := normalScore(float64(n0)+float64(n1+1)/2, total)
	d := z1 - z0
	for j := 0; j < m; j++ {
		k := float64(sc.prefix[j][n])
		mu := k / float64(n)
		sc.means[j] = z0 + d*mu
		sc.vars[j] = d * d * k * (1 - mu) / float64(n-1)
	}
	rhat = rhatCentred(sc.means, sc.vars, n)
	acovMean := func(t int) float64 {
		sum := 0.0
		for j := 0; j < m; j++ {
			pre := sc.prefix[j]
			mu := float64(pre[n]) / float64(n)
			both := float64(lagCount(sc.bits[j], n, t))
			head := float64(pre[n-t])        // Σ x_i, i < n−t
			tail := float64(pre[n] - pre[t]) // Σ x_i, i ≥ t
			sum += (both - mu*(head+tail) + float64(n-t)*mu*mu) / float64(n)
		}
		return d * d * sum / float64(m)
	}
	ess, _ = essFrom(m, n, sc.means, sc.vars, acovMean, sc.rho)
	return rhat, ess, true
}

// lagCount counts the i in [0, n−t) with bits i and i+t both set; bits at
// and beyond n must be clear.
func lagCount(b []uint64, n, t int) int {
	q, r := t>>6, uint(t&63)
	span := n - t
	cnt := 0
	for w := 0; w*64 < span; w++ {
		var sh uint64
		if w+q < len(b) {
			sh = b[w+q] >> r
		}
		if r > 0 && w+q+1 < len(b) {
			sh |= b[w+q+1] << (64 - r)
		}
		v := b[w] & sh
		if rem := span - w*64; rem < 64 {
			v &= 1<<uint(rem) - 1
		}
		cnt += bits.OnesCount64(v)
	}
	return cnt
}

func (r *runner) warnings(est *sampling.Estimate, diagOK bool, badR, badE []int) []string {
	free := false
	for _, t := range r.p.targets {
		free = free || r.p.hard[t] < 0
	}
	if !free {
		return nil // every target is observed: the answer is exact
	}
	var w []string
	name := func(i int) string { return r.p.net.Vars[r.p.targets[i]].Name }
	perChain := r.chains[0].kept
	switch {
	case est.Samples == 0:
		w = append(w, fmt.Sprintf("no sweeps kept yet: the run stopped during burn-in (%d of %d sweeps per chain)", r.chains[0].sweeps, r.s.burnIn))
	case !diagOK:
		w = append(w, fmt.Sprintf("only %d kept sweeps per chain: too few for R-hat and ESS, so intervals are [0, 1]", perChain))
	}
	if len(badR) > 0 {
		worst := badR[0]
		for _, i := range badR {
			if est.RHat[i] > est.RHat[worst] {
				worst = i
			}
		}
		w = append(w, fmt.Sprintf("R-hat above %.2f for %d of %d targets (worst: %q at %.3g): the chains disagree, so the estimates are not reliable; run longer, or use likelihood weighting or exact inference",
			RHatLimit, len(badR), len(est.RHat), name(worst), est.RHat[worst]))
	}
	if len(badE) > 0 {
		worst := badE[0]
		for _, i := range badE {
			if est.ESS[i] < est.ESS[worst] {
				worst = i
			}
		}
		w = append(w, fmt.Sprintf("bulk ESS below %d for %d of %d targets (lowest: %q at %.0f): intervals and R-hat are unreliable; run longer",
			ESSLimit, len(badE), len(est.ESS), name(worst), est.ESS[worst]))
	}
	return w
}
