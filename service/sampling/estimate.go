package sampling

import "time"

// Estimate is what a sampling run reports, partial while it runs.
type Estimate struct {
	Method string
	Seed   uint64
	// Samples drawn in total (for rejection sampling, accepted or not; for
	// Gibbs, kept draws over all chains after burn-in).
	Samples int64
	// EffectiveSamples: Kish's (sum w)^2 / sum w^2 for weighting samplers,
	// accepted samples for rejection, the smallest bulk ESS over targets
	// for Gibbs, Samples for forward sampling.
	EffectiveSamples float64
	// Marginals[i][s] is the posterior of state s of target i.
	Marginals [][]Interval
	// Evidence is P(evidence) with its interval; nil when there is no evidence
	// or the method does not estimate it (Gibbs).
	Evidence *Interval
	// Log10Evidence is log10 of Evidence.P (-Inf when it is 0).
	Log10Evidence float64
	// AcceptanceRate is the share of accepted samples (rejection sampling).
	AcceptanceRate float64
	// MaxWeightShare is the largest single weight over the sum of weights
	// (weighting samplers): near 1 means one sample dominates.
	MaxWeightShare float64
	// RHat and ESS per target (Gibbs): rank-normalised split R-hat and bulk
	// effective sample size, the worst over the target's states.
	RHat []float64
	ESS  []float64
	// StopReason is one of the Reason constants ("" while running).
	StopReason string
	Elapsed    time.Duration
	Warnings   []string
}

// Progress is called with partial estimates while a run goes on.
type Progress func(partial *Estimate)
