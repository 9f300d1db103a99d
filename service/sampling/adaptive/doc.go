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
//     of P; the interval accounts for the samples such floors may waste
//     (the largest floored mass of a row, summed over variables). A row
//     none of whose possible states has support is left out of that sum:
//     whatever it draws the weight is 0, and the chance of reaching it is
//     either visible in the samples or comes from floors of the parents'
//     rows, which are counted. (Counting it made the lower end of the
//     interval of P(site_power = lost) on the shipped example 0, so a
//     relative precision rule could never stop.)
//  3. Learning (AIS-BN, Cheng & Druzdzel 2000, JAIR 13:155-188): stages
//     of LearnSamples (512) samples, doubling from stage to stage (at most
//     65,536, at most LearnStages = 8 stages); after each, every table row
//     visited at least 8 times moves towards the weighted frequencies of
//     its states, Q ← Q + η(k)(Q̂ − Q), η(k) = 0.4·(0.14/0.4)^(k/(K-1))
//     (the AIS-BN schedule, constants from memory). With η = 1 this is the
//     cross-entropy update for rare events (Rubinstein 1997; Rubinstein &
//     Kroese 2004): weighted maximum likelihood of the tables, so the two
//     methods coincide here. Each learned row is mixed with 20% of the
//     propagation row (a defensive mixture, Hesterberg 1995, Technometrics
//     37:185-194): learning from a few heavy weights can collapse a row onto
//     one mode; the mixture keeps the others reachable, so a missed mode
//     shows up as heavy-tailed weights (see Diagnostics) instead of a
//     silently wrong answer.
//  4. When to stop learning: after 4 stages (7,680 samples) learning goes
//     on only while it pays. It stops when a stage's effective sample
//     ratio (Kish's ESS over the stage's samples) is less than 5% better
//     than the previous stage's (the function has stopped improving),
//     judged on the main track only on a stage of at least 100 effective
//     samples (a ratio from a dozen effective samples is noise, and the
//     next stage is twice as large: with ten alarms observed on a random
//     network, stages of 2,048 samples held about 12 effective samples,
//     learning stopped after 4 stages at 0.6% effective samples and went
//     on to 8 stages and 1.2% with this rule; the squared error at equal
//     time went from 1.0e-5 (9 times below likelihood weighting's, 3
//     repetitions) to 3.5e-6 (13 times, 10 repetitions); on
//     rare-state tracks, which have no budget, it made rare top events
//     take 1.5 times the samples, so they stop on any plateau), or
//     when the next stage would take the learning samples of the main
//     track past LearnShare (5%) of the samples the run is expected to
//     need: the sample cap, or, under a precision rule, the samples that
//     the stopping rule needs at that effective sample ratio (a proportion
//     p needs about z²p(1-p)/(ρ·abs_err²), or z²(1-p)/(p·ρ·rel_err²), and
//     P(evidence) z²(1/ρ-1)/rel_err²), judged by the lower ratio of the
//     last two stages because a few thousand heavy-tailed weights look
//     better than they are. The budget is counted in samples, never in
//     time, so that learning stays deterministic.
//  5. The initial block: at the end of learning, every track draws as many
//     samples as its last stage (the main track at least PilotSamples when
//     rare states are to be found) from its final, frozen function. The
//     main track's initial block is the pilot that picks the rare states.
//     These samples come from the same function as every later block, so
//     the estimate uses them: merged statistics start from them.
//
// A stage is cut into chunks of 1,024 samples; chunk c of stage l of track
// i draws from NewStream(seed, 1<<63 | i<<40 | l<<24 | c), the chunks run on
// the workers and are added in chunk order. So learning depends on the
// seed and the query only, not on the number of workers: the same seed
// gives the same importance functions in every process, and a worker that
// rebuilds the sampler gets the same bits.
//
// # The sampling loop
//
// A draw visits only what matters: variables that are neither targets,
// observed, nor ancestors of one are barren (Shachter 1986, Operations
// Research 34:871-882) and are not drawn at all, and an observed variable
// whose parents are all observed contributes the same factor to every
// weight, which is folded into a constant. The importance table of a
// track is one flat array with each row's cumulative probabilities next
// to the factors P(x|row)/Q(x|row) (times the soft likelihood), so a step
// reads one or two cache lines; rows of up to four states pick their
// state without branches; the weight is kept in range by a single test
// on its exponent. Measured on the random networks below (thread CPU time
// per sample, one block of 8,192, side by side): likelihood weighting
// 373-410 ns, this sampler 435-546 ns (1.1-1.3 times); before these
// steps the same comparison in wall time gave 1.3-1.7 times.
//
// # Why these steps (measured)
//
// cmd/beliefd-bench compares propagation alone with propagation plus
// learning on generated failure-propagation networks of about 220
// variables (testnets.FaultTree), 30 seeds each (-seeds 30). Learning
// pays: on unlikely evidence (P(evidence) = 6.6e-7, 3.5e-7, 1.9e-12) a 10%
// relative half-width took 2.0e4, 2.0e4 and 2.8e4 samples (median,
// learning included) against 9.1e4, 1.5e5 and 2.4e5 with propagation
// alone, whose runs all carried heavy-tail warnings; on rare top events
// (P = 1.05e-6, 7e-9, 1.3e-6) 6.5e4, 6.5e4 and 1.4e5 against 1.2e5, 3.0e6
// (reached in 1 run of 30) and 1.3e6. Likelihood weighting needs 3e8 to
// 1.6e12 (from its exact variance). The 95% intervals covered the exact
// value in 27 to 28 runs of 30 in every case.
//
// The learning schedule is the result of measuring others. The earlier
// fixed schedule (4 stages of 2,048 samples and a scale round, none of
// them used by the estimate) took 1.8e4, 1.8e4 and 3.1e4 samples on the
// evidence cases, 4.1e4, 5.1e7 (extrapolated: the 7e-9 event never
// reached the precision within 2e6 samples) and 1.9e5 on the top events,
// and spent 40-57% of the wall time of the short runs learning. Growing
// stages let a hard track learn longer (the 7e-9 event: 6.5e4 samples,
// all 30 runs reaching the precision). Stopping as early as a single
// stage, on the budget and plateau rules alone, made half the runs of the
// 3.5e-7 evidence take 7.6e4-1.3e5 samples instead of 1.3e4: the
// effective sample ratio of a thousand heavy-tailed weights is too
// optimistic to judge by. Three stages at least kept the
// runs short but the intervals of the 1.9e-12 evidence covered only 24 of
// 30 (50 of 60 in a longer check); four stages at least brought that to
// 28 of 30 (55 of 60). So a run that reaches 10% within one block spends
// 30-55% of its wall time learning (propagation, 7,680 learning samples,
// a second track's learning for a rare top event), and under 1% of a run
// of two seconds. Learning is on by default; LearnStages < 0 turns it
// off. README.md ("Rare events") has the tables.
//
// At equal wall time (2 s each, 10 repetitions, -parts mse -seeds 20)
// on random networks of 40 variables with 2-4 states, with two evidence
// placements, each observed variable in its least likely state:
//
//   - "alarms": 10 childless effects of causes anywhere in the network
//     (testnets.RandomOptions.Leaves), spread over the leaves, P(evidence)
//     2e-9 to 4e-8. Likelihood weighting keeps 0.001-0.08% effective
//     samples; the mean squared error of the posterior marginals is 13,
//     51, 133 and 2,600 times below likelihood weighting's (this
//     sampler: 1.2-16% effective samples). The 10-fold target holds on
//     all four.
//   - "chain": the last 12 variables in topological order, P(evidence)
//     3e-13 to 3e-8: 26, 4.9, 2.0 and 1.9 times (before the changes of
//     the sampling loop and of learning above: 32-36, 2.8-3.0, 1.2-1.7
//     and 0.8-0.9). The target holds on one network of four, and no
//     importance sampler can reach it on the others: independent draws
//     from the exact posterior at likelihood weighting's speed would be
//     48, 12, 3.3 and 4.1 times better (the "ceiling" column: likelihood
//     weighting's MSE times its samples over the mean of p(1-p)),
//     because likelihood weighting keeps 26-31% effective samples on two
//     of the networks (the evidence is unlikely mostly through observed
//     variables whose parents are observed too, which costs it nothing).
//
// This sampler stays well below the ceiling where the observed
// variables' parents are hidden (alarms: 13 of a ceiling of 3,200 on the
// hardest network, 1.2% effective samples): its function has the
// network's structure, which cannot express the dependence the evidence
// creates among the parents of an observed variable (explaining away),
// and it draws 0.3-1.0 times as many samples per second as likelihood
// weighting (0.3-0.8 on the alarm networks).
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
// to target states whose pilot estimate (the main track's initial block,
// at least PilotSamples from the learned main function) is below
// RareThreshold (1e-3), smallest first, up to MaxTracks tracks (8) in all.
//
// # Blocks and determinism
//
// After learning the functions are frozen and sampled in numbered blocks
// exactly like likelihood weighting: block k of track 0 draws from
// NewStream(seed, k), block k of track i from NewStream(seed, 1<<62 | i<<50 |
// k), the initial block of track i from NewStream(seed, 3<<62 | i). Each
// block gives, per track, sampling.Stats (sums of w and w², and for the
// main track per target state) plus the TopWeights (2,048) largest
// weights; sums merge by addition and the buffers by keeping the largest
// of both, merged in block order onto the initial block, so the same seed
// gives bit-identical results with any number of goroutines or processes.
// Stop.MaxSamples counts the draws of all tracks, initial block included
// (each track draws an equal share; Remaining is what the blocks draw);
// the samples of the learning stages, which the estimate does not use,
// are reported in Result.Learning. Stored weights are divided by a power
// of two near the learned estimate, so P(evidence) of 1e-200 neither
// underflows in Σw² nor loses precision.
//
// The job service (service/jobs) runs the same blocks on many workers: a
// worker process learns the functions when it first needs them (NewSampler
// depends on the query, the model and the seed only) and keeps them with
// the job's plan; RunBlock, MergeBlock, StopReason and Summarize do the
// rest, so a job's answer is the bits of Run with the same seed.
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
//     sample size n* = p(1-p)/var of that proportion, at most Kish's
//     effective sample size of the whole sample. The cap matters for a
//     rare state that the importance function over-samples (the ε-cutoff
//     keeps Q(tub | asia) at 0.006 where P(tub | asia, dysp, no xray) =
//     0.0022 in the chest-clinic network): its few dozen hits carry light
//     weights, so their own variance claims more information than the
//     sample holds. Without the cap its 95% intervals covered in 177 to
//     182 of 200 runs of 20,000 samples (about 90%); with it, 190.
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
