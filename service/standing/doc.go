// Package standing keeps standing queries: questions a monitoring system
// registers once and beliefd answers again whenever their evidence changes
// and on an interval, so that the latest posteriors can be exported as
// Prometheus gauges and alerted on ("P(bad_deploy = yes | alarms) > 0.8").
//
// # Model
//
// A standing query is registered with a Spec: an ID chosen by the caller
// (alert rules name it), a model reference ("NAME" follows the latest
// version, "NAME@VERSION" pins one), the target variables, a method and
// stopping rule as in a query document, an optional seed, the recompute
// interval and the initial hard evidence. Its evidence then changes by
// Updates that set, change and clear individual items (or replace them
// all); each change that alters the evidence increases the evidence
// revision by one. An update that leaves the evidence as it was keeps the
// revision, so an alarm source that repeats itself causes no work.
//
// Each recompute runs the query with the evidence of one revision and
// records an Outcome carrying that revision: a result document (the same
// shape as a job's, so every posterior has its interval, exact answers
// lo == hi == p, sampled ones their samples and effective samples) or the
// error that stopped it. An outcome is kept only when it answers a
// revision at least as new as the kept one (for the same revision, only
// when it finished later), so a slow, late computation never overwrites a
// newer answer.
//
// # Sharing one store
//
// Everything lives in the Store: registrations, evidence with its
// revision, the latest result and failure, and a recompute lease. Any
// number of processes may run a Service over one store; each serves every
// standing query and exports every gauge. A process that sees a standing
// query whose latest outcome answers an older revision, or is older than
// its interval, asks the store for the recompute lease; the store grants
// it only while the need still holds and no other holder has it, so one
// revision is computed once, by one process. A process that stops while
// holding a lease leaves it to expire (Config.LeaseTime) and another takes
// over.
//
// # Tenants
//
// Standing queries belong to the tenant of the caller's principal
// (jobs.PrincipalFrom): IDs are unique within a tenant, a tenant sees and
// changes only its own, and another tenant's standing query is reported
// as not found. An admin lists every tenant's and may address another
// tenant's by WithTenant. Recomputes run as the owning tenant.
//
// # Bounds
//
// The number of standing queries is capped (Config.MaxQueries, across all
// tenants), each names at most MaxTargets targets with at most
// Config.MaxSeries states among them, so the exported gauges have a known
// upper bound on their series.
package standing
