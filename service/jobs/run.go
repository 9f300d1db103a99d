package jobs

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"runtime/debug"
	"sync"
	"time"

	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/sampling"
)

// Block outcomes reported to Observer.BlockDone.
const (
	OutcomeCommitted = "committed"
	OutcomeLostLease = "lost_lease"
	OutcomeCancelled = "cancelled"
	OutcomeError     = "error"
)

// Work-unit monitoring.
const (
	// checkEvery is how often a running unit looks at its job (cancelled,
	// finished by others, past its deadline).
	checkEvery = 250 * time.Millisecond
	// claimScan is how many claimable jobs RunOnce looks at.
	claimScan = 100
	// handBackTime bounds the store calls that hand work back or commit it
	// after the caller's context has ended.
	handBackTime = 5 * time.Second
)

// Causes that end a work unit early.
var (
	errJobEnded = errors.New("job ended")
	errDeadline = errors.New("job deadline passed")
)

// ErrNoWorkerID is returned by RunOnce when the worker has no ID.
var ErrNoWorkerID = errors.New("worker id is empty")

// RunOnce claims one unit of work among the claimable jobs (tenants by
// fair share, see fair.go; a tenant's jobs highest priority first), runs it under a lease that it renews every LeaseTime/3,
// commits it and advances the job: a block of samples for forward,
// rejection, likelihood-weighting and adaptive importance sampling jobs,
// the whole run for exact and Gibbs jobs. A unit stops early when the job is cancelled or past its
// deadline (checked every 250ms) or when the lease is lost, and then
// commits nothing. When ctx ends the unit stops and is handed back
// (ReleaseBlock) for another worker. A panic in a unit fails its job.
// RunOnce reports whether it did any work; errors are those of the store
// (a job's own failure is recorded in the job, not returned).
func (s *Service) RunOnce(ctx context.Context, workerID string) (bool, error) {
	if workerID == "" {
		return false, fmt.Errorf("run once: %w", ErrNoWorkerID)
	}
	cands, err := s.store.ClaimableJobs(ctx, claimScan)
	if err != nil {
		return false, fmt.Errorf("run once: %w", err)
	}
	// Tenants take turns by fair share (fair.go); a tenant's jobs go in
	// the store's order, highest priority first.
	groups := s.fair.round(cands)
	tried := make([]bool, len(groups))
	for {
		g, tk := s.fair.pick(groups, tried)
		if g < 0 {
			return false, nil
		}
		tried[g] = true
		began := s.now()
		worked, err := s.tryTenant(ctx, groups[g].jobs, workerID)
		s.fair.done(tk, worked, s.now().Sub(began))
		if err != nil || worked {
			return worked, err
		}
	}
}

// tryTenant tries the jobs of one tenant in order until one gives a unit
// of work.
func (s *Service) tryTenant(ctx context.Context, cands []Claimable, workerID string) (bool, error) {
	for _, c := range cands {
		if err := ctx.Err(); err != nil {
			return false, err
		}
		worked, err := s.tryJob(ctx, c.ID, workerID)
		if errors.Is(err, ErrNotFound) {
			continue
		}
		if err != nil {
			return worked, fmt.Errorf("run once: job %s: %w", c.ID, err)
		}
		if worked {
			return true, nil
		}
	}
	return false, nil
}

// tryJob claims and runs a unit of job id, if there is one.
func (s *Service) tryJob(ctx context.Context, id, worker string) (bool, error) {
	j, err := s.store.GetJob(ctx, id)
	if err != nil {
		return false, err
	}
	if j.State.Terminal() {
		return false, nil
	}
	if !j.Blockwise() {
		b, err := s.store.ClaimBlock(ctx, id, worker, 1, s.cfg.LeaseTime)
		if err != nil {
			return false, err
		}
		if b < 0 {
			// A unit committed by a worker that stopped before recording it.
			return s.recoverUnit(ctx, j)
		}
		return true, s.runUnit(ctx, j, worker)
	}
	if s.pastDeadline(j, s.now()) {
		return true, s.endBlockwise(ctx, id, StateSucceeded, sampling.ReasonTimeout)
	}
	limit := min(j.Blocks, j.MergedBlocks+int64(s.cfg.LookAhead))
	b, err := s.store.ClaimBlock(ctx, id, worker, limit, s.cfg.LeaseTime)
	if err != nil {
		return false, err
	}
	if b < 0 {
		// Committed blocks may wait for a merge whose worker stopped.
		raw, err := s.store.BlockStats(ctx, id, j.MergedBlocks, 1)
		if err != nil || len(raw) == 0 {
			return false, err
		}
		return s.advance(ctx, id)
	}
	return true, s.runBlock(ctx, j, b, worker)
}

// markRunning moves a queued job to running and sets its deadline.
func (s *Service) markRunning(ctx context.Context, j *Job) (*Job, error) {
	if j.State != StateQueued {
		return j, nil
	}
	updated, err := s.store.UpdateJob(ctx, j.ID, func(cur *Job) error {
		if cur.State != StateQueued {
			return errNoChange
		}
		now := s.now()
		cur.StartedAt = now
		cur.Deadline = now.Add(s.timeLimit(cur))
		setState(cur, StateRunning, now)
		return nil
	})
	if errors.Is(err, errNoChange) {
		return s.store.GetJob(ctx, j.ID)
	}
	if err != nil {
		return nil, err
	}
	s.log.Debug("job started", "job", j.ID, "deadline", updated.Deadline)
	if err := s.store.Notify(ctx, j.ID); err != nil {
		s.log.Warn("notify", "job", j.ID, "err", err)
	}
	return updated, nil
}

// unit watches one running work unit: it renews the lease, looks at the
// job every checkEvery, writes pending partial results (Gibbs) while the
// lease is held, and cancels ctx with the cause that ends the unit.
type unit struct {
	s      *Service
	job    *Job
	block  int64
	worker string
	ctx    context.Context
	cancel context.CancelCauseFunc
	done   chan struct{}

	mu      sync.Mutex
	partial *infer.Result // newest partial result not yet written
}

func (s *Service) startUnit(ctx context.Context, j *Job, block int64, worker string) *unit {
	uctx, cancel := context.WithCancelCause(ctx)
	u := &unit{s: s, job: j, block: block, worker: worker, ctx: uctx, cancel: cancel, done: make(chan struct{})}
	go u.watch()
	return u
}

// stop ends the monitor and waits for it.
func (u *unit) stop() {
	u.cancel(nil)
	<-u.done
}

// cause is why the unit's context ended (nil while it runs).
func (u *unit) cause() error {
	if u.ctx.Err() == nil {
		return nil
	}
	return context.Cause(u.ctx)
}

func (u *unit) offer(r *infer.Result) {
	u.mu.Lock()
	u.partial = r
	u.mu.Unlock()
}

func (u *unit) watch() {
	defer close(u.done)
	s := u.s
	every := min(checkEvery, s.cfg.LeaseTime/3)
	tick := time.NewTicker(every)
	defer tick.Stop()
	lastExtend := time.Now()
	for {
		select {
		case <-u.ctx.Done():
			return
		case <-tick.C:
		}
		if time.Since(lastExtend) >= s.cfg.LeaseTime/3 {
			err := s.store.ExtendLease(u.ctx, u.job.ID, u.block, u.worker, s.cfg.LeaseTime)
			switch {
			case errors.Is(err, ErrLeaseLost):
				u.cancel(ErrLeaseLost)
				return
			case err != nil:
				if u.ctx.Err() != nil {
					return
				}
				s.log.Warn("extend lease", "job", u.job.ID, "block", u.block, "err", err)
			default:
				lastExtend = time.Now()
			}
		}
		if s.pastDeadline(u.job, s.now()) {
			u.cancel(errDeadline)
			return
		}
		cur, err := s.store.GetJob(u.ctx, u.job.ID)
		switch {
		case errors.Is(err, ErrNotFound) || err == nil && cur.State.Terminal():
			u.cancel(errJobEnded)
			return
		case err != nil:
			continue
		}
		u.writePartial()
	}
}

// writePartial stores the newest partial result of a single-unit job.
func (u *unit) writePartial() {
	u.mu.Lock()
	r := u.partial
	u.partial = nil
	u.mu.Unlock()
	if r == nil {
		return
	}
	s := u.s
	_, err := s.store.UpdateJob(u.ctx, u.job.ID, func(cur *Job) error {
		if cur.State.Terminal() {
			return errNoChange
		}
		now := s.now()
		pr := *r
		pr.MethodReason = cur.MethodReason
		pr.State = string(cur.State)
		cur.Result, cur.ResultAt, cur.UpdatedAt = &pr, now, now
		return nil
	})
	if err == nil {
		if err := s.store.Notify(u.ctx, u.job.ID); err != nil {
			s.log.Warn("notify", "job", u.job.ID, "err", err)
		}
	}
}

// handBack releases a unit's lease so that another worker can claim it.
func (s *Service) handBack(ctx context.Context, j *Job, block int64, worker string) {
	rctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), handBackTime)
	defer cancel()
	if err := s.store.ReleaseBlock(rctx, j.ID, block, worker); err != nil && !errors.Is(err, ErrLeaseLost) {
		s.log.Warn("release block", "job", j.ID, "block", block, "err", err)
		return
	}
	if err := s.store.Notify(rctx, TopicQueue); err != nil {
		s.log.Warn("notify queue", "job", j.ID, "err", err)
	}
}

// blockOut is what a block goroutine hands back.
type blockOut struct {
	st      any
	samples int64
	err     error
}

// runBlock draws block b of a block-wise job under its lease, commits it
// and advances the job. An adaptive job's first block in this process
// learns the importance functions first (under the same lease).
func (s *Service) runBlock(ctx context.Context, j *Job, b int64, worker string) error {
	began := time.Now()
	log := s.log.With("job", j.ID)
	p, err := s.planOf(ctx, j)
	if err != nil {
		s.handBack(ctx, j, b, worker)
		return s.failIfBroken(ctx, j.ID, err)
	}
	started, err := s.markRunning(ctx, j)
	if err != nil {
		s.handBack(ctx, j, b, worker)
		return err
	}
	j = started
	if s.pastDeadline(j, s.now()) {
		s.handBack(ctx, j, b, worker)
		return s.endBlockwise(ctx, j.ID, StateSucceeded, sampling.ReasonTimeout)
	}
	u := s.startUnit(ctx, j, b, worker)
	out := make(chan blockOut, 1)
	// The block runs on its own goroutine so that cancellation, a lost
	// lease or shutdown end the unit at once; an abandoned block finishes
	// on its own (it is bounded by the block size) and is dropped.
	go func() {
		defer func() {
			if r := recover(); r != nil {
				log.Error("panic in block", "block", b, "panic", fmt.Sprint(r))
				log.Debug("panic stack", "stack", string(debug.Stack()))
				out <- blockOut{err: fmt.Errorf("internal error in block %d: %v", b, r)}
			}
		}()
		if s.hookUnit != nil {
			s.hookUnit(j, b)
		}
		bs, err := p.sampler(u.ctx)
		if err != nil {
			out <- blockOut{err: wrapRunError(err)}
			return
		}
		st, n := bs.runBlock(j, b)
		out <- blockOut{st: st, samples: n}
	}()
	var res blockOut
	select {
	case res = <-out:
	case <-u.ctx.Done():
	}
	cause := u.cause()
	u.stop()
	if cause != nil {
		return s.unitStopped(ctx, j, b, worker, cause, began)
	}
	if res.err != nil {
		s.obs.BlockDone(j.Method, OutcomeError, time.Since(began))
		return s.fail(ctx, j.ID, res.err)
	}
	s.obs.SamplesDrawn(j.Method, res.samples)
	data, err := json.Marshal(res.st)
	if err != nil {
		return s.fail(ctx, j.ID, fmt.Errorf("encode block %d: %w", b, err))
	}
	cctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), handBackTime)
	defer cancel()
	err = s.store.CommitBlock(cctx, j.ID, b, worker, data)
	if errors.Is(err, ErrLeaseLost) {
		// A job that ended meanwhile (its stopping rule held on earlier
		// blocks, or it was cancelled) drops all leases: that block was
		// simply not needed.
		outcome := OutcomeLostLease
		if cur, gerr := s.store.GetJob(cctx, j.ID); errors.Is(gerr, ErrNotFound) || gerr == nil && cur.State.Terminal() {
			outcome = OutcomeCancelled
		} else {
			log.Info("lease lost; block not committed", "block", b)
		}
		s.obs.BlockDone(j.Method, outcome, time.Since(began))
		return nil
	}
	if err != nil {
		return err
	}
	s.obs.BlockDone(j.Method, OutcomeCommitted, time.Since(began))
	_, err = s.advance(cctx, j.ID)
	return err
}

// unitStopped handles a unit ended early by cause.
func (s *Service) unitStopped(ctx context.Context, j *Job, b int64, worker string, cause error, began time.Time) error {
	d := time.Since(began)
	switch {
	case errors.Is(cause, ErrLeaseLost):
		s.log.Info("lease lost; unit stopped", "job", j.ID, "block", b)
		s.obs.BlockDone(j.Method, OutcomeLostLease, d)
		return nil
	case errors.Is(cause, errJobEnded):
		s.obs.BlockDone(j.Method, OutcomeCancelled, d)
		return nil
	case errors.Is(cause, errDeadline):
		if !j.Blockwise() {
			return s.deadlineUnit(ctx, j, worker, began)
		}
		s.obs.BlockDone(j.Method, OutcomeCancelled, d)
		s.handBack(ctx, j, b, worker)
		cctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), handBackTime)
		defer cancel()
		return s.endBlockwise(cctx, j.ID, StateSucceeded, sampling.ReasonTimeout)
	default: // the caller's context ended: shutdown
		s.obs.BlockDone(j.Method, OutcomeCancelled, d)
		s.handBack(ctx, j, b, worker)
		s.log.Info("unit handed back", "job", j.ID, "block", b)
		return ctx.Err()
	}
}
