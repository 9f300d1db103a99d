package redisstore

import (
	"context"
	"errors"
	"fmt"
	"strconv"
	"time"

	"github.com/redis/go-redis/v9"

	"github.com/beliefd/beliefd/service/jobs"
)

// statsChunk bounds the fields read by one HMGET in BlockStats.
const statsChunk = 256

// ClaimableJobs lists, for every tenant with unfinished jobs, its first
// limit jobs (all when limit <= 0), highest priority first, oldest first
// within a priority; tenants in name order. One script on {global} reads
// the tenants' queues.
func (s *Store) ClaimableJobs(ctx context.Context, limit int) ([]jobs.Claimable, error) {
	res, err := claimableJobsScript.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global(), max(limit, 0)).StringSlice()
	if err != nil {
		return nil, s.fail(ctx, "claimable jobs", err)
	}
	var out []jobs.Claimable
	for i := 0; i < len(res); {
		if i+1 >= len(res) {
			return nil, fmt.Errorf("redisstore: claimable jobs: truncated reply")
		}
		tenant := res[i]
		n, err := strconv.Atoi(res[i+1])
		if err != nil || n < 0 || i+2+2*n > len(res) {
			return nil, fmt.Errorf("redisstore: claimable jobs: bad count %q for tenant %q", res[i+1], tenant)
		}
		for k := range n {
			id, score := res[i+2+2*k], res[i+3+2*k]
			sc, err := strconv.ParseFloat(score, 64)
			if err != nil {
				return nil, fmt.Errorf("redisstore: claimable jobs: job %s: bad score %q", id, score)
			}
			out = append(out, jobs.Claimable{ID: id, Tenant: tenant, Priority: jobs.Priority(2 - int64(sc)/claimScoreUnit)})
		}
		i += 2 + 2*n
	}
	return out, nil
}

// claimScoreUnit is the weight of a priority level in a claim score
// (claim_score in scripts.go): 2^50.
const claimScoreUnit = 1 << 50

// leaseMillis turns a lease into whole milliseconds, at least one.
func leaseMillis(op string, lease time.Duration) (int64, error) {
	if lease <= 0 {
		return 0, fmt.Errorf("redisstore: %s: lease %v is not positive", op, lease)
	}
	return max(lease.Milliseconds(), 1), nil
}

// ClaimBlock leases a block of a job to worker in one script; see
// jobs.WorkQueue. Expiry is judged by the Redis server's clock with the
// store's SkewMargin. A job that is not unfinished has nothing to claim (-1).
func (s *Store) ClaimBlock(ctx context.Context, jobID, worker string, limit int64, lease time.Duration) (int64, error) {
	if worker == "" {
		return -1, errors.New("redisstore: claim block: worker is empty")
	}
	ms, err := leaseMillis("claim block", lease)
	if err != nil {
		return -1, err
	}
	jk := s.k.job(jobID)
	b, err := claimBlockScript.Run(ctx, s.rdb, []string{jk.rec, jk.next, jk.leases, jk.holders, jk.stats},
		worker, limit, ms, s.skew.Milliseconds()).Int64()
	if err != nil {
		return -1, s.fail(ctx, "claim block", err)
	}
	if b == -2 {
		return -1, fmt.Errorf("redisstore: claim block: job %s: %w", jobID, jobs.ErrNotFound)
	}
	return b, nil
}

// ExtendLease pushes the lease of a held block to now+lease (server clock),
// or returns jobs.ErrLeaseLost when worker no longer holds it or it has
// expired.
func (s *Store) ExtendLease(ctx context.Context, jobID string, block int64, worker string, lease time.Duration) error {
	ms, err := leaseMillis("extend lease", lease)
	if err != nil {
		return err
	}
	jk := s.k.job(jobID)
	ok, err := extendLeaseScript.Run(ctx, s.rdb, []string{jk.leases, jk.holders}, block, worker, s.skew.Milliseconds(), ms).Int()
	if err != nil {
		return s.fail(ctx, "extend lease", err)
	}
	if ok == 0 {
		return fmt.Errorf("redisstore: extend lease: job %s block %d: %w", jobID, block, jobs.ErrLeaseLost)
	}
	return nil
}

// CommitBlock stores a block's statistics and drops its lease in one
// script; see jobs.WorkQueue.
func (s *Store) CommitBlock(ctx context.Context, jobID string, block int64, worker string, stats []byte) error {
	jk := s.k.job(jobID)
	ok, err := commitBlockScript.Run(ctx, s.rdb, []string{jk.rec, jk.leases, jk.holders, jk.stats}, block, worker, s.skew.Milliseconds(), stats).Int()
	if err != nil {
		return s.fail(ctx, "commit block", err)
	}
	if ok == 0 {
		return fmt.Errorf("redisstore: commit block: job %s block %d: %w", jobID, block, jobs.ErrLeaseLost)
	}
	return nil
}

// ReleaseBlock hands a held block back so the next claim takes it; it
// returns jobs.ErrLeaseLost when worker does not hold the block.
func (s *Store) ReleaseBlock(ctx context.Context, jobID string, block int64, worker string) error {
	jk := s.k.job(jobID)
	ok, err := releaseBlockScript.Run(ctx, s.rdb, []string{jk.leases, jk.holders, jk.stats}, block, worker, s.skew.Milliseconds()).Int()
	if err != nil {
		return s.fail(ctx, "release block", err)
	}
	if ok == 0 {
		return fmt.Errorf("redisstore: release block: job %s block %d: %w", jobID, block, jobs.ErrLeaseLost)
	}
	return nil
}

// BlockStats returns the statistics of blocks from, from+1, ..., stopping
// at the first block without statistics or after max blocks.
func (s *Store) BlockStats(ctx context.Context, jobID string, from int64, max int) ([][]byte, error) {
	out := [][]byte{}
	if from < 0 {
		return out, nil
	}
	jk := s.k.job(jobID)
	for len(out) < max {
		n := min(max-len(out), statsChunk)
		vals, err := blockStatsScript.Run(ctx, s.rdb, []string{jk.rec, jk.stats}, from+int64(len(out)), n).StringSlice()
		if errors.Is(err, redis.Nil) {
			return nil, fmt.Errorf("redisstore: block stats: job %s: %w", jobID, jobs.ErrNotFound)
		}
		if err != nil {
			return nil, s.fail(ctx, "block stats", err)
		}
		for _, v := range vals {
			out = append(out, []byte(v))
		}
		if len(vals) < n {
			break
		}
	}
	return out, nil
}

// DropBlocks deletes the leases and statistics of blocks below `below`
// (all of them when below < 0). The counter of blocks handed out stays, so
// dropped blocks are never handed out again.
func (s *Store) DropBlocks(ctx context.Context, jobID string, below int64) error {
	jk := s.k.job(jobID)
	if err := dropBlocksScript.Run(ctx, s.rdb, []string{jk.leases, jk.holders, jk.stats}, below).Err(); err != nil {
		return s.fail(ctx, "drop blocks", err)
	}
	return nil
}
