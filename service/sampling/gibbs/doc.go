// Package gibbs estimates posterior marginals of a beliefd model by Gibbs
// sampling, with convergence diagnostics.
//
// # Algorithm
//
// Only the relevant variables are sampled: the targets, the variables with
// hard or soft evidence, and all their ancestors. The others are barren
// (unobserved with no evidence or target below them) and sum out exactly.
//
// Each chain starts from a likelihood-weighted forward draw: variables in
// topological order, observed ones clamped to their evidence, unobserved ones
// drawn from their table row (times the soft likelihood, if any). A draw with
// zero weight is retried, a bounded number of times; if none has positive
// weight the run fails with ErrImpossibleEvidence.
//
// A sweep then updates every unobserved relevant variable once, in
// topological order (systematic scan), from its full conditional
//
//	P(X = x | rest) ∝ P(x | pa(X)) · Π_{children C} P(c | pa(C)) · λ_X(x)
//
// where λ_X is X's soft likelihood (1 when there is none). For each variable
// the sampler precomputes its children and X's stride in each child's table,
// and keeps the current table row of every variable up to date as parents
// change, so one update costs O(card(X) · (1 + children)) and a sweep
// allocates nothing. A conditional whose product underflows is redone in log
// space.
//
// # Segments, random streams and determinism
//
// Sweeps of a chain, burn-in included, are cut into segments of
// Options.SegmentSweeps (S) sweeps: segment j of chain c is sweeps j·S to
// (j+1)·S−1 and draws only from sampling.NewStream(seed, j·Chains + c),
// starting from the chain's state at the end of segment j−1. Segment 0 also
// draws the chain's starting state from that stream. Round j runs segment j
// of every chain, spread over Workers goroutines; statistics are merged
// after whole rounds only, in chain order, so the estimate after round m
// depends on the seed, the options that shape the draws (Chains, BurnIn,
// SegmentSweeps, the stopping rule) and the query, and not on Workers or
// scheduling. A timeout or cancellation in the middle of a round drops that
// round, so the estimate reported is always that of a whole number of
// rounds.
//
// Each chain keeps MaxSamples/Chains sweeps after a burn-in of BurnIn sweeps
// (default: a tenth of the kept sweeps per chain, clamped to [500, 50000]).
// Estimate.Samples is the kept sweeps summed over chains.
//
// # Estimates
//
// A marginal is the share of kept sweeps, pooled over chains (all chains
// keep the same number), in which the target is in the state; it uses every
// kept sweep through running counts. Its interval is p ± z·sqrt(p(1−p)/ESS)
// clipped to [0, 1], with ESS the bulk effective sample size of the state's
// indicator. For a state whose stored indicator never varies, or whose
// estimate is 0 or 1, that would be a zero-width interval; there the Wilson
// score interval is used with the target's ESS as the number of trials.
// These intervals rest on a Markov-chain central limit theorem and an
// estimated ESS: they are approximate, and better with more draws.
//
// # Diagnostics
//
// Per target and state, on the indicator of the state: rank-normalised split
// R-hat and bulk effective sample size following Vehtari, Gelman, Simpson,
// Carpenter & Bürkner (2021), "Rank-normalization, folding, and
// localization: an improved R-hat for assessing convergence of MCMC",
// Bayesian Analysis 16(2):667-718. Each chain's draws are split in halves;
// all draws are replaced by Φ⁻¹((r − 3/8)/(S − 1/4)) with r the average rank
// (ties share it) among the S split draws; R-hat comes from the between- and
// within-half-chain variances; ESS from autocorrelations combined over
// half-chains and truncated with Geyer's initial monotone sequence (direct
// sums, computed only up to the truncation lag). Estimate.RHat and
// Estimate.ESS give the worst over a target's states, and
// Estimate.EffectiveSamples the smallest ESS over targets. A warning is
// added when some R-hat exceeds 1.01 or some ESS is below 400, the paper's
// recommendations. SplitRHat and BulkESS expose the same diagnostics for
// any real-valued draws.
//
// Memory: the diagnostics need the draws in order, so each chain stores the
// target states as bytes (uint16 above 256 states). When a chain's stored
// series exceeds its cap (at most 65536 draws per target and chain, lowered
// so that all stored draws fit in 64 MiB, but not below 1024), every second
// stored draw is dropped and the storing stride doubles. The marginals still
// use every kept sweep; the diagnostics then describe the thinned series,
// whose ESS is at most that of the full chain, so intervals err on the wide
// side.
//
// # Stopping
//
// A run stops at the first rule of Options.Stop that holds: MaxSamples
// (kept sweeps over all chains), Timeout, cancellation of the context
// (StopReason "cancelled", with the partial estimate and no error), or a
// precision rule (AbsErr, RelErr on every interval of every unobserved
// target). Precision rules are checked on the merged statistics after a
// round once each chain has kept 12 sweeps, and then whenever the kept
// sweeps have grown by an eighth since the last check (so the cost of the
// diagnostics stays a bounded multiple of the final one); a rule counts as
// met only when every unobserved target also has R-hat at most 1.01 and ESS
// at least 400, since the intervals rely on them.
//
// # Reducibility
//
// Zero probabilities (fault-tree gates, zero table entries) can cut the
// state space into parts a single-site chain cannot move between, and then
// it silently reports the posterior of one part. The package refuses such
// models conservatively: every table entry that can multiply into the
// posterior of the unobserved relevant variables must be positive, that is,
// for every relevant variable whose own state or a parent's is unobserved,
// every entry of its table in the rows allowed by the observed parents (all
// states of an unobserved variable, the observed state of an observed one).
// Under this rule the posterior is positive on the product of the soft
// evidence supports, where single-site Gibbs sampling is irreducible. A
// model that breaks it gets a *ReducibleError (wrapping ErrReducible) naming
// an unobserved variable and the table holding the zero; likelihood
// weighting or exact inference handle such models. Nearly deterministic
// tables (0.999/0.001) are accepted, but mix slowly: watch R-hat and ESS.
package gibbs
