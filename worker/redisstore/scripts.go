package redisstore

import "github.com/redis/go-redis/v9"

// The Lua scripts below run atomically on the server (EVALSHA, falling back
// to EVAL after a restart empties the script cache). Each script touches
// the keys of ONE hash slot, so that every script runs on Redis Cluster:
// a job's keys ({job:ID}), a model's keys ({model:NAME}), or the indexes
// ({global}). Scripts on a job or model pass every key in KEYS. Scripts on
// {global} declare one key of it, P:{global}:meta, which routes them, and
// name the others from the prefix P:{global} in ARGV[1], since which
// tenant's indexes they touch depends on the data; Redis Cluster accepts
// undeclared keys of the declared slot. Times are read from the server's
// clock (TIME) so that workers whose clocks disagree share one notion of
// lease expiry.

// luaNow is prepended to scripts that need the server time in milliseconds.
const luaNow = `
local function now_ms()
  local t = redis.call('TIME')
  return tonumber(t[1]) * 1000 + math.floor(tonumber(t[2]) / 1000)
end
local function unfinished(s) return s == 'queued' or s == 'running' end
`

// luaGlobal is prepended to the scripts on {global}: key names (keys.go
// builds the same), the claim order, and the moves of a job between the
// indexes. P:{global}:meta holds, for every job in the indexes, the
// record revision the indexes reflect, the SHA-256 of its idempotency key
// ("" for none) and its tenant: "REV\nSHA\nTENANT".
const luaGlobal = luaNow + `
local G = ARGV[1]
local META, CREATING, JOBS, QUEUED, RUNNING = G .. ':meta', G .. ':creating', G .. ':jobs', G .. ':queued', G .. ':running'
local EXPIRING, ACTIVE, SEQ = G .. ':expiring', G .. ':active', G .. ':seq'
local function tkey(tenant, kind) return G .. ':t:' .. tenant .. ':' .. kind end
local function parse_meta(m) return string.match(m, '^(%d+)\n(%x*)\n(.*)$') end
-- claim_score orders a tenant's claimable jobs: higher priority first,
-- then creation order. Priorities are clamped to 0..2 by the client;
-- seq < 2^50.
local function claim_score(prio, seq) return (2 - prio) * 1125899906842624 + seq end
-- place puts a job in the indexes of its state.
local function place(id, tenant, state, score)
  local tq, tr, tc = tkey(tenant, 'queued'), tkey(tenant, 'running'), tkey(tenant, 'claimable')
  if unfinished(state) then
    redis.call('ZADD', tc, score, id)
    redis.call('SADD', ACTIVE, tenant)
    local add, addt, del, delt = QUEUED, tq, RUNNING, tr
    if state == 'running' then add, addt, del, delt = RUNNING, tr, QUEUED, tq end
    redis.call('SADD', add, id)
    redis.call('SADD', addt, id)
    redis.call('SREM', del, id)
    redis.call('SREM', delt, id)
  else
    redis.call('SREM', QUEUED, id)
    redis.call('SREM', tq, id)
    redis.call('SREM', RUNNING, id)
    redis.call('SREM', tr, id)
    redis.call('ZREM', tc, id)
    if redis.call('ZCARD', tc) == 0 then redis.call('SREM', ACTIVE, tenant) end
  end
end
-- forget removes a job from every index, and its idempotency key if that
-- still names it.
local function forget(id)
  local m = redis.call('HGET', META, id)
  if m then
    local _, sha, tenant = parse_meta(m)
    place(id, tenant, 'gone', 0)
    redis.call('ZREM', tkey(tenant, 'jobs'), id)
    if sha ~= '' then
      local ik = tkey(tenant, 'idem:' .. sha)
      if redis.call('GET', ik) == id then redis.call('DEL', ik) end
    end
  end
  redis.call('HDEL', META, id)
  redis.call('HDEL', CREATING, id)
  redis.call('ZREM', JOBS, id)
  redis.call('SREM', QUEUED, id)
  redis.call('SREM', RUNNING, id)
  redis.call('ZREM', EXPIRING, id)
end
`

// reserveJob is step 1 of CreateJob, on {global}: it honours the tenant's
// idempotency key, checks the tenant's quota and the cap on unfinished
// jobs, and enters the job in the indexes (queued, claimable, listed) as
// a creation in progress (P:{global}:creating ID = "TOKEN\nMS\nSEQ").
// ARGV: G, id, tenant, max, tenant max, priority (0..2), token, idempotency
// key SHA-256 ("" for none).
// Returns {'reserved', seq, reserved at (server ms)}, {'idem', job ID},
// {'quota', n}, {'full', n} or {'taken'} (the ID belongs to another job).
// A retry of a call whose reply was lost finds its own token.
var reserveJobScript = redis.NewScript(luaGlobal + `
local id, tenant, tok, sha = ARGV[2], ARGV[3], ARGV[7], ARGV[8]
local c = redis.call('HGET', CREATING, id)
if c then
  local t, at, seq = string.match(c, '^([^\n]*)\n(%d+)\n(%d+)$')
  if t == tok then return {'reserved', seq, at} end
  return {'taken'}
end
if redis.call('HEXISTS', META, id) == 1 then return {'taken'} end
local ik = nil
if sha ~= '' then
  ik = tkey(tenant, 'idem:' .. sha)
  local other = redis.call('GET', ik)
  if other then return {'idem', other} end
end
local tmax = tonumber(ARGV[5])
if tmax > 0 then
  local n = redis.call('SCARD', tkey(tenant, 'queued')) + redis.call('SCARD', tkey(tenant, 'running'))
  if n >= tmax then return {'quota', tostring(n)} end
end
local max = tonumber(ARGV[4])
if max > 0 then
  local n = redis.call('SCARD', QUEUED) + redis.call('SCARD', RUNNING)
  if n >= max then return {'full', tostring(n)} end
end
local seq = redis.call('INCR', SEQ)
local now = now_ms()
redis.call('ZADD', JOBS, seq, id)
redis.call('ZADD', tkey(tenant, 'jobs'), seq, id)
place(id, tenant, 'queued', claim_score(tonumber(ARGV[6]), seq))
redis.call('HSET', META, id, '1\n' .. sha .. '\n' .. tenant)
redis.call('HSET', CREATING, id, tok .. '\n' .. now .. '\n' .. seq)
if ik then redis.call('SET', ik, id) end
return {'reserved', tostring(seq), tostring(now)}
`)

// writeJob is step 2 of CreateJob, on {job:ID}: it stores the record at
// revision 1, unless the reservation is older than the write window
// (then the sweep may be undoing it: nothing is written).
// KEYS: rec. ARGV: data, token, seq, tenant, reserved at (ms), window
// (ms), priority, retention (ms).
// Returns 'created' (also for a retry whose first try landed), 'stale' or
// 'taken'.
var writeJobScript = redis.NewScript(luaNow + `
local ct = redis.call('HGET', KEYS[1], 'ctok')
if ct then
  if ct == ARGV[2] then return 'created' end
  return 'taken'
end
if redis.call('EXISTS', KEYS[1]) == 1 then return 'taken' end
if now_ms() - tonumber(ARGV[5]) > tonumber(ARGV[6]) then return 'stale' end
redis.call('HSET', KEYS[1], 'data', ARGV[1], 'state', 'queued', 'rev', 1, 'tok', ARGV[2], 'ctok', ARGV[2],
  'seq', ARGV[3], 'tenant', ARGV[4], 'prio', ARGV[7], 'ret', ARGV[8])
return 'created'
`)

// confirmJob is step 3 of CreateJob, on {global}: the record is written,
// the creation is no longer in progress. ARGV: G, id, token.
var confirmJobScript = redis.NewScript(luaGlobal + `
local c = redis.call('HGET', CREATING, ARGV[2])
if c and string.sub(c, 1, #ARGV[3] + 1) == ARGV[3] .. '\n' then redis.call('HDEL', CREATING, ARGV[2]) end
return 1
`)

// forgetJob removes a job whose record is gone from the indexes, on
// {global}. With a token (ARGV[3]), it undoes the reservation of a
// creation of that token and nothing else; without one, it leaves a
// creation in progress alone. An idempotency key named in ARGV[4] is
// deleted too if it names the job (the caller's key, in case the indexes
// no longer know it). Without a token and without 'force' (ARGV[5]) it
// also leaves alone a job whose creation is complete and whose retention
// has not passed: its record exists, and a caller that found none read it
// just before the creation's write landed. ARGV: G, id, token or "",
// idempotency key or "", "force" or "". Returns 'forgotten', 'creating'
// (left alone), 'exists' (left alone) or 'other' (another creation's
// reservation).
var forgetJobScript = redis.NewScript(luaGlobal + `
local c = redis.call('HGET', CREATING, ARGV[2])
if ARGV[3] ~= '' then
  if not c or string.sub(c, 1, #ARGV[3] + 1) ~= ARGV[3] .. '\n' then return 'other' end
elseif c then
  return 'creating'
elseif ARGV[5] ~= 'force' and redis.call('HEXISTS', META, ARGV[2]) == 1 then
  local exp = redis.call('ZSCORE', EXPIRING, ARGV[2])
  if not exp or tonumber(exp) > now_ms() then return 'exists' end
end
forget(ARGV[2])
if ARGV[4] ~= '' and redis.call('GET', ARGV[4]) == ARGV[2] then redis.call('DEL', ARGV[4]) end
return 'forgotten'
`)

// syncJob brings the indexes in line with a record read at revision rev,
// on {global}, unless they already reflect that revision or a later one:
// syncs of one job may arrive in any order. A finished job leaves the
// queue and is listed until its retention has passed (its idempotency key
// expires with it); with retention <= 0 it is kept.
// ARGV: G, id, rev, state, priority (0..2), seq, retention (ms).
// Returns 'ok', 'old' (nothing to do) or 'gone' (not in the indexes).
var syncJobScript = redis.NewScript(luaGlobal + `
local id = ARGV[2]
local m = redis.call('HGET', META, id)
if not m then return 'gone' end
local rev0, sha, tenant = parse_meta(m)
-- The caller read the record: its creation is complete.
redis.call('HDEL', CREATING, id)
if tonumber(ARGV[3]) <= tonumber(rev0) then return 'old' end
redis.call('HSET', META, id, ARGV[3] .. '\n' .. sha .. '\n' .. tenant)
local state = ARGV[4]
place(id, tenant, state, claim_score(tonumber(ARGV[5]), tonumber(ARGV[6])))
local ik = nil
if sha ~= '' then ik = tkey(tenant, 'idem:' .. sha) end
local ret = tonumber(ARGV[7])
if unfinished(state) or ret <= 0 then
  redis.call('ZREM', EXPIRING, id)
  if ik then redis.call('PERSIST', ik) end
elseif redis.call('ZADD', EXPIRING, 'NX', now_ms() + ret, id) == 1 and ik then
  redis.call('PEXPIRE', ik, ret)
end
return 'ok'
`)

// claimableJobs lists, on {global}, the first ARGV[2] jobs (all when 0)
// of each tenant with unfinished jobs, tenants in name order.
// ARGV: G, limit. Returns {tenant, n, id1, score1, ..., idn, scoren, ...}.
var claimableJobsScript = redis.NewScript(luaGlobal + `
local tenants = redis.call('SMEMBERS', ACTIVE)
table.sort(tenants)
local stop = tonumber(ARGV[2]) - 1
local out = {}
for _, t in ipairs(tenants) do
  local zs = redis.call('ZRANGE', tkey(t, 'claimable'), 0, stop, 'WITHSCORES')
  if #zs > 0 then
    out[#out + 1] = t
    out[#out + 1] = tostring(#zs / 2)
    for _, v in ipairs(zs) do out[#out + 1] = v end
  end
end
return out
`)

// sweepState reads, on {global}, the server time and the creations in
// progress. ARGV: G. Returns {now ms, id1, "TOKEN\nMS\nSEQ", ...}.
var sweepStateScript = redis.NewScript(luaGlobal + `
local out = {tostring(now_ms())}
for _, v in ipairs(redis.call('HGETALL', CREATING)) do out[#out + 1] = v end
return out
`)

// updateJob stores a new record if the revision is still the one read
// (compare-and-swap), on {job:ID}; a job reaching a terminal state gets
// its retention as time to live on all its keys, one leaving it is kept
// again. The indexes on {global} follow in a separate step (syncJob).
// KEYS: rec, next, leases, holders, stats.
// ARGV: expected rev, token, data, new state, retention ms, priority (0..2).
// Returns 'ok', 'done' (this call's token is already stored: a retry of a
// write that landed), 'conflict' or 'notfound'.
var updateJobScript = redis.NewScript(luaNow + `
local cur = redis.call('HMGET', KEYS[1], 'rev', 'tok', 'state')
if not cur[1] then return 'notfound' end
if cur[1] ~= ARGV[1] then
  if cur[2] == ARGV[2] then return 'done' end
  return 'conflict'
end
local old, new = cur[3], ARGV[4]
redis.call('HSET', KEYS[1], 'data', ARGV[3], 'state', new, 'rev', tonumber(cur[1]) + 1, 'tok', ARGV[2],
  'ret', ARGV[5], 'prio', ARGV[6])
if unfinished(new) then
  if not unfinished(old) then
    for i = 1, 5 do redis.call('PERSIST', KEYS[i]) end
  end
else
  local ret = tonumber(ARGV[5])
  if unfinished(old) and ret > 0 then
    for i = 1, 5 do redis.call('PEXPIRE', KEYS[i], ret) end
  end
end
return 'ok'
`)

// putModel stores a new version unless the latest one has the same hash,
// on {model:NAME}. KEYS: head, info, doc. ARGV: hash, info JSON, doc,
// token. Returns {version, created (0/1), info JSON}. A retry of a call
// whose reply was lost finds its own token and still reports created.
var putModelScript = redis.NewScript(`
local h = redis.call('HMGET', KEYS[1], 'version', 'hash', 'tok')
if h[1] and h[2] == ARGV[1] then
  local created = 0
  if h[3] == ARGV[4] then created = 1 end
  return {tonumber(h[1]), created, redis.call('HGET', KEYS[2], h[1])}
end
local v = redis.call('HINCRBY', KEYS[1], 'version', 1)
redis.call('HSET', KEYS[1], 'hash', ARGV[1], 'tok', ARGV[4])
redis.call('HSET', KEYS[2], v, ARGV[2])
redis.call('HSET', KEYS[3], v, ARGV[3])
return {v, 1, ARGV[2]}
`)

// listModel enters a model name in the name index, on {global}, and ends
// the put in progress that announced it (if its mark is still the one
// given). ARGV: G, name, mark ("" for none).
// Returns 1 when the name was not listed before, else 0.
var listModelScript = redis.NewScript(luaGlobal + `
local added = redis.call('ZADD', G .. ':models', 0, ARGV[2])
if ARGV[3] ~= '' and redis.call('HGET', G .. ':modelputs', ARGV[2]) == ARGV[3] then
  redis.call('HDEL', G .. ':modelputs', ARGV[2])
end
return added
`)

// dropModelMark ends the put in progress of a model whose versions were
// not stored (the put stopped before), on {global}, if its mark is still
// the one given. ARGV: G, name, mark.
var dropModelMarkScript = redis.NewScript(luaGlobal + `
if redis.call('HGET', G .. ':modelputs', ARGV[2]) == ARGV[3] then
  redis.call('HDEL', G .. ':modelputs', ARGV[2])
end
return 1
`)

// announceModel marks a put of a model in progress, on {global}, so that
// the sweep lists the model if the put stops before it does. ARGV: G,
// name, random text. Returns the mark: the server time in ms and the
// random text.
var announceModelScript = redis.NewScript(luaGlobal + `
local mark = now_ms() .. '-' .. ARGV[3]
redis.call('HSET', G .. ':modelputs', ARGV[2], mark)
return mark
`)

// getModel reads a version (0: the latest).
// KEYS: head, info, doc. ARGV: version, with doc (0/1).
// Returns false when absent, else {version, info JSON, doc or empty}.
var getModelScript = redis.NewScript(`
local v = ARGV[1]
if v == '0' then
  v = redis.call('HGET', KEYS[1], 'version')
  if not v then return false end
end
local info = redis.call('HGET', KEYS[2], v)
if not info then return false end
local doc = ''
if ARGV[2] == '1' then doc = redis.call('HGET', KEYS[3], v) or '' end
return {tonumber(v), info, doc}
`)

// deleteModel removes every version, on {model:NAME}. KEYS: head, info,
// doc. Returns 0 when there was no such model.
var deleteModelScript = redis.NewScript(`
if redis.call('EXISTS', KEYS[1]) == 0 then return 0 end
redis.call('DEL', KEYS[1], KEYS[2], KEYS[3])
return 1
`)

// claimBlock leases a block: the lowest block whose lease expired more
// than the skew margin ago (or was released) and that has no statistics,
// else the next block never handed out if below the limit.
// KEYS: rec, next, leases, holders, stats.
// ARGV: worker, limit, lease ms, skew ms.
// Returns the block, -1 for none now, -2 for no such job.
var claimBlockScript = redis.NewScript(luaNow + `
local state = redis.call('HGET', KEYS[1], 'state')
if not state then return -2 end
if not unfinished(state) then return -1 end
local now = now_ms()
local expiry = now + tonumber(ARGV[3])
local best = -1
for _, b in ipairs(redis.call('ZRANGEBYSCORE', KEYS[3], '-inf', '(' .. (now - tonumber(ARGV[4])))) do
  if redis.call('HEXISTS', KEYS[5], b) == 1 then
    redis.call('ZREM', KEYS[3], b)
    redis.call('HDEL', KEYS[4], b)
  elseif best < 0 or tonumber(b) < best then
    best = tonumber(b)
  end
end
if best < 0 then
  local n = tonumber(redis.call('GET', KEYS[2]) or '0')
  if n >= tonumber(ARGV[2]) then return -1 end
  redis.call('SET', KEYS[2], n + 1)
  best = n
end
redis.call('ZADD', KEYS[3], expiry, best)
redis.call('HSET', KEYS[4], best, ARGV[1])
return best
`)

// luaHeld checks that worker ARGV[2] holds the lease of block ARGV[1]
// (leases in KEYS[lk], holders in KEYS[hk]) and that it ended at most the
// skew margin ARGV[skew] ago: the holder keeps the lease exactly as long as
// nobody else can claim the block (claims need expiry + margin < now).
const luaHeld = `
local function held(lk, hk, skew, now)
  if redis.call('HGET', KEYS[hk], ARGV[1]) ~= ARGV[2] then return false end
  local exp = redis.call('ZSCORE', KEYS[lk], ARGV[1])
  return exp ~= false and tonumber(exp) + tonumber(ARGV[skew]) >= now
end
`

// extendLease pushes a held lease to now+lease.
// KEYS: leases, holders. ARGV: block, worker, skew ms, lease ms.
// Returns 1 or 0 (lost).
var extendLeaseScript = redis.NewScript(luaNow + luaHeld + `
local now = now_ms()
if not held(1, 2, 3, now) then return 0 end
redis.call('ZADD', KEYS[1], 'XX', now + tonumber(ARGV[4]), ARGV[1])
return 1
`)

// commitBlock stores a block's statistics (first write wins) and drops its
// lease. KEYS: rec, leases, holders, stats. ARGV: block, worker, skew ms,
// stats. Returns 1 (stored, or already stored) or 0 (lease lost, nothing
// written).
var commitBlockScript = redis.NewScript(luaNow + luaHeld + `
if redis.call('HEXISTS', KEYS[4], ARGV[1]) == 1 then return 1 end
if not held(2, 3, 3, now_ms()) then return 0 end
redis.call('HSET', KEYS[4], ARGV[1], ARGV[4])
redis.call('ZREM', KEYS[2], ARGV[1])
redis.call('HDEL', KEYS[3], ARGV[1])
local ttl = redis.call('PTTL', KEYS[1])
if ttl > 0 then redis.call('PEXPIRE', KEYS[4], ttl) end
return 1
`)

// releaseBlock hands a held block back: its lease ends at time 0, so the
// next claim takes it. KEYS: leases, holders, stats. ARGV: block, worker,
// skew ms. Returns 1 (released, or committed: nothing to hand back) or 0
// (not held by worker).
var releaseBlockScript = redis.NewScript(luaNow + luaHeld + `
if redis.call('HEXISTS', KEYS[3], ARGV[1]) == 1 then return 1 end
if not held(1, 2, 3, now_ms()) then return 0 end
redis.call('HDEL', KEYS[2], ARGV[1])
redis.call('ZADD', KEYS[1], 'XX', 0, ARGV[1])
return 1
`)

// blockStats reads consecutive statistics. KEYS: rec, stats. ARGV: first
// block, count. Returns false for no such job, else the statistics up to
// the first block without any.
var blockStatsScript = redis.NewScript(`
if redis.call('EXISTS', KEYS[1]) == 0 then return false end
local out = {}
local first = tonumber(ARGV[1])
for i = 0, tonumber(ARGV[2]) - 1 do
  local v = redis.call('HGET', KEYS[2], first + i)
  if not v then break end
  out[#out + 1] = v
end
return out
`)

// dropBlocks deletes leases and statistics of blocks below ARGV[1] (all
// when negative). KEYS: leases, holders, stats.
var dropBlocksScript = redis.NewScript(`
local below = tonumber(ARGV[1])
if below < 0 then
  redis.call('DEL', KEYS[1], KEYS[2], KEYS[3])
  return 1
end
for _, b in ipairs(redis.call('HKEYS', KEYS[3])) do
  if tonumber(b) < below then redis.call('HDEL', KEYS[3], b) end
end
for _, b in ipairs(redis.call('ZRANGE', KEYS[1], 0, -1)) do
  if tonumber(b) < below then
    redis.call('ZREM', KEYS[1], b)
    redis.call('HDEL', KEYS[2], b)
  end
end
return 1
`)
