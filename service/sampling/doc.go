// Package sampling estimates posterior marginals and the probability of
// the evidence by Monte Carlo, with confidence intervals, stopping rules
// and results that do not depend on how the work is spread.
//
// # Methods
//
//   - MethodForward ("forward"): ancestral sampling from the prior
//     (Henrion 1988, "Propagating uncertainty in Bayesian networks by
//     probabilistic logic sampling"). Each variable, in topological order,
//     is drawn from its table row given its sampled parents. It takes no
//     evidence; asked to condition, it refuses with ErrEvidenceNotSupported.
//   - MethodRejection ("rejection"): forward samples that contradict the
//     hard evidence are discarded (a sample is abandoned as soon as an
//     observed variable is drawn in another state). A variable with soft
//     evidence (a likelihood vector λ) is kept with probability
//     λ(x)/max λ, so a sample is accepted with probability
//     P(e)·Π 1/max λ and the accepted samples are draws from the posterior.
//   - MethodLikelihoodWeighting ("likelihood-weighting"): observed variables
//     are set to their state and multiply the sample's weight by its
//     probability given the sampled parents; soft-evidence variables are
//     sampled and multiply the weight by λ(x) (Fung & Chang 1990; Shachter
//     & Peot 1990). Posteriors are self-normalised weighted frequencies.
//
// Gibbs sampling lives in the subpackage gibbs, which uses this package's
// Rand, NewStream, Interval, Wilson, Stop and Estimate.
//
// # Blocks and determinism
//
// A run with seed s is cut into numbered blocks of B samples (B fixed per
// run, DefaultBlockSize unless set; the last block is short so that exactly
// Stop.MaxSamples samples are drawn: see NumBlocks and BlockLen). Block k
// draws its random numbers from NewStream(s, k) and nothing else, and
// produces Stats: plain sums that merge by addition. Kernel.RunBlock draws
// one block; Stats.Merge adds blocks. Stopping decisions
// (Kernel.StopReason) and estimates (Kernel.Summarize) look only at the
// merged statistics of a prefix of blocks 0..m-1, merged in block order,
// so the floating-point additions happen in a fixed order and the same
// seed gives bit-identical estimates whether the blocks ran on one
// goroutine, many, or many machines (the clock rules, Timeout and
// cancellation, are the exception: they cut the prefix where it stands).
// Run is the in-process runner: it hands blocks out in order to Workers
// goroutines, at most two per worker ahead of the merged prefix, merges
// results strictly in block order, discards blocks past the stopping
// prefix, and reports partial estimates through Progress.
//
// # Statistics
//
// Each sample has a weight w: 1 for forward sampling, 1 or 0 for
// rejection, the likelihood weight for likelihood weighting. Stats hold
// N (samples drawn), Accepted (samples with w > 0), Σw, Σw², max w and,
// for every state j of every target, Σ w·I_j and (likelihood weighting)
// Σ w²·I_j, where I_j is 1 when the sample is in state j. Stats encode as
// JSON; float64 values round-trip exactly.
//
// # Intervals
//
// All intervals are two-sided at Stop.Confidence (default 95%), with
// z = Φ⁻¹(1/2 + confidence/2).
//
//   - Forward and rejection marginals: the Wilson score interval for
//     k = Σ I_j successes in n trials, n = N (forward) or Accepted
//     (rejection) (Wilson 1927, JASA 22:209-212; Newcombe 1998, Stat Med
//     17:857-872; Brown, Cai & DasGupta 2001, Stat Sci 16:101-133).
//   - Rejection P(evidence): the Wilson interval of the acceptance rate
//     Accepted/N, multiplied by Π max λ over soft-evidence variables.
//     With no sample accepted the estimate is 0 with the upper bound
//     z²/(N+z²) (close to the rule of three, 3/N at 95%; Hanley &
//     Lippman-Hand 1983) and a warning, not an error.
//   - Likelihood-weighting marginals: p̂ = Σ w I / Σ w with the delta-method
//     variance of a ratio estimator, var(p̂) ≈ Σ w²(I − p̂)² / (Σ w)²
//     (Hesterberg 1995, Technometrics 37:185-194; Owen 2013, Monte Carlo
//     theory, methods and examples, ch. 9), computed from the per-state sums
//     as ((1−p̂)² Σ w²I + p̂² (Σw² − Σ w²I)) / (Σ w)² and clipped to [0, 1].
//     A state never seen (or the only one seen) would get a zero-width
//     interval; it is widened to the Wilson bound for the effective sample
//     size. The effective sample size is Kish's (Σw)²/Σw² (Kish 1965).
//   - Likelihood-weighting P(evidence): the mean weight Σw/N, which is
//     unbiased, with a normal interval from the sample standard deviation
//     of the weights, clipped to [0, max possible weight]. If every weight
//     is 0 the estimate is 0 with the upper bound
//     (z²/(N+z²))·max possible weight, and a warning.
//   - Targets with hard evidence are exact (zero-width intervals), and
//     precision rules ignore them.
//
// Weights are plain float64: evidence so unlikely that one sample's weight
// falls below about 1e-308 underflows to weight 0.
//
// Intervals for likelihood weighting rest on the central limit theorem;
// when the weights are very uneven (effective sample size below 1% of N,
// or one sample carrying more than 10% of the total weight) the estimate
// carries a warning. Log10Evidence reports log10 of the estimate, useful
// when P(evidence) is tiny.
//
// # Speed
//
// NewKernel flattens the network into arrays: per variable a small record
// (card, evidence, parent range, table offset), the parents and their
// strides (pre-multiplied by the child's card) in two flat slices, and the
// tables as cumulative rows (the entry of the last positive state set to 2
// so the search always ends and zero-probability states are never drawn).
// The sampling loops use no interfaces and allocate nothing per sample;
// memory does not grow with the number of samples.
package sampling
