package redisstore

import "github.com/redis/go-redis/v9"

// The Lua scripts below run atomically on the server (EVALSHA, falling back
// to EVAL after a restart empties the script cache). Times are read from
// the server's clock (TIME) so that workers whose clocks disagree share
// one notion of lease expiry. Every key a script touches is passed in
// KEYS.

// luaNow is prepended to scripts that need the server time in milliseconds.
const luaNow = `
local function now_ms()
  local t = redis.call('TIME')
  return tonumber(t[1]) * 1000 + math.floor(tonumber(t[2]) / 1000)
end
local function unfinished(s) return s == 'queued' or s == 'running' end
`

// claimScore orders claimable jobs: higher priority first, then creation
// order. Priorities are clamped to 0..2 by the caller; seq < 2^50.
const luaScore = `
local function claim_score(prio, seq) return (2 - prio) * 1125899906842624 + seq end
`

// putModel stores a new version unless the latest one has the same hash.
// KEYS: head, info, doc, models. ARGV: name, hash, info JSON, doc, token.
// Returns {version, created (0/1), info JSON}. A retry of a call whose
// reply was lost finds its own token and still reports created.
var putModelScript = redis.NewScript(`
local h = redis.call('HMGET', KEYS[1], 'version', 'hash', 'tok')
if h[1] and h[2] == ARGV[2] then
  local created = 0
  if h[3] == ARGV[5] then created = 1 end
  return {tonumber(h[1]), created, redis.call('HGET', KEYS[2], h[1])}
end
local v = redis.call('HINCRBY', KEYS[1], 'version', 1)
redis.call('HSET', KEYS[1], 'hash', ARGV[2], 'tok', ARGV[5])
redis.call('HSET', KEYS[2], v, ARGV[3])
redis.call('HSET', KEYS[3], v, ARGV[4])
redis.call('ZADD', KEYS[4], 0, ARGV[1])
return {v, 1, ARGV[3]}
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

// deleteModel removes every version. KEYS: head, info, doc, models.
// ARGV: name. Returns 0 when there was no such model.
var deleteModelScript = redis.NewScript(`
if redis.call('EXISTS', KEYS[1]) == 0 then return 0 end
redis.call('DEL', KEYS[1], KEYS[2], KEYS[3])
redis.call('ZREM', KEYS[4], ARGV[1])
return 1
`)

// createJob stores a queued job, honouring the idempotency key and the cap
// on unfinished jobs, and drops index entries of jobs that have expired.
// KEYS: rec, idem (or rec when none), jobIndex, claimable, queued, running,
// seq, expiring.
// ARGV: id, data, maxUnfinished, priority (0..2), token, has idem (0/1).
// Returns {'created'}, {'idem', existing id}, {'full'} or {'taken'} (the ID
// belongs to another job).
var createJobScript = redis.NewScript(luaNow + luaScore + `
local tok = redis.call('HGET', KEYS[1], 'tok')
if tok and tok == ARGV[5] then return {'created'} end
if ARGV[6] == '1' then
  local other = redis.call('GET', KEYS[2])
  if other then return {'idem', other} end
end
if tok then return {'taken'} end
local max = tonumber(ARGV[3])
if max > 0 and redis.call('SCARD', KEYS[5]) + redis.call('SCARD', KEYS[6]) >= max then
  return {'full'}
end
local seq = redis.call('INCR', KEYS[7])
local idem = ''
if ARGV[6] == '1' then
  idem = KEYS[2]
  redis.call('SET', KEYS[2], ARGV[1])
end
redis.call('HSET', KEYS[1], 'data', ARGV[2], 'state', 'queued', 'rev', 1, 'tok', ARGV[5], 'seq', seq, 'idem', idem)
redis.call('ZADD', KEYS[3], seq, ARGV[1])
redis.call('ZADD', KEYS[4], claim_score(tonumber(ARGV[4]), seq), ARGV[1])
redis.call('SADD', KEYS[5], ARGV[1])
local gone = redis.call('ZRANGEBYSCORE', KEYS[8], '-inf', now_ms(), 'LIMIT', 0, 64)
for _, id in ipairs(gone) do
  redis.call('ZREM', KEYS[3], id)
  redis.call('ZREM', KEYS[8], id)
end
return {'created'}
`)

// updateJob stores a new record if the revision is still the one read
// (compare-and-swap) and moves the job between the queue indexes.
// KEYS: rec, next, leases, holders, stats, idem (or rec when none),
// claimable, queued, running, expiring.
// ARGV: id, expected rev, token, data, new state, retention ms, priority (0..2).
// Returns 'ok', 'done' (this call's token is already stored: a retry of a
// write that landed), 'conflict' or 'notfound'.
var updateJobScript = redis.NewScript(luaNow + luaScore + `
local cur = redis.call('HMGET', KEYS[1], 'rev', 'tok', 'state', 'seq')
if not cur[1] then return 'notfound' end
if cur[1] ~= ARGV[2] then
  if cur[2] == ARGV[3] then return 'done' end
  return 'conflict'
end
local id, old, new = ARGV[1], cur[3], ARGV[5]
redis.call('HSET', KEYS[1], 'data', ARGV[4], 'state', new, 'rev', tonumber(cur[1]) + 1, 'tok', ARGV[3])
if unfinished(new) then
  redis.call('ZADD', KEYS[7], claim_score(tonumber(ARGV[7]), tonumber(cur[4])), id)
  if new == 'queued' then
    redis.call('SADD', KEYS[8], id)
    redis.call('SREM', KEYS[9], id)
  else
    redis.call('SADD', KEYS[9], id)
    redis.call('SREM', KEYS[8], id)
  end
  if not unfinished(old) then
    for i = 1, 6 do redis.call('PERSIST', KEYS[i]) end
    redis.call('ZREM', KEYS[10], id)
  end
else
  redis.call('ZREM', KEYS[7], id)
  redis.call('SREM', KEYS[8], id)
  redis.call('SREM', KEYS[9], id)
  local ret = tonumber(ARGV[6])
  if unfinished(old) and ret > 0 then
    for i = 1, 6 do redis.call('PEXPIRE', KEYS[i], ret) end
    redis.call('ZADD', KEYS[10], now_ms() + ret, id)
  end
end
return 'ok'
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
