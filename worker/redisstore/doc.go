// Package redisstore is the Redis backend of jobs.Store: models, job
// records, the work queue with block leases, per-block statistics and
// change notifications in one Redis server, shared by any number of API
// and worker processes.
//
// # Keys
//
// Every name starts with the key prefix P (Options.KeyPrefix, "beliefd" by
// default). The keys of one job share the hash tag {job:ID}, the keys of
// one model share {model:NAME}, and the indexes that span jobs or models
// share {global}.
//
//	key                        type    contents                                   lifetime
//	P:{model:NAME}             hash    version (latest), hash (of latest), tok   until DeleteModel
//	P:{model:NAME}:info        hash    version -> ModelInfo JSON (version 0)      until DeleteModel
//	P:{model:NAME}:doc         hash    version -> model document                  until DeleteModel
//	P:{global}:models          zset    model names, score 0 (lexical order)       permanent
//	P:{job:ID}                 hash    data (Job JSON), state, rev, tok, seq,     unfinished: kept;
//	                                   idem (name of the idempotency key)         finished: Retention
//	P:{job:ID}:next            string  next block never handed out                as the record
//	P:{job:ID}:leases          zset    block -> lease expiry (server ms)          as the record
//	P:{job:ID}:holders         hash    block -> worker holding the lease          as the record
//	P:{job:ID}:stats           hash    block -> committed statistics (JSON)       as the record; DropBlocks
//	P:{global}:idem:SHA256     string  job ID of an idempotency key               as the record
//	P:{global}:seq             string  creation counter                           permanent
//	P:{global}:jobs            zset    job ID -> creation seq (ListJobs)          until the record expires
//	P:{global}:claimable       zset    unfinished job ID -> (2-priority)*2^50+seq until the job finishes
//	P:{global}:queued          set     queued job IDs                             while queued
//	P:{global}:running         set     running job IDs                            while running
//	P:{global}:expiring        zset    finished job ID -> expiry (server ms)      until the record expires
//	channel P:notify:TOPIC     pub/sub change signals of a job ID or "queue"  -
//
// "As the record": when a job reaches a terminal state, the record, its
// block keys and its idempotency key all get the job's Retention as time
// to live, in the same script (with Retention <= 0 they are kept). Entries
// of expired jobs leave P:{global}:jobs through P:{global}:expiring, a
// few at each CreateJob, and whenever ListJobs meets one.
//
// Memory per job, measured with MEMORY USAGE on Redis 7.0 (a record of
// 7.6 kB JSON with a partial result of 20 variables x 3 states; block
// statistics of 2.1 kB JSON for likelihood weighting over those 60 states):
//
//	job record hash              ~1.35 x the record's JSON (10.4 kB here)
//	block statistics             ~1.25 x the statistics' JSON per committed, unmerged
//	                             block (2.6 kB here); the service merges and drops
//	                             them, so at most about LookAhead blocks are kept
//	leases + holders             ~60 bytes per leased block
//	next, idempotency key        ~100 and ~180 bytes
//	{global} index entries       ~100 bytes per index the job is in (2 to 3)
//
// # Atomicity
//
// Each operation is one Lua script (EVALSHA, falling back to EVAL after a
// restart empties the script cache) or one read:
//
//   - ClaimBlock picks, in one script, the lowest block whose lease ended
//     more than SkewMargin ago (by the Redis server's TIME, never the
//     client's clock) and that has no statistics, else the next new block
//     if below the limit, and records expiry and holder.
//   - ExtendLease, CommitBlock and ReleaseBlock check the holder and the
//     expiry (plus SkewMargin, so holder and claimers never overlap) in the
//     same script that changes the lease. CommitBlock keeps the first
//     statistics of a block (a second commit succeeds and changes nothing).
//   - CreateJob checks the idempotency key and the cap on unfinished jobs,
//     stores the record and indexes it in one script.
//   - UpdateJob reads the record and its revision, applies fn in the
//     client, and stores the result with a compare-and-swap script that
//     also moves the job between the queue indexes and sets expiries; on a
//     conflict it reads again, a bounded number of times (then
//     jobs.ErrConflict).
//
// Scripts that write carry a random token stored with what they write, so
// that a script retried by the client after a lost reply recognises its own
// write instead of applying it twice.
//
// # Redis Cluster
//
// The hash tags keep every per-job operation (claims, leases, commits,
// statistics, reads) and every per-model read in one slot. CreateJob,
// UpdateJob and PutModel also touch {global} and so need every key on one
// server, as a standalone Redis or a Sentinel-managed primary provides;
// New takes a redis:// URL of one server.
//
// # Notifications
//
// Notify publishes on P:notify:TOPIC. All subscriptions of a Store share one
// pub/sub connection read by one goroutine; each subscriber has a one-slot
// channel, so signals coalesce. When that connection breaks, every
// subscriber is signalled (changes may have been missed) and signalled
// again once it is back; subscribers re-read the record and poll anyway.
//
// # Failures
//
// Calls that cannot reach Redis fail within the short dial, read and write
// timeouts (1s by default) with an error wrapping jobs.ErrUnavailable; the
// client reconnects by itself with backoff, so a Store keeps working after
// Redis restarts. Without persistence (appendonly) a restart loses every
// job and model.
package redisstore
