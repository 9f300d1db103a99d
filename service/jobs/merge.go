package jobs

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"sync"
	"time"

	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
	"github.com/beliefd/beliefd/service/sampling/adaptive"
)

// blockSampler is what running and merging the blocks of a block-wise job
// needs from its sampler: likelihood weighting and its relatives
// (*sampling.Kernel, statistics *sampling.Stats in Job.Merged) or adaptive
// importance sampling (*adaptive.Sampler, statistics *adaptive.Stats in
// Job.MergedAdaptive). Statistics pass through as `any` of the sampler's
// own type.
type blockSampler interface {
	// runBlock draws block b of job j and returns its statistics and the
	// samples drawn.
	runBlock(j *Job, b int64) (any, int64)
	// decode reads committed block statistics and checks their layout.
	decode(raw []byte) (any, error)
	// merged returns a copy of the job's merged statistics, or the
	// statistics a merge starts from.
	merged(j *Job) any
	// merge adds the statistics of block b into m.
	merge(m, blk any, b int64) error
	stopReason(m any, stop sampling.Stop) string
	summarize(m any, stop sampling.Stop) *sampling.Estimate
	// store puts m into the job record.
	store(j *Job, m any)
}

// kernelBlocks runs forward, rejection and likelihood-weighting jobs.
type kernelBlocks struct{ k *sampling.Kernel }

func (kb kernelBlocks) runBlock(j *Job, b int64) (any, int64) {
	n := sampling.BlockLen(b, j.BlockSize, j.Stop.MaxSamples)
	st := kb.k.NewStats()
	kb.k.RunBlock(j.Seed, b, n, st)
	return st, int64(n)
}

func (kb kernelBlocks) decode(raw []byte) (any, error) {
	st := &sampling.Stats{}
	if err := json.Unmarshal(raw, st); err != nil {
		return nil, err
	}
	return st, kb.k.CheckLayout(st)
}

func (kb kernelBlocks) merged(j *Job) any {
	if j.Merged != nil {
		return j.Merged.Clone()
	}
	return kb.k.NewStats()
}

func (kb kernelBlocks) merge(m, blk any, _ int64) error {
	return m.(*sampling.Stats).Merge(blk.(*sampling.Stats))
}

func (kb kernelBlocks) stopReason(m any, stop sampling.Stop) string {
	return kb.k.StopReason(m.(*sampling.Stats), stop)
}

func (kb kernelBlocks) summarize(m any, stop sampling.Stop) *sampling.Estimate {
	return kb.k.Summarize(m.(*sampling.Stats), stop)
}

func (kb kernelBlocks) store(j *Job, m any) { j.Merged = m.(*sampling.Stats) }

// adaptiveBlocks runs adaptive importance sampling jobs: the importance
// functions are learned once per process (deterministically from the
// seed, so every process learns the same bits) and then frozen; block b
// draws from them exactly as adaptive.Sampler.Run does, and merges start
// from the sampler's initial block.
type adaptiveBlocks struct{ s *adaptive.Sampler }

func (ab adaptiveBlocks) runBlock(j *Job, b int64) (any, int64) {
	n := sampling.BlockLen(b, j.BlockSize, ab.s.Remaining(j.Stop))
	st := ab.s.NewStats()
	ab.s.RunBlock(j.Seed, b, n, st)
	return st, int64(n) * int64(ab.s.Tracks())
}

func (ab adaptiveBlocks) decode(raw []byte) (any, error) {
	st := &adaptive.Stats{}
	if err := json.Unmarshal(raw, st); err != nil {
		return nil, err
	}
	return st, ab.s.CheckLayout(st)
}

func (ab adaptiveBlocks) merged(j *Job) any {
	if j.MergedAdaptive != nil {
		return j.MergedAdaptive.Clone()
	}
	return ab.s.InitialStats()
}

func (ab adaptiveBlocks) merge(m, blk any, b int64) error {
	return ab.s.MergeBlock(m.(*adaptive.Stats), blk.(*adaptive.Stats), b)
}

func (ab adaptiveBlocks) stopReason(m any, stop sampling.Stop) string {
	return ab.s.StopReason(m.(*adaptive.Stats), stop)
}

func (ab adaptiveBlocks) summarize(m any, stop sampling.Stop) *sampling.Estimate {
	return ab.s.Summarize(m.(*adaptive.Stats), stop).Estimate
}

func (ab adaptiveBlocks) store(j *Job, m any) { j.MergedAdaptive = m.(*adaptive.Stats) }

// adaptivePlan learns the importance functions of an adaptive job the
// first time this process needs them and keeps them with the plan (so
// for as long as the plan cache keeps the job). Learning depends on the
// query, the model and the seed only: every worker process that learns
// them gets the same bits, so nothing needs to be stored in the job.
type adaptivePlan struct {
	net     *model.Network
	ev      *model.Evidence
	targets []int
	opt     adaptive.Options

	mu      sync.Mutex
	sampler *adaptive.Sampler
}

// get returns the learned sampler, learning it when this process has not
// yet. Concurrent callers wait for one learning run; a failed or
// cancelled one is not kept.
func (ap *adaptivePlan) get(ctx context.Context) (*adaptive.Sampler, error) {
	ap.mu.Lock()
	defer ap.mu.Unlock()
	if ap.sampler != nil {
		return ap.sampler, nil
	}
	s, err := adaptive.NewSampler(ctx, ap.net, ap.ev, ap.targets, ap.opt)
	if err != nil {
		return nil, err
	}
	ap.sampler = s
	return s, nil
}

// ready returns the sampler when it has been learned already.
func (ap *adaptivePlan) ready() (*adaptive.Sampler, bool) {
	ap.mu.Lock()
	defer ap.mu.Unlock()
	return ap.sampler, ap.sampler != nil
}

// sampler returns the block sampler of a block-wise job's plan, learning
// the importance functions of an adaptive job when needed.
func (p *plan) sampler(ctx context.Context) (blockSampler, error) {
	if p.adaptive == nil {
		return kernelBlocks{p.kernel}, nil
	}
	s, err := p.adaptive.get(ctx)
	if err != nil {
		return nil, err
	}
	return adaptiveBlocks{s}, nil
}

// readySampler is sampler without learning: false when an adaptive job's
// importance functions have not been learned in this process.
func (p *plan) readySampler() (blockSampler, bool) {
	if p.adaptive == nil {
		return kernelBlocks{p.kernel}, true
	}
	s, ok := p.adaptive.ready()
	if !ok {
		return nil, false
	}
	return adaptiveBlocks{s}, true
}

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
		bs, err := p.sampler(ctx)
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
		stats := make([]any, len(raw))
		for i, b := range raw {
			st, err := bs.decode(b)
			var syntax *json.SyntaxError
			var typ *json.UnmarshalTypeError
			if errors.As(err, &syntax) || errors.As(err, &typ) {
				return progressed, s.fail(ctx, id, fmt.Errorf("statistics of block %d are unreadable: %w", from+int64(i), err))
			}
			if err != nil {
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
			m := bs.merged(cur)
			reason := ""
			for i := cur.MergedBlocks - from; i < int64(len(stats)); i++ {
				if err := bs.merge(m, stats[i], cur.MergedBlocks); err != nil {
					return err
				}
				cur.MergedBlocks++
				if reason = bs.stopReason(m, cur.Stop); reason != "" {
					break
				}
			}
			bs.store(cur, m)
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
				cur.Result = s.blockwiseResult(cur, bs, p, "", now)
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
func (s *Service) blockwiseResult(j *Job, bs blockSampler, p *plan, reason string, now time.Time) *infer.Result {
	est := bs.summarize(bs.merged(j), j.Stop)
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
// merged prefix (and the MPE when asked for). A process that has not
// learned an adaptive job's importance functions (one that only serves
// the API, say) keeps the job's latest partial result instead.
func (s *Service) finalizeBlockwise(j *Job, p *plan, st State, reason string, now time.Time) {
	var res *infer.Result
	if bs, ok := p.readySampler(); ok {
		res = s.blockwiseResult(j, bs, p, reason, now)
	} else if j.Result != nil {
		r := *j.Result
		r.StopReason = reason
		r.State = string(j.State)
		res = &r
	}
	if res != nil && j.Query.MPE {
		if err := s.runner.AddMPE(p.net, p.ev, res); err != nil {
			if st == StateSucceeded {
				j.Error = fmt.Sprintf("mpe: %v", err)
				st = StateFailed
			}
		}
	}
	if res != nil {
		j.Result, j.ResultAt = res, now
	}
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
	if _, err := p.sampler(ctx); err != nil {
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
