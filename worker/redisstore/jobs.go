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

// CreateJob stores a new job in state queued and makes it claimable; see
// jobs.JobStore.
func (s *Store) CreateJob(ctx context.Context, j *jobs.Job, maxUnfinished int) (*jobs.Job, bool, error) {
	if j == nil {
		return nil, false, errors.New("redisstore: create job: job is nil")
	}
	if j.ID == "" {
		return nil, false, errors.New("redisstore: create job: the job has no ID")
	}
	stored := j.Clone()
	stored.State = jobs.StateQueued
	data, err := json.Marshal(stored)
	if err != nil {
		return nil, false, fmt.Errorf("redisstore: create job %s: encode: %w", j.ID, err)
	}
	jk := s.k.job(j.ID)
	idemKey, hasIdem := jk.rec, "0"
	if j.IdempotencyKey != "" {
		idemKey, hasIdem = s.k.idem(j.IdempotencyKey), "1"
	}
	tok := token()
	// A job named by the idempotency key may expire between the script and
	// the read that follows; then the key has expired too and a new try
	// creates the job.
	for range 3 {
		res, err := createJobScript.Run(ctx, s.rdb,
			[]string{jk.rec, idemKey, s.k.jobIndex(), s.k.claimable(), s.k.queued(), s.k.running(), s.k.seq(), s.k.expiring()},
			j.ID, data, maxUnfinished, clampPriority(j.Priority), tok, hasIdem).StringSlice()
		if err != nil {
			return nil, false, s.fail(ctx, "create job", err)
		}
		switch res[0] {
		case "created":
			out, err := decodeJob(j.ID, data) // a copy sharing nothing with j
			if err != nil {
				return nil, false, err
			}
			return out, true, nil
		case "full":
			return nil, false, fmt.Errorf("redisstore: create job: %w (%d unfinished)", jobs.ErrQueueFull, maxUnfinished)
		case "taken":
			return nil, false, fmt.Errorf("redisstore: create job %s: %w: the ID is taken", j.ID, jobs.ErrConflict)
		case "idem":
			other, err := s.GetJob(ctx, res[1])
			if errors.Is(err, jobs.ErrNotFound) {
				continue
			}
			if err != nil {
				return nil, false, err
			}
			return other, false, nil
		default:
			return nil, false, fmt.Errorf("redisstore: create job: unexpected reply %q", res[0])
		}
	}
	return nil, false, fmt.Errorf("redisstore: create job: idempotency key %q: %w", j.IdempotencyKey, jobs.ErrConflict)
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

// ListJobs returns jobs newest first (in the order the store created
// them), starting after the job with ID after, at most limit of them (all
// when limit <= 0); see jobs.JobStore. An after that names no kept job
// gives an empty page.
func (s *Store) ListJobs(ctx context.Context, after string, limit int) ([]*jobs.Job, error) {
	out := []*jobs.Job{}
	if limit <= 0 {
		limit = math.MaxInt
	}
	top := "+inf"
	if after != "" {
		sc, err := s.rdb.ZScore(ctx, s.k.jobIndex(), after).Result()
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
		zs, err := s.rdb.ZRevRangeByScoreWithScores(ctx, s.k.jobIndex(), &redis.ZRangeBy{
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
		var gone []any
		for i, c := range cmds {
			id := zs[i].Member.(string)
			data, err := c.Bytes()
			if errors.Is(err, redis.Nil) {
				gone = append(gone, id)
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
		if len(gone) > 0 {
			// Records expired before the index was pruned: prune now.
			if err := s.rdb.ZRem(ctx, s.k.jobIndex(), gone...).Err(); err != nil {
				return nil, s.fail(ctx, "list jobs", err)
			}
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
// jobs.JobStore. fn cannot change the job's ID, and the idempotency key
// stays bound to the job it was created with. A job reaching a terminal
// state leaves the queue, and all its keys (and its idempotency key)
// expire after its Retention; with Retention <= 0 they are kept.
func (s *Store) UpdateJob(ctx context.Context, id string, fn func(*jobs.Job) error) (*jobs.Job, error) {
	jk := s.k.job(id)
	tok := token()
	for attempt := range maxUpdateAttempts {
		if attempt > 0 {
			// Jittered backoff spreads out writers that keep colliding.
			d := time.Duration(rand.Int64N(int64(min(attempt, 20))*int64(time.Millisecond) + 1))
			select {
			case <-ctx.Done():
				return nil, fmt.Errorf("redisstore: update job %s: %w", id, ctx.Err())
			case <-time.After(d):
			}
		}
		vals, err := s.rdb.HMGet(ctx, jk.rec, "data", "rev", "idem").Result()
		if err != nil {
			return nil, s.fail(ctx, "update job", err)
		}
		data, _ := vals[0].(string)
		rev, _ := vals[1].(string)
		idem, _ := vals[2].(string)
		if vals[0] == nil || rev == "" {
			return nil, fmt.Errorf("redisstore: job %s: %w", id, jobs.ErrNotFound)
		}
		j, err := decodeJob(id, []byte(data))
		if err != nil {
			return nil, err
		}
		if err := fn(j); err != nil {
			return nil, err
		}
		j.ID = id
		if !validState(j.State) {
			return nil, fmt.Errorf("redisstore: update job %s: unknown state %q", id, j.State)
		}
		out, err := json.Marshal(j)
		if err != nil {
			return nil, fmt.Errorf("redisstore: update job %s: encode: %w", id, err)
		}
		if idem == "" {
			idem = jk.rec
		}
		res, err := updateJobScript.Run(ctx, s.rdb,
			[]string{jk.rec, jk.next, jk.leases, jk.holders, jk.stats, idem, s.k.claimable(), s.k.queued(), s.k.running(), s.k.expiring()},
			id, rev, tok, out, string(j.State), j.Retention.Milliseconds(), clampPriority(j.Priority)).Text()
		if err != nil {
			return nil, s.fail(ctx, "update job", err)
		}
		switch res {
		case "ok", "done":
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

// Unfinished counts queued and running jobs.
func (s *Store) Unfinished(ctx context.Context) (queued, running int, err error) {
	pipe := s.rdb.Pipeline()
	q := pipe.SCard(ctx, s.k.queued())
	r := pipe.SCard(ctx, s.k.running())
	if _, err := pipe.Exec(ctx); err != nil {
		return 0, 0, s.fail(ctx, "unfinished", err)
	}
	return int(q.Val()), int(r.Val()), nil
}
