// Package jobs is the domain of beliefd's job service: job records and their
// states, the work plan of a job (numbered blocks of samples, or one unit for
// exact inference and Gibbs sampling), the merging of block statistics in
// block order, stopping decisions on merged prefixes, and the Store
// interface that the memory and Redis backends implement.
//
// # Life of a job
//
// Service.Submit resolves the query against its model (evidence, targets,
// stopping rule, method; "auto" becomes exact inference when the junction
// tree fits, adaptive importance sampling when a pilot finds the evidence
// unlikely or a target state rare, likelihood weighting otherwise), draws
// a seed when none is given and stores the job as queued. Forward,
// rejection, likelihood-weighting and adaptive importance sampling jobs are
// cut into Blocks blocks of sampling.DefaultBlockSize samples (the last may
// be shorter): block k draws from the random stream (seed, k) only. An
// adaptive job's importance functions are learned once in each worker
// process that runs its blocks, deterministically from the seed, and kept
// with the job's plan (merge.go, adaptivePlan); the job record holds only
// the merged statistics. Exact and Gibbs jobs are one unit, block 0, run by
// infer.Runner.
//
// Workers call Service.RunOnce. It claims a block of a claimable job
// (tenants take turns by fair share, fair.go; within a tenant higher
// priority first, then older) under a lease of Config.LeaseTime,
// never more than Config.LookAhead blocks beyond the merged prefix. The
// first claim moves the job to running and sets its deadline (the query's
// stop.timeout capped by Config.MaxJobTime, counted from then). While the
// block runs, the worker renews the lease every LeaseTime/3 and looks at the
// job every 250ms; it gives the unit up when the lease is lost, the job was
// cancelled or finished, or the deadline passed. A finished block's
// statistics (sampling.Stats as JSON) are committed under the lease: a
// worker that lost its lease commits nothing, and a block committed twice
// keeps its first statistics.
//
// After a commit the worker merges: it reads the committed statistics from
// the merged prefix on and, inside Store.UpdateJob, adds them to Job.Merged
// strictly in block order, checking the stopping rule after every block as
// sampling.Run does. The update works from the stored record only, so any
// number of workers in any number of processes may merge at once; the
// result is the same bits as `beliefd run` with the same query and seed. A
// partial result is written at most every Config.PartialEvery, the final
// one when a rule holds (or the deadline passes: stop reason "timeout").
// Single units commit their outcome (result or error) the same way and
// then record it in the job.
//
// When a worker's context ends (shutdown) its unit stops and is handed
// back with Store.ReleaseBlock, so another worker takes it at once.
package jobs
