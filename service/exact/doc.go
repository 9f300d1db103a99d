// Package exact computes exact posterior marginals, the probability of the
// evidence, and most probable explanations on compiled beliefd networks
// with a junction tree.
//
// # Algorithm
//
// Compile moralises the network (each variable joined to its parents, and
// the parents of each variable to one another) and eliminates the moral
// graph greedily by weighted min-fill: each step removes the variable whose
// elimination adds the fill edges of least total weight, an edge {x, y}
// weighing states(x)*states(y); ties go to the variable whose elimination
// clique has the smaller state space, then to the lower variable index, so
// the structure is deterministic. Fill weights are updated incrementally, so
// ordering a sparse network of thousands of variables takes milliseconds.
// The elimination cliques that are maximal, joined along the elimination
// tree, form the junction tree (a forest when the network is disconnected).
// Every conditional probability table is multiplied into the clique of its
// family's first-eliminated member, giving evidence-free clique tables that
// are computed once and copied at the start of every query. None of this
// depends on evidence, so one Engine serves any number of queries.
//
// A query enters hard evidence by zeroing the other states, and soft
// evidence (a likelihood vector) by multiplying it in, each in the smallest
// clique holding the variable. Posterior then runs two passes with
// division by separator potentials (Jensen, Lauritzen & Olesen 1990,
// Computational Statistics Quarterly 4): collect sends separator marginals from the leaves to
// the root; distribute sends the root's beliefs back, dividing out what each
// clique sent (0/0 = 0). The distribute pass visits only the cliques on the
// paths to the targets' cliques. The parent side of each message goes
// through a precomputed index map (while those maps fit in about the
// tables' own memory). MPE runs collect with max in place of sum
// and then traces the maximising states back from the root.
//
// # Scaling
//
// Evidence-free clique tables are scaled to a largest entry of 1, soft
// likelihoods are divided by their largest entry, every collect message is
// divided by its sum, a clique table whose largest entry falls below 1e-150
// while messages are multiplied in is scaled back up, and distribute
// messages are normalised. The logs of all these factors are added up, so
// P(evidence) is accumulated in log space: evidence of probability 1e-600
// is reported as LogEvidence = -1381.55 without underflow, and a clique
// with thousands of neighbours does not underflow either. Evidence of
// probability zero shows up as a table or message that sums to zero and is
// reported as ErrZeroEvidence, never as NaN. MPE scores the assignment it
// finds on the original tables, so LogProb is exact.
//
// # Cost
//
// EstimateCost runs the same triangulation without allocating tables and
// reports the clique count, the treewidth and the table entries the
// junction tree needs. Compile refuses networks whose tables would exceed
// Options.MaxEntries (DefaultMaxEntries by default) with a *TooCostlyError
// that wraps ErrTooCostly and carries the estimate; approximate inference by
// sampling is the way to query such networks. Each query works on its own
// copy of the tables, taken from a sync.Pool, so an Engine is safe for
// concurrent use and steady-state queries allocate only their result
// (nothing at all with PosteriorInto).
//
// # API
//
//	eng, err := exact.Compile(net, exact.Options{})
//	post, err := eng.Posterior(ev, targets) // post.Marginals[i] is over targets[i]
//	mpe, err := eng.MPE(ev)                 // mpe.Assignment, mpe.LogProb
//	cost := exact.EstimateCost(net)         // before compiling, no tables
//
// Evidence is a *model.Evidence (nil for none) and targets are variable
// indices into net.Vars (see model.Network.ResolveEvidence and
// ResolveTargets to build both from names).
package exact
