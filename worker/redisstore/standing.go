package redisstore

import (
	"context"
	"encoding/base64"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"strconv"
	"strings"
	"time"

	"github.com/redis/go-redis/v9"

	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/standing"
)

// StandingStore is the Redis backend of standing.Store: registrations,
// evidence with its revision, the latest result and failure, and the
// recompute lease of every standing query, shared by any number of API
// processes. The keys of one standing query share the hash tag
// {sq:TENANT:ID} (TENANT in unpadded base64url, empty for the open
// tenant); the index of all standing queries is P:{global}:standing.
// No script touches keys of two hash tags, so it runs on Redis Cluster
// too: Create and Delete change the index and the record in two steps,
// and List skips (and after a minute removes) index entries whose record
// is gone. It is safe for concurrent use.
type StandingStore struct {
	rdb redis.UniversalClient
	p   string
	log *slog.Logger
}

var _ standing.Store = (*StandingStore)(nil)

// orphanAge is how old an index entry without a record must be before
// List removes it (younger ones may belong to a Create in progress).
const orphanAge = time.Minute

// NewStanding connects a StandingStore to the Redis server at url (as New
// does: redis:// or rediss://, go-redis query parameters honoured) and
// checks that it answers. opt.KeyPrefix, the timeouts and the logger
// apply; an unreachable server gives an error wrapping jobs.ErrUnavailable.
func NewStanding(ctx context.Context, url string, opt Options) (*StandingStore, error) {
	if opt.KeyPrefix == "" {
		opt.KeyPrefix = DefaultKeyPrefix
	}
	if strings.ContainsAny(opt.KeyPrefix, "{}") {
		return nil, fmt.Errorf("redisstore: key prefix %q: braces are reserved for hash tags", opt.KeyPrefix)
	}
	if opt.Logger == nil {
		opt.Logger = slog.Default()
	}
	rdb, addr, err := Dial(url, opt)
	if err != nil {
		return nil, err
	}
	s := &StandingStore{rdb: rdb, p: opt.KeyPrefix, log: opt.Logger.With("component", "redisstore-standing")}
	if err := s.Ping(ctx); err != nil {
		_ = s.rdb.Close()
		return nil, fmt.Errorf("redisstore: connect %s: %w", addr, err)
	}
	return s, nil
}

// Ping reports whether Redis answers.
func (s *StandingStore) Ping(ctx context.Context) error {
	return s.fail(ctx, "ping", s.rdb.Ping(ctx).Err())
}

// Close closes the connections.
func (s *StandingStore) Close() error {
	if err := s.rdb.Close(); err != nil && !errors.Is(err, redis.ErrClosed) {
		return fmt.Errorf("redisstore: close: %w", err)
	}
	return nil
}

// fail maps a Redis error as the job store does (failRedis).
func (s *StandingStore) fail(ctx context.Context, op string, err error) error {
	return failRedis(ctx, "redisstore: standing "+op, err)
}

// Key names (doc.go lists them).

// member is a standing query's entry in the index: TENANT:ID, the tenant
// in unpadded base64url (which has no ':' and no braces).
func standingMember(k standing.Key) string {
	return base64.RawURLEncoding.EncodeToString([]byte(k.Tenant)) + ":" + k.ID
}

func (s *StandingStore) recKey(k standing.Key) string   { return s.p + ":{sq:" + standingMember(k) + "}" }
func (s *StandingStore) leaseKey(k standing.Key) string { return s.recKey(k) + ":lease" }
func (s *StandingStore) index() string                  { return s.p + ":{global}:standing" }
func (s *StandingStore) indexLast() string              { return s.p + ":{global}:standing:last" }

// Keys returns the keys of one standing query (for tests and operators).
func (s *StandingStore) Keys(k standing.Key) []string {
	return []string{s.recKey(k), s.leaseKey(k)}
}

func keyOfMember(m string) (standing.Key, bool) {
	t, id, ok := strings.Cut(m, ":")
	if !ok {
		return standing.Key{}, false
	}
	tenant, err := base64.RawURLEncoding.DecodeString(t)
	if err != nil {
		return standing.Key{}, false
	}
	return standing.Key{Tenant: string(tenant), ID: id}, true
}

// meta is the part of a record that never changes.
type standingMeta struct {
	Key       standing.Key  `json:"key"`
	Spec      standing.Spec `json:"spec"`
	Interval  time.Duration `json:"interval"`
	CreatedAt time.Time     `json:"created_at"`
}

// Scripts. Every key a script touches is passed in KEYS and shares one
// hash tag. Times are the callers' (milliseconds), as the domain decides
// with them; lease expiry is Redis' own (PX).

// standingIndexAdd adds a member to the index unless it is there or the
// index is full. Its score is the time in ms, raised above the last score
// given out (kept in KEYS[2]) so that the index lists in creation order.
// KEYS: index, last score. ARGV: member, max (0: none), now ms.
// Returns {0} added, {1} present, {2, count} full.
var standingIndexAdd = redis.NewScript(`
if redis.call('ZSCORE', KEYS[1], ARGV[1]) then return {1} end
local max = tonumber(ARGV[2])
if max > 0 then
  local n = redis.call('ZCARD', KEYS[1])
  if n >= max then return {2, n} end
end
local score = math.max(tonumber(ARGV[3]), tonumber(redis.call('GET', KEYS[2]) or '0') + 1)
redis.call('SET', KEYS[2], string.format('%d', score))
redis.call('ZADD', KEYS[1], string.format('%d', score), ARGV[1])
return {0}
`)

// standingCreate stores a record unless one exists. KEYS: record, lease.
// ARGV: field, value, ... Returns 1 stored, 0 present.
var standingCreate = redis.NewScript(`
if redis.call('EXISTS', KEYS[1]) == 1 then return 0 end
redis.call('DEL', KEYS[2])
redis.call('HSET', KEYS[1], unpack(ARGV))
return 1
`)

// standingSetEvidence replaces the evidence at an expected revision.
// KEYS: record. ARGV: expected revision, evidence JSON, evidence time.
// Returns {-1} missing, {0, revision} conflict, {1, HGETALL...} done.
var standingSetEvidence = redis.NewScript(`
local r = redis.call('HGET', KEYS[1], 'rev')
if not r then return {-1} end
if r ~= ARGV[1] then return {0, r} end
redis.call('HSET', KEYS[1], 'ev', ARGV[2], 'rev', tostring(tonumber(ARGV[1]) + 1), 'ev_at', ARGV[3])
local all = redis.call('HGETALL', KEYS[1])
table.insert(all, 1, 1)
return all
`)

// standingClaim grants the recompute lease when the record is due (no
// outcome answers its revision, or the latest is an interval old) and no
// lease is held. KEYS: record, lease. ARGV: owner, now ms, lease ms.
// Returns {-1} missing, {0} nothing to do, {1, HGETALL...} claimed.
var standingClaim = redis.NewScript(`
local f = redis.call('HMGET', KEYS[1], 'rev', 'res_rev', 'res_ms', 'fail_rev', 'fail_ms', 'interval_ms')
if not f[1] then return {-1} end
local rev = tonumber(f[1])
local any, last_rev, last_ms = false, 0, 0
if f[2] then any = true; last_rev = tonumber(f[2]); last_ms = tonumber(f[3]) end
if f[4] then
  any = true
  last_rev = math.max(last_rev, tonumber(f[4]))
  last_ms = math.max(last_ms, tonumber(f[5]))
end
local due = (not any) or last_rev < rev or tonumber(ARGV[2]) >= last_ms + tonumber(f[6])
if not due then return {0} end
if not redis.call('SET', KEYS[2], ARGV[1], 'NX', 'PX', ARGV[3]) then return {0} end
local all = redis.call('HGETALL', KEYS[1])
table.insert(all, 1, 1)
return all
`)

// standingComplete keeps an outcome by its revision and time, as
// standing.Record.Keep decides, and releases the owner's lease.
// KEYS: record, lease. ARGV: owner, kind (res|fail), revision, ms, outcome JSON.
// Returns -1 missing, 0 not kept, 1 kept.
var standingComplete = redis.NewScript(`
if redis.call('GET', KEYS[2]) == ARGV[1] then redis.call('DEL', KEYS[2]) end
if redis.call('EXISTS', KEYS[1]) == 0 then return -1 end
local rev, ms = tonumber(ARGV[3]), tonumber(ARGV[4])
local f = redis.call('HMGET', KEYS[1], 'res_rev', 'res_ms', 'fail_rev', 'fail_ms')
local function newer(r, m)
  if not r then return true end
  r, m = tonumber(r), tonumber(m)
  return rev > r or (rev == r and ms > m)
end
if ARGV[2] == 'res' then
  if not newer(f[1], f[2]) then return 0 end
  redis.call('HSET', KEYS[1], 'res', ARGV[5], 'res_rev', rev, 'res_ms', ms)
  if f[3] then
    local fr, fm = tonumber(f[3]), tonumber(f[4])
    if not (fr > rev or (fr == rev and fm > ms)) then redis.call('HDEL', KEYS[1], 'fail', 'fail_rev', 'fail_ms') end
  end
  return 1
end
if f[1] and rev < tonumber(f[1]) then return 0 end
if not newer(f[3], f[4]) then return 0 end
redis.call('HSET', KEYS[1], 'fail', ARGV[5], 'fail_rev', rev, 'fail_ms', ms)
return 1
`)

// standingRelease drops the lease if owner holds it. KEYS: lease. ARGV: owner.
var standingRelease = redis.NewScript(`
if redis.call('GET', KEYS[1]) == ARGV[1] then redis.call('DEL', KEYS[1]) end
return 1
`)

// standingDelete removes a record and its lease. KEYS: record, lease.
// Returns 1 when the record existed.
var standingDelete = redis.NewScript(`
local n = redis.call('DEL', KEYS[1])
redis.call('DEL', KEYS[2])
return n
`)

// Create implements standing.Store.
func (s *StandingStore) Create(ctx context.Context, rec *standing.Record, max int) error {
	meta, err := json.Marshal(standingMeta{Key: rec.Key, Spec: rec.Spec, Interval: rec.Interval, CreatedAt: rec.CreatedAt})
	if err != nil {
		return fmt.Errorf("redisstore: encode standing query %s: %w", rec.Key, err)
	}
	ev, err := json.Marshal(nonNilEvidence(rec.Evidence))
	if err != nil {
		return fmt.Errorf("redisstore: encode evidence of %s: %w", rec.Key, err)
	}
	if rec.Interval <= 0 {
		return fmt.Errorf("redisstore: standing query %s: interval %s must be positive", rec.Key, rec.Interval)
	}
	member := standingMember(rec.Key)
	// The record first would let a crash leave a record the index does not
	// list; the index first leaves at worst an entry List cleans up.
	exists, err := s.rdb.Exists(ctx, s.recKey(rec.Key)).Result()
	if err != nil {
		return s.fail(ctx, "create", err)
	}
	if exists == 1 {
		return fmt.Errorf("standing query %q: %w", rec.Key.ID, standing.ErrExists)
	}
	res, err := standingIndexAdd.Run(ctx, s.rdb, []string{s.index(), s.indexLast()}, member, max, time.Now().UnixMilli()).Slice()
	if err != nil {
		return s.fail(ctx, "create", err)
	}
	switch code, _ := res[0].(int64); code {
	case 1:
		return fmt.Errorf("standing query %q: %w (or it is being created or deleted)", rec.Key.ID, standing.ErrExists)
	case 2:
		n, _ := res[1].(int64)
		return fmt.Errorf("%w: %d of %d standing queries are registered", standing.ErrLimit, n, max)
	}
	stored, err := standingCreate.Run(ctx, s.rdb, []string{s.recKey(rec.Key), s.leaseKey(rec.Key)},
		"meta", meta, "interval_ms", rec.Interval.Milliseconds(), "ev", ev,
		"rev", rec.Revision, "ev_at", rec.EvidenceAt.Format(time.RFC3339Nano)).Int()
	if err != nil {
		// Best effort: the index entry is removed by List later if this fails too.
		_ = s.rdb.ZRem(context.WithoutCancel(ctx), s.index(), member).Err()
		return s.fail(ctx, "create", err)
	}
	if stored == 0 {
		return fmt.Errorf("standing query %q: %w", rec.Key.ID, standing.ErrExists)
	}
	return nil
}

func nonNilEvidence(ev map[string]string) map[string]string {
	if ev == nil {
		return map[string]string{}
	}
	return ev
}

// decodeStanding builds a record from its hash fields.
func decodeStanding(fields map[string]string) (*standing.Record, error) {
	var m standingMeta
	if err := json.Unmarshal([]byte(fields["meta"]), &m); err != nil {
		return nil, fmt.Errorf("redisstore: decode standing query: %w", err)
	}
	r := &standing.Record{Key: m.Key, Spec: m.Spec, Interval: m.Interval, CreatedAt: m.CreatedAt}
	if err := json.Unmarshal([]byte(fields["ev"]), &r.Evidence); err != nil {
		return nil, fmt.Errorf("redisstore: decode evidence of %s: %w", m.Key, err)
	}
	r.Evidence = nonNilEvidence(r.Evidence)
	rev, err := strconv.ParseInt(fields["rev"], 10, 64)
	if err != nil {
		return nil, fmt.Errorf("redisstore: revision of %s: %w", m.Key, err)
	}
	r.Revision = rev
	if r.EvidenceAt, err = time.Parse(time.RFC3339Nano, fields["ev_at"]); err != nil {
		return nil, fmt.Errorf("redisstore: evidence time of %s: %w", m.Key, err)
	}
	for _, o := range []struct {
		field string
		dst   **standing.Outcome
	}{{"res", &r.Result}, {"fail", &r.Failure}} {
		if raw, ok := fields[o.field]; ok {
			var out standing.Outcome
			if err := json.Unmarshal([]byte(raw), &out); err != nil {
				return nil, fmt.Errorf("redisstore: decode %s of %s: %w", o.field, m.Key, err)
			}
			*o.dst = &out
		}
	}
	return r, nil
}

// decodeFlat reads an HGETALL reply returned by a script (a flat list of
// field, value pairs, after the leading status).
func decodeFlat(items []any) (*standing.Record, error) {
	fields := make(map[string]string, len(items)/2)
	for i := 0; i+1 < len(items); i += 2 {
		k, _ := items[i].(string)
		v, _ := items[i+1].(string)
		fields[k] = v
	}
	return decodeStanding(fields)
}

// Get implements standing.Store.
func (s *StandingStore) Get(ctx context.Context, key standing.Key) (*standing.Record, error) {
	fields, err := s.rdb.HGetAll(ctx, s.recKey(key)).Result()
	if err != nil {
		return nil, s.fail(ctx, "get", err)
	}
	if len(fields) == 0 {
		return nil, fmt.Errorf("standing query %q: %w", key.ID, jobs.ErrNotFound)
	}
	return decodeStanding(fields)
}

// List implements standing.Store: the index, then every record in one
// pipeline. Entries whose record is gone are skipped, and removed once
// they are older than a minute.
func (s *StandingStore) List(ctx context.Context) ([]*standing.Record, error) {
	entries, err := s.rdb.ZRangeWithScores(ctx, s.index(), 0, -1).Result()
	if err != nil {
		return nil, s.fail(ctx, "list", err)
	}
	if len(entries) == 0 {
		return []*standing.Record{}, nil
	}
	pipe := s.rdb.Pipeline()
	cmds := make([]*redis.MapStringStringCmd, len(entries))
	keys := make([]standing.Key, len(entries))
	for i, e := range entries {
		m, _ := e.Member.(string)
		k, ok := keyOfMember(m)
		if !ok {
			continue
		}
		keys[i] = k
		cmds[i] = pipe.HGetAll(ctx, s.recKey(k))
	}
	if _, err := pipe.Exec(ctx); err != nil {
		return nil, s.fail(ctx, "list", err)
	}
	out := make([]*standing.Record, 0, len(entries))
	var orphans []any
	cutoff := time.Now().Add(-orphanAge).UnixMilli()
	for i, c := range cmds {
		if c == nil {
			orphans = append(orphans, entries[i].Member)
			continue
		}
		fields := c.Val()
		if len(fields) == 0 {
			if int64(entries[i].Score) < cutoff {
				orphans = append(orphans, entries[i].Member)
			}
			continue
		}
		r, err := decodeStanding(fields)
		if err != nil {
			s.log.Warn("skipping a standing query that cannot be read", "standing_query", keys[i].String(), "err", err)
			continue
		}
		out = append(out, r)
	}
	if len(orphans) > 0 {
		if err := s.rdb.ZRem(ctx, s.index(), orphans...).Err(); err != nil {
			s.log.Warn("cannot remove index entries of deleted standing queries", "err", err)
		}
	}
	return out, nil
}

// Delete implements standing.Store.
func (s *StandingStore) Delete(ctx context.Context, key standing.Key) error {
	n, err := standingDelete.Run(ctx, s.rdb, []string{s.recKey(key), s.leaseKey(key)}).Int()
	if err != nil {
		return s.fail(ctx, "delete", err)
	}
	if err := s.rdb.ZRem(ctx, s.index(), standingMember(key)).Err(); err != nil {
		// The record is gone: List skips the entry and removes it later.
		s.log.Warn("cannot remove the index entry of a deleted standing query", "standing_query", key.String(), "err", err)
	}
	if n == 0 {
		return fmt.Errorf("standing query %q: %w", key.ID, jobs.ErrNotFound)
	}
	return nil
}

// SetEvidence implements standing.Store.
func (s *StandingStore) SetEvidence(ctx context.Context, key standing.Key, expect int64, ev map[string]string, at time.Time) (*standing.Record, error) {
	data, err := json.Marshal(nonNilEvidence(ev))
	if err != nil {
		return nil, fmt.Errorf("redisstore: encode evidence of %s: %w", key, err)
	}
	res, err := standingSetEvidence.Run(ctx, s.rdb, []string{s.recKey(key)}, expect, data, at.Format(time.RFC3339Nano)).Slice()
	if err != nil {
		return nil, s.fail(ctx, "set evidence", err)
	}
	switch code, _ := res[0].(int64); code {
	case -1:
		return nil, fmt.Errorf("standing query %q: %w", key.ID, jobs.ErrNotFound)
	case 0:
		return nil, fmt.Errorf("standing query %q at revision %v, not %d: %w", key.ID, res[1], expect, standing.ErrConflict)
	}
	return decodeFlat(res[1:])
}

// Claim implements standing.Store.
func (s *StandingStore) Claim(ctx context.Context, key standing.Key, owner string, now time.Time, lease time.Duration) (*standing.Record, error) {
	res, err := standingClaim.Run(ctx, s.rdb, []string{s.recKey(key), s.leaseKey(key)}, owner, now.UnixMilli(), max(lease.Milliseconds(), 1)).Slice()
	if err != nil {
		return nil, s.fail(ctx, "claim", err)
	}
	switch code, _ := res[0].(int64); code {
	case -1:
		return nil, fmt.Errorf("standing query %q: %w", key.ID, jobs.ErrNotFound)
	case 0:
		return nil, nil
	}
	return decodeFlat(res[1:])
}

// Release implements standing.Store.
func (s *StandingStore) Release(ctx context.Context, key standing.Key, owner string) error {
	return s.fail(ctx, "release", standingRelease.Run(ctx, s.rdb, []string{s.leaseKey(key)}, owner).Err())
}

// Complete implements standing.Store.
func (s *StandingStore) Complete(ctx context.Context, key standing.Key, owner string, out *standing.Outcome) (bool, error) {
	data, err := json.Marshal(out)
	if err != nil {
		return false, fmt.Errorf("redisstore: encode outcome of %s: %w", key, err)
	}
	kind := "res"
	if out.Error != "" {
		kind = "fail"
	}
	n, err := standingComplete.Run(ctx, s.rdb, []string{s.recKey(key), s.leaseKey(key)}, owner, kind, out.Revision, out.At.UnixMilli(), data).Int()
	if err != nil {
		return false, s.fail(ctx, "complete", err)
	}
	if n < 0 {
		return false, fmt.Errorf("standing query %q: %w", key.ID, jobs.ErrNotFound)
	}
	return n == 1, nil
}
