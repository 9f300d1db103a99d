package sampling

import (
	"fmt"
	"math"
	"testing"

	"github.com/beliefd/beliefd/service/model"
)

// Published values for the chest-clinic network, Lauritzen & Spiegelhalter
// (1988), JRSS-B 50(2):157-224: prior marginals of "yes", and the
// posterior given asia = yes, dysp = yes with the probability of that
// evidence.
var (
	chestPrior = map[string]float64{"tub": 0.0104, "lung": 0.055, "bronc": 0.45, "either": 0.064828, "xray": 0.110290, "dysp": 0.435971}
	chestPost  = map[string]float64{"tub": 0.087751, "lung": 0.099525, "bronc": 0.811402}
	chestPE    = 0.00450138
	chestHard  = map[string]string{"asia": "yes", "dysp": "yes"}
)

// The published values agree with enumeration of the network as built by
// testnets, to the 6 digits printed (so the tests below check the sampler,
// not a mistyped table).
func TestChestClinicPublishedValues(t *testing.T) {
	net := chestClinic(t)
	prior := enumerate(t, net, nil)
	for name, p := range chestPrior {
		if got := prior.marg[indexOf(t, net, name)][1]; math.Abs(got-p) > 5e-7 {
			t.Errorf("prior %s = %.7f, published %v", name, got, p)
		}
	}
	post := enumerate(t, net, resolve(t, net, chestHard, nil))
	for name, p := range chestPost {
		if got := post.marg[indexOf(t, net, name)][1]; math.Abs(got-p) > 5e-7 {
			t.Errorf("posterior %s = %.7f, published %v", name, got, p)
		}
	}
	if math.Abs(post.pe-chestPE) > 5e-9 {
		t.Errorf("P(e) = %.9f, published %v", post.pe, chestPE)
	}
}

// coverCheck is one quantity whose interval should cover an exact value.
type coverCheck struct {
	name  string
	exact float64
	get   func(*Estimate) Interval
}

func marginalCheck(name string, target, state int, exact float64) coverCheck {
	return coverCheck{name: name, exact: exact, get: func(e *Estimate) Interval { return e.Marginals[target][state] }}
}

func evidenceCheck(exact float64) coverCheck {
	return coverCheck{name: "P(evidence)", exact: exact, get: func(e *Estimate) Interval { return *e.Evidence }}
}

// checkCoverage runs `runs` seeded runs and counts, for every check, how
// often the nominal 95% interval covers the exact value. A correct sampler
// with correct intervals covers about 95% of the time, so the count is
// about Binomial(runs, 0.95); the test fails when a count falls below the
// lower quantile of that distribution at 1e-4 split over the checks
// (Bonferroni), so a correct sampler fails with probability below 1e-4.
func checkCoverage(t *testing.T, what string, runs int, run func(seed uint64) *Estimate, checks []coverCheck) {
	t.Helper()
	const conf, alpha = 0.95, 1e-4
	covered := make([]int, len(checks))
	for seed := uint64(1); seed <= uint64(runs); seed++ {
		est := run(seed)
		noNaN(t, est)
		for i, c := range checks {
			// tol allows for the rounding of the exact value itself (a sum
			// over at most a few thousand configurations: below 1e-12
			// relative; Higham 2002, §4.2).
			tol := 1e-12 * c.exact
			if iv := c.get(est); iv.Lo-tol <= c.exact && c.exact <= iv.Hi+tol {
				covered[i]++
			}
		}
	}
	floor := binomialLowerQuantile(runs, conf, alpha/float64(len(checks)))
	for i, c := range checks {
		t.Logf("%s: %s covered %d/%d (floor %d)", what, c.name, covered[i], runs, floor)
		if covered[i] < floor {
			t.Errorf("%s: the 95%% interval of %s covered the exact value %v in %d of %d runs, below %d",
				what, c.name, c.exact, covered[i], runs, floor)
		}
	}
}

const coverageRuns = 200

func TestCoverageForwardChestClinic(t *testing.T) {
	net := chestClinic(t)
	var targets []int
	var checks []coverCheck
	for _, name := range []string{"tub", "lung", "bronc", "either", "xray", "dysp"} {
		checks = append(checks, marginalCheck(name, len(targets), 1, chestPrior[name]))
		targets = append(targets, indexOf(t, net, name))
	}
	// 3000 samples: even tub (p = 0.0104) expects about 31, where the
	// Wilson interval's coverage is near nominal (Brown, Cai & DasGupta 2001).
	checkCoverage(t, "forward", coverageRuns, func(seed uint64) *Estimate {
		return mustRun(t, net, nil, targets, Options{Method: MethodForward, Seed: seed, Workers: 1, BlockSize: 1024, Stop: Stop{MaxSamples: 3000}})
	}, checks)
}

func TestCoverageRejectionChestClinic(t *testing.T) {
	net := chestClinic(t)
	ev := resolve(t, net, chestHard, nil)
	var targets []int
	var checks []coverCheck
	for _, name := range []string{"tub", "lung", "bronc"} {
		checks = append(checks, marginalCheck(name, len(targets), 1, chestPost[name]))
		targets = append(targets, indexOf(t, net, name))
	}
	checks = append(checks, evidenceCheck(chestPE))
	// 60,000 draws accept about 270: tub expects about 24 "yes".
	checkCoverage(t, "rejection", coverageRuns, func(seed uint64) *Estimate {
		return mustRun(t, net, ev, targets, Options{Method: MethodRejection, Seed: seed, Workers: 1, Stop: Stop{MaxSamples: 60_000}})
	}, checks)
}

func TestCoverageLikelihoodWeightingChestClinic(t *testing.T) {
	net := chestClinic(t)
	ev := resolve(t, net, chestHard, nil)
	var targets []int
	var checks []coverCheck
	for _, name := range []string{"tub", "lung", "bronc"} {
		checks = append(checks, marginalCheck(name, len(targets), 1, chestPost[name]))
		targets = append(targets, indexOf(t, net, name))
	}
	checks = append(checks, evidenceCheck(chestPE))
	// The delta-method and mean-weight intervals are asymptotic (normal);
	// with 4000 samples every checked posterior has an expected weighted
	// count above 300, where the normal approximation is good.
	checkCoverage(t, "likelihood weighting", coverageRuns, func(seed uint64) *Estimate {
		return mustRun(t, net, ev, targets, Options{Method: MethodLikelihoodWeighting, Seed: seed, Workers: 1, BlockSize: 1000, Stop: Stop{MaxSamples: 4000}})
	}, checks)
}

// randomCase is a small random network with hard and soft evidence and
// exact answers by enumeration.
type randomCase struct {
	net     *model.Network
	ev      *model.Evidence
	targets []int
	exact   exactAnswer
}

func newRandomCase(t *testing.T, seed uint64, soft bool) randomCase {
	net := randomNet(seed, 7, 0)
	prior := enumerate(t, net, nil)
	ev := net.NoEvidence()
	// Observe the last variable that has parents (so weights vary) in its
	// most likely state (so P(evidence) is not tiny).
	h := len(net.Vars) - 1
	for len(net.Vars[h].Parents) == 0 {
		h--
	}
	best := 0
	for s, p := range prior.marg[h] {
		if p > prior.marg[h][best] {
			best = s
		}
	}
	ev.Hard[h] = best
	if soft {
		v := 3
		lik := make([]float64, net.Vars[v].Card())
		for s := range lik {
			lik[s] = 0.9 - 0.35*float64(s)
		}
		ev.Soft[v] = lik
	}
	var targets []int
	for v := range net.Vars {
		if ev.Hard[v] < 0 {
			targets = append(targets, v)
		}
	}
	return randomCase{net: net, ev: ev, targets: targets, exact: enumerate(t, net, ev)}
}

// checksFor lists the target states whose exact posterior lies in
// [lo, 1-lo] (asymptotic intervals need a few dozen samples on each side),
// and P(evidence).
func (c randomCase) checksFor(lo float64) []coverCheck {
	var checks []coverCheck
	for i, v := range c.targets {
		for s, p := range c.exact.marg[v] {
			if p >= lo && p <= 1-lo {
				checks = append(checks, marginalCheck(fmt.Sprintf("v%d=s%d", v, s), i, s, p))
			}
		}
	}
	return append(checks, evidenceCheck(c.exact.pe))
}

func TestCoverageRandomNetworks(t *testing.T) {
	for _, seed := range []uint64{21, 22} {
		c := newRandomCase(t, seed, seed%2 == 0)
		t.Logf("network %d: P(evidence) = %v", seed, c.exact.pe)
		if c.exact.pe < 0.05 {
			t.Fatalf("network %d: P(evidence) = %v is too small for these budgets", seed, c.exact.pe)
		}
		// Rejection: 3000 draws accept about 1000 or more (P(evidence) >=
		// 0.35); states of posterior >= 0.1 then expect 100 or more.
		checkCoverage(t, fmt.Sprintf("rejection, network %d", seed), coverageRuns, func(s uint64) *Estimate {
			return mustRun(t, c.net, c.ev, c.targets, Options{Method: MethodRejection, Seed: s, Workers: 1, Stop: Stop{MaxSamples: 3000}})
		}, c.checksFor(0.1))
		// Likelihood weighting: 2000 weighted samples; states of posterior
		// >= 0.1 carry a few hundred samples' weight, where the normal
		// approximation of the delta method holds.
		checkCoverage(t, fmt.Sprintf("likelihood weighting, network %d", seed), coverageRuns, func(s uint64) *Estimate {
			return mustRun(t, c.net, c.ev, c.targets, Options{Method: MethodLikelihoodWeighting, Seed: s, Workers: 1, Stop: Stop{MaxSamples: 2000}})
		}, c.checksFor(0.1))
	}
	// Forward sampling of the prior of a network with exact zeros; states
	// of probability >= 0.02 expect 40 or more of 2000 samples.
	net := randomNet(23, 7, 0.2)
	exact := enumerate(t, net, nil)
	var targets []int
	var checks []coverCheck
	for v := range net.Vars {
		for s, p := range exact.marg[v] {
			if p >= 0.02 && p <= 0.98 {
				checks = append(checks, marginalCheck(fmt.Sprintf("v%d=s%d", v, s), len(targets), s, p))
			}
		}
		targets = append(targets, v)
	}
	checkCoverage(t, "forward, random network", coverageRuns, func(s uint64) *Estimate {
		return mustRun(t, net, nil, targets, Options{Method: MethodForward, Seed: s, Workers: 1, Stop: Stop{MaxSamples: 2000}})
	}, checks)
}
