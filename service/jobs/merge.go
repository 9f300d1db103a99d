package jobs

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"time"

	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/sampling"
)

// errNoChange is returned by update functions that find nothing to write.
var errNoChange = errors.New("no change")

// mergeBatch is the most block statistics one merge step reads.
const mergeBatch = 256

// maxMergeRounds bounds the rounds of one advance call.
const maxMergeRounds = 10_000

// advance merges the committed blocks of a block-wise job, strictly in
// block order, onto its merged statistics, checks the stopping rule after
// each block exactly as sampling.Run does, writes a partial result at most
// every PartialEvery and the final one when a rule holds. Any number of
// workers in any number of processes may call it at once: the merge
// happens inside UpdateJob from the stored record, and block statistics
// never change once committed. It reports whether it merged anything.
func (s *Service) advance(ctx context.Context, id string) (bool, error) {
	progressed := false
	for range maxMergeRounds {
		j, err := s.store.GetJob(ctx, id)
		if err != nil {
			return progressed, err
		}
		if j.State.Terminal() || !j.Blockwise() {
			return progressed, nil
		}
		p, err := s.planOf(ctx, j)
		if err != nil {
			return progressed, s.failIfBroken(ctx, id, err)
		}
		from := j.MergedBlocks
		raw, err := s.store.BlockStats(ctx, id, from, mergeBatch)
		if err != nil {
			return progressed, err
		}
		if len(raw) == 0 {
			// Another worker may have merged (and dropped) the blocks from
			// `from` on between the two reads: look again if so.
			again, err := s.store.GetJob(ctx, id)
			if err != nil {
				return progressed, err
			}
			if again.MergedBlocks != from && !again.State.Terminal() {
				continue
			}
			if !again.State.Terminal() && s.pastDeadline(again, s.now()) {
				return true, s.endBlockwise(ctx, id, StateSucceeded, sampling.ReasonTimeout)
			}
			return progressed, nil
		}
		stats := make([]*sampling.Stats, len(raw))
		for i, b := range raw {
			st := &sampling.Stats{}
			if err := json.Unmarshal(b, st); err != nil {
				return progressed, s.fail(ctx, id, fmt.Errorf("statistics of block %d are unreadable: %w", from+int64(i), err))
			}
			if err := p.kernel.CheckLayout(st); err != nil {
				return progressed, s.fail(ctx, id, fmt.Errorf("statistics of block %d: %w", from+int64(i), err))
			}
			stats[i] = st
		}
		finished := false
		updated, err := s.store.UpdateJob(ctx, id, func(cur *Job) error {
			finished = false
			if cur.State.Terminal() || cur.MergedBlocks < from || cur.MergedBlocks >= from+int64(len(stats)) {
				return errNoChange
			}
			now := s.now()
			var m *sampling.Stats
			if cur.Merged != nil {
				m = cur.Merged.Clone()
			} else {
				m = p.kernel.NewStats()
			}
			reason := ""
			for i := cur.MergedBlocks - from; i < int64(len(stats)); i++ {
				if err := m.Merge(stats[i]); err != nil {
					return err
				}
				cur.MergedBlocks++
				if reason = p.kernel.StopReason(m, cur.Stop); reason != "" {
					break
				}
			}
			cur.Merged = m
			cur.UpdatedAt = now
			if reason == "" && s.pastDeadline(cur, now) {
				reason = sampling.ReasonTimeout
			}
			if reason != "" {
				s.finalizeBlockwise(cur, p, StateSucceeded, reason, now)
				finished = true
				return nil
			}
			if now.Sub(cur.ResultAt) >= s.cfg.PartialEvery {
				cur.Result = s.blockwiseResult(cur, p, "", now)
				cur.ResultAt = now
			}
			return nil
		})
		if errors.Is(err, errNoChange) {
			continue
		}
		var unstorable *json.UnsupportedValueError
		if errors.As(err, &unstorable) {
			// A result the store cannot encode (a NaN) would fail every
			// merge of this job and stop every worker at it: fail the job.
			return progressed, s.fail(ctx, id, fmt.Errorf("the merged result cannot be stored: %w", err))
		}
		if err != nil {
			return progressed, err
		}
		progressed = true
		if finished {
			s.afterFinish(ctx, updated)
			return true, nil
		}
		if err := s.store.DropBlocks(ctx, id, updated.MergedBlocks); err != nil {
			s.log.Warn("drop merged blocks", "job", id, "err", err)
		}
		if err := s.store.Notify(ctx, id); err != nil {
			s.log.Warn("notify", "job", id, "err", err)
		}
		if len(raw) < mergeBatch {
			return true, nil
		}
	}
	return progressed, nil
}

// blockwiseResult is the result document of the merged prefix of a
// block-wise job, shaped as infer.Runner shapes it.
func (s *Service) blockwiseResult(j *Job, p *plan, reason string, now time.Time) *infer.Result {
	m := j.Merged
	if m == nil {
		m = p.kernel.NewStats()
	}
	est := p.kernel.Summarize(m, j.Stop)
	est.Seed = j.Seed
	est.StopReason = reason
	if !j.StartedAt.IsZero() {
		est.Elapsed = now.Sub(j.StartedAt)
	}
	res := infer.FromEstimate(p.net, p.targets, est, j.Method, j.MethodReason, j.Seed, j.Stop.Confidence)
	res.State = string(j.State)
	return res
}

// finalizeBlockwise ends a block-wise job record with the result of its
// merged prefix (and the MPE when asked for).
func (s *Service) finalizeBlockwise(j *Job, p *plan, st State, reason string, now time.Time) {
	res := s.blockwiseResult(j, p, reason, now)
	if j.Query.MPE {
		if err := s.runner.AddMPE(p.net, p.ev, res); err != nil {
			if st == StateSucceeded {
				j.Error = fmt.Sprintf("mpe: %v", err)
				st = StateFailed
			}
		}
	}
	j.Result, j.ResultAt = res, now
	setState(j, st, now)
}

// endBlockwise ends a block-wise job at once (deadline) with the result of
// its merged prefix.
func (s *Service) endBlockwise(ctx context.Context, id string, st State, reason string) error {
	j, err := s.store.GetJob(ctx, id)
	if err != nil {
		return err
	}
	p, err := s.planOf(ctx, j)
	if err != nil {
		return s.failIfBroken(ctx, id, err)
	}
	updated, err := s.store.UpdateJob(ctx, id, func(cur *Job) error {
		if cur.State.Terminal() {
			return errNoChange
		}
		s.finalizeBlockwise(cur, p, st, reason, s.now())
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

// fail ends a job in state failed with err's message.
func (s *Service) fail(ctx context.Context, id string, cause error) error {
	updated, err := s.store.UpdateJob(ctx, id, func(cur *Job) error {
		if cur.State.Terminal() {
			return errNoChange
		}
		cur.Error = cause.Error()
		setState(cur, StateFailed, s.now())
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

// failIfBroken fails the job when err says its model or query can no
// longer be resolved, and passes store trouble up.
func (s *Service) failIfBroken(ctx context.Context, id string, err error) error {
	if errors.Is(err, ErrUnavailable) || ctx.Err() != nil {
		return err
	}
	return s.fail(ctx, id, fmt.Errorf("cannot prepare the job: %w", err))
}

// pastDeadline reports whether a started job's deadline has passed.
func (s *Service) pastDeadline(j *Job, now time.Time) bool {
	return !j.Deadline.IsZero() && !now.Before(j.Deadline)
}

// timeLimit is a job's run time limit: its stop timeout capped by
// MaxJobTime.
func (s *Service) timeLimit(j *Job) time.Duration {
	if j.Stop.Timeout > 0 {
		return min(j.Stop.Timeout, s.cfg.MaxJobTime)
	}
	return s.cfg.MaxJobTime
}

// afterFinish does what follows a job's terminal transition, made by this
// process: drop its blocks, notify watchers, record metrics, log.
func (s *Service) afterFinish(ctx context.Context, j *Job) {
	if err := s.store.DropBlocks(ctx, j.ID, -1); err != nil {
		s.log.Warn("drop blocks", "job", j.ID, "err", err)
	}
	if err := s.store.Notify(ctx, j.ID); err != nil {
		s.log.Warn("notify", "job", j.ID, "err", err)
	}
	s.plans.drop(j.ID)
	rel, ess := accuracy(j)
	s.obs.JobFinished(j.Method, j.State, j.FinishedAt.Sub(j.CreatedAt), rel, ess)
	log := s.log.With("job", j.ID)
	args := []any{"state", string(j.State), "method", j.Method}
	if j.Result != nil {
		args = append(args, "stop_reason", j.Result.StopReason, "samples", j.Result.Samples)
	}
	if j.Error != "" {
		log.Warn("job finished", append(args, "error", truncate(j.Error, 300))...)
		return
	}
	log.Info("job finished", args...)
}

// accuracy is a finished sampling job's widest relative half-width over
// the reported marginals and its effective-sample ratio (NaN when not
// applicable).
func accuracy(j *Job) (rel, ess float64) {
	rel, ess = math.NaN(), math.NaN()
	r := j.Result
	if r == nil || j.Method == infer.MethodExact || r.Samples <= 0 {
		return rel, ess
	}
	for _, m := range r.Marginals {
		for _, iv := range m {
			if iv.P > 0 && iv.HalfWidth() > 0 {
				w := iv.HalfWidth() / iv.P
				if math.IsNaN(rel) || w > rel {
					rel = w
				}
			}
		}
	}
	return rel, r.EffectiveSamples / float64(r.Samples)
}

func truncate(s string, n int) string {
	if len(s) <= n {
		return s
	}
	return s[:n] + "…"
}
