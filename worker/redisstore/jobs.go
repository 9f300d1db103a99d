package redisstore

import (
	"context"
	cryptorand "crypto/rand"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"strconv"
	"time"

	"github.com/redis/go-redis/v9"

	"github.com/beliefd/beliefd/service/jobs"
)

const (
	// maxUpdateAttempts bounds UpdateJob's compare-and-swap retries.
	maxUpdateAttempts = 50
	// listChunk bounds the records read per round trip by ListJobs.
	listChunk = 500
	// idemWait bounds how long CreateJob waits for the job named by an
	// idempotency key while another call is still creating it.
	idemWait = 2 * time.Second
	// maxCreateTries bounds CreateJob's rounds of reserving a job whose
	// idempotency key names a job without a record.
	maxCreateTries = 1000
	// syncTimeout bounds the step that brings the indexes in line with a
	// record already written.
	syncTimeout = 5 * time.Second
)

// token returns a random string that marks one write, so that a retried
// script recognises a write of its own that already landed.
func token() string { return cryptorand.Text() }

// clampPriority maps a priority onto the three levels the queue orders.
func clampPriority(p jobs.Priority) int {
	return min(max(int(p), int(jobs.PriorityLow)), int(jobs.PriorityHigh))
}

func validState(s jobs.State) bool {
	switch s {
	case jobs.StateQueued, jobs.StateRunning, jobs.StateSucceeded, jobs.StateFailed, jobs.StateCancelled:
		return true
	}
	return false
}

// sleepCtx waits for d or until ctx ends.
func sleepCtx(ctx context.Context, d time.Duration) error {
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-ctx.Done():
		return ctx.Err()
	case <-t.C:
		return nil
	}
}

// CreateJob stores a new job in state queued and makes it claimable; see
// jobs.JobStore. It takes three steps, each one script on one hash slot
// (doc.go, "Steps across slots"): reserve the job in the indexes on
// {global} (idempotency key, quotas, listing, queue), write the record on
// {job:ID}, and mark the creation complete.
func (s *Store) CreateJob(ctx context.Context, j *jobs.Job, lim jobs.CreateLimits) (*jobs.Job, bool, error) {
	if j == nil {
		return nil, false, errors.New("redisstore: create job: job is nil")
	}
	if j.ID == "" {
		return nil, false, errors.New("redisstore: create job: the job has no ID")
	}
	if j.Tenant == jobs.AllTenants {
		return nil, false, fmt.Errorf("redisstore: create job %s: tenant %q stands for all tenants and cannot own a job", j.ID, j.Tenant)
	}
	stored := j.Clone()
	stored.State = jobs.StateQueued
	data, err := json.Marshal(stored)
	if err != nil {
		return nil, false, fmt.Errorf("redisstore: create job %s: encode: %w", j.ID, err)
	}
	sha := ""
	if j.IdempotencyKey != "" {
		sha = idemSum(j.IdempotencyKey)
	}
	tok := token()
	waitUntil := time.Now().Add(idemWait)
	for try := 0; ; try++ {
		if try == maxCreateTries {
			return nil, false, fmt.Errorf("redisstore: create job %s: %w: the indexes changed under %d tries", j.ID, jobs.ErrConflict, try)
		}
		res, err := reserveJobScript.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global(),
			j.ID, j.Tenant, lim.MaxUnfinished, lim.TenantMaxUnfinished, clampPriority(j.Priority), tok, sha).StringSlice()
		if err != nil {
			return nil, false, s.fail(ctx, "create job", err)
		}
		switch res[0] {
		case "reserved":
			return s.writeReserved(ctx, j, data, tok, res[1], res[2])
		case "full":
			return nil, false, fmt.Errorf("redisstore: create job: %w (%s unfinished)", jobs.ErrQueueFull, res[1])
		case "quota":
			n, _ := strconv.Atoi(res[1])
			return nil, false, fmt.Errorf("redisstore: create job: %w", jobs.TenantQuotaError(j.Tenant, n, lim.TenantMaxUnfinished))
		case "taken":
			return nil, false, fmt.Errorf("redisstore: create job %s: %w: the ID is taken", j.ID, jobs.ErrConflict)
		case "idem":
			other, err := s.GetJob(ctx, res[1])
			if err == nil {
				return other, false, nil
			}
			if !errors.Is(err, jobs.ErrNotFound) {
				return nil, false, err
			}
			// The key names a job without a record: one being created
			// (wait for it), or one gone (forget it, then try again).
			// Past the wait, a complete job without a record (lost to the
			// server) is forgotten too.
			force := ""
			if time.Now().After(waitUntil) {
				force = "force"
			}
			st, err := forgetJobScript.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global(), res[1], "", s.k.idem(j.Tenant, j.IdempotencyKey), force).Text()
			if err != nil {
				return nil, false, s.fail(ctx, "create job", err)
			}
			if st == "creating" || st == "exists" {
				if time.Now().After(waitUntil) {
					return nil, false, fmt.Errorf("redisstore: create job: idempotency key %q: %w: its job %s is still being created", j.IdempotencyKey, jobs.ErrConflict, res[1])
				}
				if err := sleepCtx(ctx, 10*time.Millisecond); err != nil {
					return nil, false, fmt.Errorf("redisstore: create job: %w", err)
				}
			}
		default:
			return nil, false, fmt.Errorf("redisstore: create job: unexpected reply %q", res[0])
		}
	}
}

// writeReserved writes the record of a reserved job and ends the
// creation.
func (s *Store) writeReserved(ctx context.Context, j *jobs.Job, data []byte, tok, seq, at string) (*jobs.Job, bool, error) {
	w, err := writeJobScript.Run(ctx, s.rdb, []string{s.k.job(j.ID).rec},
		data, tok, seq, j.Tenant, at, s.window.Milliseconds(), clampPriority(j.Priority), j.Retention.Milliseconds()).Text()
	if err != nil {
		// Whether the record was written is unknown: the sweep settles it
		// once the write window has passed.
		return nil, false, s.fail(ctx, "create job", err)
	}
	switch w {
	case "created":
		// The record is complete; if this mark fails, the sweep sets it.
		if err := confirmJobScript.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global(), j.ID, tok).Err(); err != nil {
			s.log.Warn("create job: creation not marked complete; the sweep will", "job", j.ID, "err", err)
		}
		out, err := decodeJob(j.ID, data) // a copy sharing nothing with j
		if err != nil {
			return nil, false, err
		}
		return out, true, nil
	case "stale", "taken":
		// Nothing was written: undo the reservation.
		if err := forgetJobScript.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global(), j.ID, tok, "").Err(); err != nil {
			s.log.Warn("create job: reservation not undone; the sweep will", "job", j.ID, "err", err)
		}
		if w == "taken" {
			return nil, false, fmt.Errorf("redisstore: create job %s: %w: the ID is taken", j.ID, jobs.ErrConflict)
		}
		return nil, false, fmt.Errorf("redisstore: create job %s: %w: the record was not written within %v of the reservation; try again", j.ID, jobs.ErrUnavailable, s.window)
	default:
		return nil, false, fmt.Errorf("redisstore: create job %s: unexpected reply %q", j.ID, w)
	}
}

// GetJob returns a copy of the job record.
func (s *Store) GetJob(ctx context.Context, id string) (*jobs.Job, error) {
	data, err := s.rdb.HGet(ctx, s.k.job(id).rec, "data").Bytes()
	if errors.Is(err, redis.Nil) {
		return nil, fmt.Errorf("redisstore: job %s: %w", id, jobs.ErrNotFound)
	}
	if err != nil {
		return nil, s.fail(ctx, "get job", err)
	}
	return decodeJob(id, data)
}

func decodeJob(id string, data []byte) (*jobs.Job, error) {
	var j jobs.Job
	if err := json.Unmarshal(data, &j); err != nil {
		return nil, fmt.Errorf("redisstore: job %s: decode: %w", id, err)
	}
	return &j, nil
}

// ListJobs returns the jobs of tenant (every tenant's for
// jobs.AllTenants) newest first, in the order the store created them,
// starting after the job with ID after, at most limit of them (all when
// limit <= 0); see jobs.JobStore. An after that names no job of the
// listing gives an empty page. Each tenant has its own index, so a page
// reads only what it returns.
func (s *Store) ListJobs(ctx context.Context, tenant, after string, limit int) ([]*jobs.Job, error) {
	out := []*jobs.Job{}
	if limit <= 0 {
		limit = math.MaxInt
	}
	index := s.k.jobIndex()
	if tenant != jobs.AllTenants {
		index = s.k.tenant(tenant, "jobs")
	}
	top := "+inf"
	if after != "" {
		sc, err := s.rdb.ZScore(ctx, index, after).Result()
		if errors.Is(err, redis.Nil) {
			return out, nil
		}
		if err != nil {
			return nil, s.fail(ctx, "list jobs", err)
		}
		top = "(" + strconv.FormatFloat(sc, 'f', -1, 64)
	}
	for len(out) < limit {
		want := min(limit-len(out), listChunk)
		zs, err := s.rdb.ZRevRangeByScoreWithScores(ctx, index, &redis.ZRangeBy{
			Max: top, Min: "-inf", Count: int64(want),
		}).Result()
		if err != nil {
			return nil, s.fail(ctx, "list jobs", err)
		}
		if len(zs) == 0 {
			break
		}
		pipe := s.rdb.Pipeline()
		cmds := make([]*redis.StringCmd, len(zs))
		for i, z := range zs {
			cmds[i] = pipe.HGet(ctx, s.k.job(z.Member.(string)).rec, "data")
		}
		if _, err := pipe.Exec(ctx); err != nil && !errors.Is(err, redis.Nil) {
			return nil, s.fail(ctx, "list jobs", err)
		}
		for i, c := range cmds {
			id := zs[i].Member.(string)
			data, err := c.Bytes()
			if errors.Is(err, redis.Nil) {
				// A record expired before the indexes were pruned, or one
				// being created: forget the first, skip both.
				if err := forgetJobScript.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global(), id, "", "").Err(); err != nil {
					return nil, s.fail(ctx, "list jobs", err)
				}
				continue
			}
			if err != nil {
				return nil, s.fail(ctx, "list jobs", err)
			}
			j, err := decodeJob(id, data)
			if err != nil {
				return nil, err
			}
			out = append(out, j)
		}
		top = "(" + strconv.FormatFloat(zs[len(zs)-1].Score, 'f', -1, 64)
		if len(zs) < want {
			break
		}
	}
	return out, nil
}

// UpdateJob applies fn to the current record and stores the result with a
// compare-and-swap on the record's revision, retried on conflict; see
// jobs.JobStore. fn cannot change the job's ID or tenant, and the
// idempotency key stays bound to the job it was created with. A job
// reaching a terminal state leaves the queue, and all its keys (and its
// idempotency key) expire after its Retention; with Retention <= 0 they
// are kept. The record is written on {job:ID}; when the state or the
// priority changed, the indexes on {global} follow in a second step
// (doc.go, "Steps across slots").
func (s *Store) UpdateJob(ctx context.Context, id string, fn func(*jobs.Job) error) (*jobs.Job, error) {
	jk := s.k.job(id)
	tok := token()
	for attempt := range maxUpdateAttempts {
		if attempt > 0 {
			// Jittered backoff spreads out writers that keep colliding.
			d := time.Duration(rand.Int64N(int64(min(attempt, 20))*int64(time.Millisecond) + 1))
			if err := sleepCtx(ctx, d); err != nil {
				return nil, fmt.Errorf("redisstore: update job %s: %w", id, err)
			}
		}
		vals, err := s.rdb.HMGet(ctx, jk.rec, "data", "rev", "tenant", "seq").Result()
		if err != nil {
			return nil, s.fail(ctx, "update job", err)
		}
		data, _ := vals[0].(string)
		rev, _ := vals[1].(string)
		tenant, _ := vals[2].(string)
		seq, _ := vals[3].(string)
		if vals[0] == nil || rev == "" {
			return nil, fmt.Errorf("redisstore: job %s: %w", id, jobs.ErrNotFound)
		}
		j, err := decodeJob(id, []byte(data))
		if err != nil {
			return nil, err
		}
		oldState, oldPrio := j.State, clampPriority(j.Priority)
		if err := fn(j); err != nil {
			return nil, err
		}
		j.ID, j.Tenant = id, tenant
		if !validState(j.State) {
			return nil, fmt.Errorf("redisstore: update job %s: unknown state %q", id, j.State)
		}
		out, err := json.Marshal(j)
		if err != nil {
			return nil, fmt.Errorf("redisstore: update job %s: encode: %w", id, err)
		}
		prio := clampPriority(j.Priority)
		res, err := updateJobScript.Run(ctx, s.rdb, []string{jk.rec, jk.next, jk.leases, jk.holders, jk.stats},
			rev, tok, out, string(j.State), j.Retention.Milliseconds(), prio).Text()
		if err != nil {
			return nil, s.fail(ctx, "update job", err)
		}
		switch res {
		case "ok", "done":
			if j.State != oldState || prio != oldPrio {
				r, _ := strconv.ParseInt(rev, 10, 64)
				s.sync(ctx, syncArgs{id: id, rev: r + 1, state: j.State, prio: prio, seq: seq, retention: j.Retention})
			}
			return decodeJob(id, out) // as stored, sharing nothing with fn's values
		case "notfound":
			return nil, fmt.Errorf("redisstore: job %s: %w", id, jobs.ErrNotFound)
		case "conflict":
			continue
		default:
			return nil, fmt.Errorf("redisstore: update job %s: unexpected reply %q", id, res)
		}
	}
	return nil, fmt.Errorf("redisstore: update job %s: %d attempts: %w", id, maxUpdateAttempts, jobs.ErrConflict)
}

// syncArgs is what the indexes need to know of a record.
type syncArgs struct {
	id        string
	rev       int64
	state     jobs.State
	prio      int
	seq       string
	retention time.Duration
}

// sync brings the indexes in line with a record revision, trying twice.
// A sync that fails leaves the indexes behind the record until the sweep
// repairs them; the record itself is stored, so the caller's update has
// succeeded.
func (s *Store) sync(ctx context.Context, a syncArgs) {
	// The record has changed: finish even if the caller gives up now.
	ctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), syncTimeout)
	defer cancel()
	var err error
	for try := range 2 {
		if try > 0 && sleepCtx(ctx, 50*time.Millisecond) != nil {
			break
		}
		err = syncJobScript.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global(),
			a.id, a.rev, string(a.state), a.prio, a.seq, a.retention.Milliseconds()).Err()
		if err == nil {
			return
		}
	}
	s.log.Warn("job indexes not updated; the sweep will", "job", a.id, "state", a.state, "err", err)
}

// Unfinished counts queued and running jobs of all tenants.
func (s *Store) Unfinished(ctx context.Context) (queued, running int, err error) {
	return s.unfinished(ctx, s.k.queued(), s.k.running())
}

// UnfinishedOf counts the queued and running jobs of tenant (of all
// tenants for jobs.AllTenants).
func (s *Store) UnfinishedOf(ctx context.Context, tenant string) (queued, running int, err error) {
	if tenant == jobs.AllTenants {
		return s.Unfinished(ctx)
	}
	return s.unfinished(ctx, s.k.tenant(tenant, "queued"), s.k.tenant(tenant, "running"))
}

func (s *Store) unfinished(ctx context.Context, queuedKey, runningKey string) (int, int, error) {
	pipe := s.rdb.Pipeline()
	q := pipe.SCard(ctx, queuedKey)
	r := pipe.SCard(ctx, runningKey)
	if _, err := pipe.Exec(ctx); err != nil {
		return 0, 0, s.fail(ctx, "unfinished", err)
	}
	return int(q.Val()), int(r.Val()), nil
}
