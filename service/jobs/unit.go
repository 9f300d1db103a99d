package jobs

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"runtime/debug"
	"time"

	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/sampling"
)

// unitOutcome is what a single-unit job (exact inference, Gibbs sampling)
// commits as the statistics of its one block: the final result, or the
// error that failed the job. A unit committed twice keeps the first.
type unitOutcome struct {
	Result *infer.Result `json:"result,omitempty"`
	Error  string        `json:"error,omitempty"`
}

type unitResult struct {
	res *infer.Result
	err error
}

// runUnit runs a single-unit job (exact inference or Gibbs sampling) with
// infer.Runner, so that its result is the one `beliefd run` gives, under
// the lease of block 0. Adaptive importance sampling jobs are block-wise;
// a record stored as one unit by an earlier version still runs here.
func (s *Service) runUnit(ctx context.Context, j *Job, worker string) error {
	began := time.Now()
	log := s.log.With("job", j.ID)
	p, err := s.planOf(ctx, j)
	if err != nil {
		s.handBack(ctx, j, 0, worker)
		return s.failIfBroken(ctx, j.ID, err)
	}
	started, err := s.markRunning(ctx, j)
	if err != nil {
		s.handBack(ctx, j, 0, worker)
		return err
	}
	j = started
	if s.pastDeadline(j, s.now()) {
		return s.deadlineUnit(ctx, j, worker, began)
	}
	q := cloneQuery(&j.Query)
	seed := j.Seed
	q.Method, q.Seed, q.Priority, q.IdempotencyKey = j.Method, &seed, "", ""
	u := s.startUnit(ctx, j, 0, worker)
	var progress func(*infer.Result)
	if j.Method == infer.MethodGibbs || j.Method == infer.MethodAdaptive {
		progress = u.offer
	}
	out := make(chan unitResult, 1)
	// Exact inference cannot be interrupted: it runs on its own goroutine,
	// which is abandoned (and finishes on its own) when the unit ends early.
	go func() {
		defer func() {
			if r := recover(); r != nil {
				log.Error("panic in work unit", "method", j.Method, "panic", fmt.Sprint(r))
				log.Debug("panic stack", "stack", string(debug.Stack()))
				out <- unitResult{err: fmt.Errorf("internal error in %s: %v", j.Method, r)}
			}
		}()
		if s.hookUnit != nil {
			s.hookUnit(j, 0)
		}
		res, err := s.unitRn.Run(u.ctx, p.net, q, progress)
		out <- unitResult{res: res, err: err}
	}()
	var r unitResult
	got := false
	select {
	case r = <-out:
		got = true
	case <-u.ctx.Done():
		if j.Method == infer.MethodGibbs || j.Method == infer.MethodAdaptive {
			// Gibbs and adaptive importance sampling end promptly with
			// their partial estimates.
			r, got = <-out, true
		}
	}
	cause := u.cause()
	u.stop()
	switch {
	case cause == nil:
	case errors.Is(cause, errDeadline) && got && r.err == nil && r.res != nil:
		if r.res.StopReason == sampling.ReasonCancelled {
			r.res.StopReason = sampling.ReasonTimeout
		}
	case errors.Is(cause, errDeadline):
		return s.deadlineUnit(ctx, j, worker, began)
	default:
		return s.unitStopped(ctx, j, 0, worker, cause, began)
	}
	var o unitOutcome
	if r.err != nil {
		o.Error = wrapRunError(r.err).Error()
	} else {
		r.res.MethodReason = j.MethodReason
		o.Result = r.res
	}
	return s.commitUnit(ctx, j, worker, &o, began)
}

// deadlineUnit ends a single-unit job whose deadline passed: a Gibbs job
// keeps its latest partial result with stop reason "timeout"; an exact job
// fails.
func (s *Service) deadlineUnit(ctx context.Context, j *Job, worker string, began time.Time) error {
	cur, err := s.store.GetJob(ctx, j.ID)
	if err != nil {
		return err
	}
	var o unitOutcome
	if (j.Method == infer.MethodGibbs || j.Method == infer.MethodAdaptive) && cur.Result != nil {
		r := *cur.Result
		r.StopReason = sampling.ReasonTimeout
		o.Result = &r
	} else {
		o.Error = fmt.Sprintf("%s did not finish within the job's time limit of %s", j.Method, s.timeLimit(j))
	}
	s.obs.BlockDone(j.Method, OutcomeCancelled, time.Since(began))
	return s.commitUnit(ctx, j, worker, &o, time.Time{})
}

// commitUnit commits a unit's outcome under the lease and, if the commit
// holds, records it in the job. began is zero when the outcome was already
// reported to the observer.
func (s *Service) commitUnit(ctx context.Context, j *Job, worker string, o *unitOutcome, began time.Time) error {
	data, err := json.Marshal(o)
	if err != nil {
		return s.fail(ctx, j.ID, fmt.Errorf("encode result: %w", err))
	}
	cctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), handBackTime)
	defer cancel()
	err = s.store.CommitBlock(cctx, j.ID, 0, worker, data)
	if errors.Is(err, ErrLeaseLost) {
		s.log.Info("lease lost; unit not committed", "job", j.ID)
		if !began.IsZero() {
			s.obs.BlockDone(j.Method, OutcomeLostLease, time.Since(began))
		}
		return nil
	}
	if err != nil {
		return err
	}
	if !began.IsZero() {
		outcome := OutcomeCommitted
		if o.Error != "" {
			outcome = OutcomeError
		}
		s.obs.BlockDone(j.Method, outcome, time.Since(began))
		if o.Result != nil && j.Method != infer.MethodExact {
			s.obs.SamplesDrawn(j.Method, o.Result.Samples)
		}
	}
	return s.finishUnit(cctx, j.ID, o)
}

// finishUnit records a committed unit outcome in its job.
func (s *Service) finishUnit(ctx context.Context, id string, o *unitOutcome) error {
	updated, err := s.store.UpdateJob(ctx, id, func(cur *Job) error {
		if cur.State.Terminal() {
			return errNoChange
		}
		now := s.now()
		if o.Error != "" {
			cur.Error = o.Error
			setState(cur, StateFailed, now)
			return nil
		}
		r := *o.Result
		cur.Result, cur.ResultAt = &r, now
		setState(cur, StateSucceeded, now)
		return nil
	})
	if errors.Is(err, errNoChange) {
		return nil
	}
	if err != nil {
		return err
	}
	s.afterFinish(ctx, updated)
	return nil
}

// recoverUnit records the outcome of a unit that was committed by a worker
// that stopped before recording it in the job.
func (s *Service) recoverUnit(ctx context.Context, j *Job) (bool, error) {
	raw, err := s.store.BlockStats(ctx, j.ID, 0, 1)
	if err != nil || len(raw) == 0 {
		return false, err
	}
	var o unitOutcome
	if err := json.Unmarshal(raw[0], &o); err != nil || (o.Result == nil && o.Error == "") {
		return true, s.fail(ctx, j.ID, fmt.Errorf("the committed result is unreadable"))
	}
	return true, s.finishUnit(ctx, j.ID, &o)
}
