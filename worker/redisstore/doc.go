// Package redisstore is the Redis backend of jobs.Store: models, job
// records, the work queue with block leases, per-block statistics and
// change notifications in one Redis server or one Redis Cluster, shared by
// any number of API and worker processes.
//
// # Keys
//
// Every name starts with the key prefix P (Options.KeyPrefix, "beliefd" by
// default). Keys fall into three kinds of hash slot: the keys of one job
// share the hash tag {job:ID}, the keys of one model share {model:NAME},
// and the indexes that span jobs, tenants or models share {global}. T is a
// tenant ("" for the open tenant).
//
//	key                          type    contents                                   lifetime
//	P:{model:NAME}               hash    version (latest), hash (of latest), tok   until DeleteModel
//	P:{model:NAME}:info          hash    version -> ModelInfo JSON (version 0)      until DeleteModel
//	P:{model:NAME}:doc           hash    version -> model document                  until DeleteModel
//	P:{job:ID}                   hash    data (Job JSON), state, rev, tok, ctok,    unfinished: kept;
//	                                     seq, tenant, prio, ret                     finished: Retention
//	P:{job:ID}:next              string  next block never handed out                as the record
//	P:{job:ID}:leases            zset    block -> lease expiry (server ms)          as the record
//	P:{job:ID}:holders           hash    block -> worker holding the lease          as the record
//	P:{job:ID}:stats             hash    block -> committed statistics (JSON)       as the record; DropBlocks
//	P:{global}:models            zset    model names, score 0 (lexical order)       until DeleteModel
//	P:{global}:modelputs         hash    name -> mark of a PutModel in progress     for the call
//	P:{global}:seq               string  creation counter                           permanent
//	P:{global}:jobs              zset    job ID -> creation seq (every tenant)      until the record expires
//	P:{global}:meta              hash    job ID -> "REV\nSHA\nT": record revision   until the record expires
//	                                     the indexes reflect, idempotency key hash
//	P:{global}:creating          hash    job ID -> "TOKEN\nMS\nSEQ"                 for the call (CreateJob)
//	P:{global}:queued, :running  set     queued / running job IDs (every tenant)    while queued / running
//	P:{global}:expiring          zset    finished job ID -> expiry (server ms)      until the record expires
//	P:{global}:active            set     tenants with unfinished jobs               while they have some
//	P:{global}:t:T:jobs          zset    job ID -> creation seq (ListJobs of T)     until the record expires
//	P:{global}:t:T:queued        set     T's queued job IDs (quota, UnfinishedOf)   while queued
//	P:{global}:t:T:running       set     T's running job IDs                        while running
//	P:{global}:t:T:claimable     zset    T's unfinished job ID ->                   until the job finishes
//	                                     (2-priority)*2^50+seq
//	P:{global}:t:T:idem:SHA256   string  job ID of T's idempotency key              as the record
//	P:{global}:sweep             string  whose turn it is to sweep                  about Options.SweepEvery
//	channel P:notify:TOPIC       pub/sub change signals of a job ID or "queue"     -
//
// "As the record": when a job reaches a terminal state, the record and its
// block keys get the job's Retention as time to live in the script that
// stores the state, and the idempotency key gets it when the indexes
// follow (with Retention <= 0 they are kept). Entries of expired jobs
// leave the indexes through P:{global}:expiring at each sweep, once their
// record is gone, and whenever ListJobs meets one.
//
// Memory, measured with MEMORY USAGE on Redis 7.0 (TestKeyLayout logs
// it, BenchmarkIndexMemory measures the indexes; a record of 7.6 kB JSON with a partial result of
// 20 variables x 3 states; block statistics of 2.1 kB JSON for likelihood
// weighting over those 60 states):
//
//	job record hash              ~1.35 x the record's JSON (10.4 kB here)
//	block statistics             ~1.25 x the statistics' JSON per committed, unmerged
//	                             block (2.6 kB here); the service merges and drops
//	                             them, so at most about LookAhead blocks are kept
//	leases + holders             ~60 bytes per leased block
//	next                         ~100 bytes
//	{global} indexes             ~700 bytes per queued or running job, ~570 bytes per
//	                             finished job kept (over 2,000 jobs of 4 tenants,
//	                             half with an idempotency key)
//
// # Atomicity
//
// Each operation is one Lua script (EVALSHA, falling back to EVAL after a
// restart empties the script cache), a read, or a few scripts in a fixed
// order (next section). Every script touches the keys of one hash slot.
//
//   - ClaimBlock picks, in one script, the lowest block whose lease ended
//     more than SkewMargin ago (by the Redis server's TIME, never the
//     client's clock) and that has no statistics, else the next new block
//     if below the limit, and records expiry and holder.
//   - ExtendLease, CommitBlock and ReleaseBlock check the holder and the
//     expiry (plus SkewMargin, so holder and claimers never overlap) in the
//     same script that changes the lease. CommitBlock keeps the first
//     statistics of a block (a second commit succeeds and changes nothing).
//   - UpdateJob reads the record and its revision, applies fn in the
//     client, and stores the result with a compare-and-swap script; on a
//     conflict it reads again, a bounded number of times (then
//     jobs.ErrConflict).
//   - The checks of CreateJob (idempotency key of the tenant, the tenant's
//     quota, the cap on unfinished jobs) and the reservation they guard are
//     one script on {global}, so racing creations cannot overshoot a quota
//     or both take one key.
//
// Scripts that write carry a random token stored with what they write, so
// that a script retried by the client after a lost reply recognises its own
// write instead of applying it twice.
//
// # Steps across slots
//
// A job's record lives in {job:ID}, the indexes that count, list and queue
// it in {global}; a model's versions live in {model:NAME}, its name in
// {global}. Calls that change both take steps, each one script on one
// slot, in an order chosen so that a process that dies between two steps
// leaves a state the other processes tolerate and a later sweep (Sweep,
// run by every Store about every Options.SweepEvery, one process at a
// time) completes or undoes:
//
//   - CreateJob: (1) reserve on {global}: check and enter the job in the
//     indexes, and record the creation in P:{global}:creating with the
//     server time of the reservation; (2) write the record on {job:ID},
//     refused when more than the write window (5s) has passed since the
//     reservation; (3) end the creation. Between (1) and (2) the job is
//     listed and counted without a record: readers skip it (GetJob says
//     not found, RunOnce moves on), and a second submission with the same
//     idempotency key waits for it. The sweep settles a creation only once
//     the window plus twice the skew margin has passed on the {global}
//     node's clock: by then no write of the record can succeed any more
//     (nodes' clocks disagree by less than the skew margin), so the record
//     it reads is final: present, the creation is completed; absent, the
//     reservation is undone (quota, listing, queue and idempotency key
//     freed). A creator whose write comes too late is told so and undoes
//     its own reservation.
//   - UpdateJob: (1) compare-and-swap the record, which also sets or
//     clears the time to live of the job's keys; (2) when the state or
//     priority changed, bring the indexes in line (syncJob) from the
//     record's new revision: move the job between the queued and running
//     sets, take a finished job out of the queue and its tenant's count
//     (set membership: removing twice frees one place), list it as
//     expiring. P:{global}:meta remembers the revision the indexes
//     reflect, and a sync of an older revision is ignored, so syncs may
//     arrive in any order or twice. Between (1) and (2) a finished job
//     still counts and is still listed as claimable; workers read the
//     record, see that it is finished and move on. The sweep reads the
//     record of every job the indexes count as queued or running and
//     syncs those whose revision is ahead, and forgets those whose record
//     is gone (unless a creation of it is in progress).
//   - PutModel: (1) mark the put in progress on {global}; (2) store the
//     version on {model:NAME}; (3) list the name and end the mark. The
//     sweep lists a stored model whose mark is older than the grace
//     period and drops marks of puts that stored nothing.
//   - DeleteModel: (1) delete the versions; (2) take the name out of the
//     index, then look at the model again and list the name again if a
//     put stored a version meanwhile (a put lists after it stores, so
//     one of the two sees the other). The sweep drops listed names
//     without a model the same way.
//
// Every repair is idempotent and harmless beside the calls it repairs,
// so any number of processes may sweep. Until a repair, what a crash can
// cost is a place in a quota or in the queue cap held for up to one sweep
// interval plus the grace period, a finished job offered to workers who
// skip it, or a model missing from the list; never a job that has a
// record but cannot be found, run or counted.
//
// # Redis Cluster
//
// Options.Cluster (or NewWithClient with a *redis.ClusterClient) runs the
// Store on a Redis Cluster: every script keeps to one slot, so it runs on
// the node that serves that slot, and per-job traffic (claims, leases,
// commits, statistics, record reads and writes: nearly all of it) spreads
// over the nodes with the jobs. The {global} slot takes a few scripts per
// job (creation, start, finish), the claimable listing that idle workers
// read, and the sweep. Scripts on {global} declare one key of the slot and
// name the tenant-dependent keys from the prefix in ARGV, which Redis
// Cluster allows for keys of the declared slot. On a cluster the skew
// margin also bounds how far the nodes' clocks may disagree.
//
// # Notifications
//
// Notify publishes on P:notify:TOPIC. All subscriptions of a Store share one
// pub/sub connection read by one goroutine; each subscriber has a one-slot
// channel, so signals coalesce. When that connection breaks, every
// subscriber is signalled (changes may have been missed) and signalled
// again once it is back; subscribers re-read the record and poll anyway.
// On a cluster a message published on any node reaches subscribers on
// every node (classic pub/sub is broadcast over the cluster bus), so the
// subscription connection may be to any node.
//
// # Failures
//
// Calls that cannot reach Redis fail within the short dial, read and write
// timeouts (1s by default) with an error wrapping jobs.ErrUnavailable; the
// client reconnects by itself with backoff, so a Store keeps working after
// Redis restarts. Without persistence (appendonly) a restart loses every
// job and model.
//
// # Standing queries
//
// StandingStore (standing.go) keeps standing queries (service/standing)
// with its own connection and the same key prefix P. The keys of one
// standing query share the hash tag {sq:T:ID}, T being the tenant in
// unpadded base64url ("" for the open tenant):
//
//	key                        type    contents                                   lifetime
//	P:{sq:T:ID}                hash    meta (key, spec, interval, created_at      until Delete
//	                                   JSON), interval_ms, ev (evidence JSON),
//	                                   rev, ev_at, res (latest result outcome
//	                                   JSON), res_rev, res_ms, fail (latest
//	                                   failure JSON), fail_rev, fail_ms
//	P:{sq:T:ID}:lease          string  owner of the recompute lease               PX lease time
//	P:{global}:standing        zset    T:ID -> creation time (ms), for List       until Delete
//	P:{global}:standing:last   string  last index score given out                 permanent
//
// Each operation on one standing query is one script on its own hash tag:
// SetEvidence is a compare-and-swap on rev; Claim checks that the record
// is due (no outcome answers rev, or the latest is interval_ms old by the
// caller's clock) and takes the lease with SET NX PX in the same script;
// Complete keeps an outcome only when its revision (then its time) is
// newer than the kept one and releases the caller's lease. Create adds
// the index entry (checking the cap on their number) before the record,
// and Delete removes the record before the entry, each in two steps, so
// nothing spans two hash slots and the layout works on Redis Cluster; List
// skips entries without a record and removes those older than a minute.
// A standing query with 4 targets (11 states) and an exact result takes
// about 2.7 kB (MEMORY USAGE on Redis 7.0; the result JSON is 1.6 kB).
package redisstore
