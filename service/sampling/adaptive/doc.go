// Package adaptive is beliefd's adaptive importance sampler (method
// "adaptive-importance"), for unlikely evidence (P(evidence) of 1e-6 to
// 1e-12) and rare target events (a top event at 1e-7), where likelihood
// weighting spends almost all its samples on weights near zero.
//
// # Importance function
//
// The importance function Q has the network's own structure: one table
// per variable, over the same parents, sampled in topological order like
// the network itself; a sample's weight is P(x, e)/Q(x), the product over
// variables of P(x|parents)/Q(x|parents) and, for observed variables, of
// P(e|parents) (soft evidence multiplies its likelihood). Support: Q(x|row)
// > 0 exactly where P(x|row) > 0, so the estimates are unbiased whatever Q.
//
//  1. Evidence pre-propagation (EPIS-BN, Yuan & Druzdzel 2003): Q starts as
//     P(x|parents)·λ(x) normalised, where λ(x) is the evidence below x as
//     Pearl's message passing sees it. Two versions of λ are mixed half and
//     half, row by row: loopy belief propagation run to convergence (damped
//     after the first sweep, at most 200 sweeps), and a single upward pass
//     in which every λ message sees the co-parents at their prior. On a
//     polytree both are exact and Q is the posterior: the weights are
//     constant. The mix is there because loopy propagation can settle on
//     one explanation of the evidence and all but exclude the others (two
//     common causes that each explain four alarms: it put 0.994 on one and
//     2e-6 on the other where the exact posterior is 0.53 / 0.47, and the
//     estimate of P(evidence) came out at half the truth with a tight
//     interval); the upward pass credits every explanation, overconfidently,
//     and the learning stages correct the proportions.
//  2. ε-cutoff (the heavy-tail safeguard of AIS-BN and EPIS-BN): every state
//     with P(x|row) > 0 keeps Q(x|row) ≥ min(P(x|row), ε), with ε = 0.006
//     for up to 5 states, 0.001 up to 8, 0.0005 beyond (values recalled
//     from EPIS-BN, from memory). Flooring at min(P, ε) rather than ε keeps
//     rare roots (P = 1e-5) at their prior instead of inflating hundreds of
//     them; each factor P/Q of a weight stays below 1/ε. States for which
//     propagation finds no support (zeros found by propagation are sound)
//     keep a floor a million times smaller, so the support of Q stays that
//     of P; the interval accounts for the samples such floors may waste.
//  3. Learning (AIS-BN, Cheng & Druzdzel 2000, JAIR 13:155-188): LearnStages
//     stages (4) of LearnSamples samples (2,048); after each, every table row
//     visited at least 8 times moves towards the weighted frequencies of
//     its states, Q ← Q + η(k)(Q̂ − Q), η(k) = 0.4·(0.14/0.4)^(k/K) (the
//     AIS-BN schedule, constants from memory). With η = 1 this is the
//     cross-entropy update for rare events (Rubinstein 1997; Rubinstein &
//     Kroese 2004): weighted maximum likelihood of the tables, so the two
//     methods coincide here. Each learned row is mixed with 20% of the
//     propagation row (a defensive mixture, Hesterberg 1995, Technometrics
//     37:185-194): learning from a few heavy weights can collapse a row onto
//     one mode; the mixture keeps the others reachable, so a missed mode
//     shows up as heavy-tailed weights (see Diagnostics) instead of a
//     silently wrong answer.
//
// Learning draws from NewStream(seed, 1<<63 | track<<20 | stage) only, so it
// is deterministic: the same seed gives the same importance functions in
// every process, and a worker that rebuilds the sampler gets the same bits.
//
// # Why both steps (measured)
//
// cmd/beliefd-bench compares propagation alone with propagation plus
// learning on generated failure-propagation networks of about 220
// variables (testnets.FaultTree), 6 seeds each. Learning pays on unlikely
// evidence: P(evidence) = 6.6e-7, 3.5e-7 and 1.9e-12 reached a 10%
// relative half-width in 1.8e4, 1.8e4 and 3.5e4 samples (median, learning
// included) against 9.2e4, 1.5e5 and 2.5e5 with propagation alone, whose
// runs all carried heavy-tail warnings (learning: 2 of 18); likelihood
// weighting needs 4.9e8, 7.9e8 and 1.6e12 (from its exact variance). On
// rare top events without evidence (P = 1.05e-6, 1.3e-6, 7e-9) it needed
// 4.1e4, 1.9e5 and 5.1e7 (extrapolated) against 1.2e5, 1.3e6 and 6.3e7,
// and its intervals covered the exact value in 17 of 18 runs against 15
// of 18. Learning is therefore on by default; LearnStages < 0 turns it
// off. Its cost is fixed (about 1.4e4 samples per track), so it is 26-57%
// of the wall time of runs that reach the precision within a second and
// about 1% of long ones. README.md ("Rare events") has the full table.
//
// # Rare target states
//
// A target state whose probability given the evidence is tiny gets its
// own track: the evidence plus "target = state", with its own importance
// function (propagated and learned like the main one). Its mean weight
// estimates the joint P(state, e), with a relative interval however small
// it is, and the reported marginal is the ratio P(state, e)/P(e) of two
// independent estimates, with Fieller's interval for a ratio (Fieller 1954,
// JRSS-B 16:175-185; clipped to [0, 1]; without evidence the denominator is
// exactly 1 and the interval is the numerator's). Tracks go to every state
// but the dominant one of the targets the caller names (RareTargets), then
// to target states whose pilot estimate (PilotSamples from the learned main
// function) is below RareThreshold (1e-3), smallest first, up to MaxTracks
// tracks (8) in all.
//
// # Blocks and determinism
//
// After learning the functions are frozen and sampled in numbered blocks
// exactly like likelihood weighting: block k of track 0 draws from
// NewStream(seed, k), block k of track i from NewStream(seed, 1<<62 | i<<50 |
// k). Each block gives, per track, sampling.Stats (sums of w and w², and for
// the main track per target state) plus the TopWeights (2,048) largest
// weights; sums merge by addition and the buffers by keeping the largest of
// both, merged in block order, so the same seed gives bit-identical results
// with any number of goroutines. Stop.MaxSamples counts the draws of all
// tracks (each draws an equal share); the learning and pilot samples are
// reported in Result.Learning. Stored weights are divided by a power of two
// near the learned estimate, so P(evidence) of 1e-200 neither underflows in
// Σw² nor loses precision.
//
// # Intervals
//
//   - P(evidence) and P(state, evidence): the mean weight with a normal
//     interval from the sample variance, clipped to [0, bound on the
//     weights]; the bound is the product over variables of the largest
//     factor a row can contribute. With no positive weight: 0 with the upper
//     bound Wilson(0, N).Hi × bound.
//   - Posterior marginals of the main track: self-normalised, with the
//     delta-method variance of a ratio estimator (as for likelihood
//     weighting), turned into a Wilson score interval at the effective
//     sample size n* = p(1-p)/var of that proportion. Measured limitation:
//     a state that rests on a dozen samples of uneven weight under-covers
//     (P(tub | asia, dysp, no xray) = 0.0022 in the chest-clinic network:
//     about 80% coverage at 2,000 samples, nominal at 20,000).
//
// # Diagnostics
//
// Estimate.EffectiveSamples is Kish's (Σw)²/Σw² of the main track,
// Estimate.MaxWeightShare its largest weight over Σw, and every track
// reports both plus ParetoK: the generalized Pareto shape fitted to the
// largest min(N/5, 3√N, 2,047) weights of the buffer (Zhang & Stephens 2009,
// Technometrics 51:316-325, with the prior of Pareto smoothed importance
// sampling, Vehtari, Simpson, Gelman, Yao & Gabry 2015/2024). k̂ > 0.7 adds
// a warning: the weights are heavy-tailed and the interval may be too
// narrow. Weights of a discrete network take few distinct values, which
// the fit treats as a continuous tail; it warns on some easy problems
// (k̂ = 0.96 at an effective sample size of 37% on the shipped example).
//
// # Stopping rules
//
// Stop.AbsErr and Stop.RelErr look at every target state (rare states by
// their ratio interval) and at P(evidence). Options.EpsDelta adds the (ε, δ)
// rule of Dagum, Karp, Luby & Ross (SIAM J. Comput. 29(5):1484-1496, 2000)
// on P(evidence) and on every rare track's joint probability: the weights
// divided by their bound lie in [0, 1], and the run stops once each track's
// scaled sum reaches Υ1 = 1 + (1+ε)·4(e−2)ln(2/δ)/ε² (the exact sample is
// found by drawing the crossing block again from its stream); then
// μ̂ = Υ1·bound/N is within a factor 1 ± ε of the truth with probability at
// least 1 − δ. Result.EpsDelta reports the intervals, and its notes say
// when the rule cannot hold: a weight bound that overflows, an impossible
// state, or a bound so far above the estimate that the rule needs more
// samples than the run may draw (Υ1·bound/μ̂ of them).
package adaptive
