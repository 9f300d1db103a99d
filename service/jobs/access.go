package jobs

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/beliefd/beliefd/service/sampling"
)

// watchPoll is how often Watch re-reads a job when no notification came.
const watchPoll = time.Second

// Get returns a job of the caller's tenant (of any tenant for an admin).
// Its Result (partial while the job runs) carries the job's state.
func (s *Service) Get(ctx context.Context, id string) (*Job, error) {
	j, err := s.store.GetJob(ctx, id)
	j, err = scopeJob(ctx, "get job", id, j, err)
	if err != nil {
		return nil, err
	}
	return mirror(j), nil
}

// List returns the jobs of the caller's tenant (of every tenant for an
// admin) newest first, a page at a time. pageToken is "" for the
// first page, else the token the previous page returned; the returned token
// is "" after the last page.
func (s *Service) List(ctx context.Context, pageToken string, pageSize int) ([]*Job, string, error) {
	after, err := decodeToken(pageToken)
	if err != nil {
		return nil, "", fmt.Errorf("list jobs: %w", err)
	}
	size := pageSizeOf(pageSize)
	tenant := AllTenants
	if p := principal(ctx); !p.Admin {
		tenant = p.Tenant
	}
	js, err := s.store.ListJobs(ctx, tenant, after, size+1)
	if err != nil {
		return nil, "", fmt.Errorf("list jobs: %w", err)
	}
	next := ""
	if len(js) > size {
		js = js[:size]
		next = encodeToken(js[size-1].ID)
	}
	for i, j := range js {
		js[i] = mirror(j)
	}
	return js, next, nil
}

// Cancel ends a queued or running job in state cancelled. A sampling job
// keeps the result of the blocks merged so far, with stop reason
// "cancelled"; a Gibbs job keeps its latest partial result. Workers notice
// within a quarter of a second and stop. A job already finished is
// returned unchanged.
func (s *Service) Cancel(ctx context.Context, id string) (*Job, error) {
	j, err := s.store.GetJob(ctx, id)
	j, err = scopeJob(ctx, "cancel job", id, j, err)
	if err != nil {
		return nil, err
	}
	if j.State.Terminal() {
		return mirror(j), nil
	}
	var p *plan
	if j.Blockwise() {
		if p, err = s.planOf(ctx, j); err != nil {
			s.log.Warn("cancel: cannot summarise merged blocks", "job", id, "err", err)
			p = nil
		}
	}
	updated, err := s.store.UpdateJob(ctx, id, func(cur *Job) error {
		if cur.State.Terminal() {
			return errNoChange
		}
		now := s.now()
		if p != nil {
			s.finalizeBlockwise(cur, p, StateCancelled, sampling.ReasonCancelled, now)
			return nil
		}
		if cur.Result != nil {
			r := *cur.Result
			r.StopReason = sampling.ReasonCancelled
			cur.Result, cur.ResultAt = &r, now
		}
		setState(cur, StateCancelled, now)
		return nil
	})
	if errors.Is(err, errNoChange) {
		return s.Get(ctx, id)
	}
	if err != nil {
		return nil, fmt.Errorf("cancel job %q: %w", id, err)
	}
	s.afterFinish(ctx, updated)
	return mirror(updated), nil
}

// Watch returns a channel that receives the job now and then after each
// change. A slow reader gets the newest record, not a backlog (one-slot
// channel, drained and refilled). The channel is closed after a terminal
// state has been delivered, when the job disappears, or when ctx ends.
func (s *Service) Watch(ctx context.Context, id string) (<-chan *Job, error) {
	// Subscribe before the first read, so that a change between the read
	// and the subscription is not missed until the next poll.
	sig, unsubscribe, err := s.store.Subscribe(ctx, id)
	if err != nil {
		// Notifications are best effort: fall back to polling.
		s.log.Warn("watch: subscribe failed; polling", "job", id, "err", err)
		sig, unsubscribe = nil, func() {}
	}
	j, err := s.store.GetJob(ctx, id)
	j, err = scopeJob(ctx, "watch job", id, j, err)
	if err != nil {
		unsubscribe()
		return nil, err
	}
	out := make(chan *Job, 1)
	send := func(j *Job) {
		// Only this goroutine sends, so after the drain the slot is free.
		select {
		case <-out:
		default:
		}
		out <- mirror(j)
	}
	go func() {
		defer close(out)
		defer unsubscribe()
		send(j)
		if j.State.Terminal() {
			return
		}
		last := j
		tick := time.NewTicker(watchPoll)
		defer tick.Stop()
		for {
			select {
			case <-ctx.Done():
				return
			case <-sig:
			case <-tick.C:
			}
			cur, err := s.store.GetJob(ctx, id)
			if errors.Is(err, ErrNotFound) {
				return
			}
			if err != nil {
				continue
			}
			if cur.State != last.State || !cur.UpdatedAt.Equal(last.UpdatedAt) || cur.MergedBlocks != last.MergedBlocks {
				send(cur)
				last = cur
			}
			if cur.State.Terminal() {
				return
			}
		}
	}()
	return out, nil
}

// mirror makes j.Result carry j's state, copying the result if needed
// (results are replaced, never changed in place).
func mirror(j *Job) *Job {
	if j != nil && j.Result != nil && j.Result.State != string(j.State) {
		r := *j.Result
		r.State = string(j.State)
		j.Result = &r
	}
	return j
}

// setState moves a record to state st at now, keeping Result.State in step.
func setState(j *Job, st State, now time.Time) {
	j.State = st
	j.UpdatedAt = now
	if st.Terminal() && j.FinishedAt.IsZero() {
		j.FinishedAt = now
	}
	mirror(j)
}
