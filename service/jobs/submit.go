package jobs

import (
	"context"
	crand "crypto/rand"
	"encoding/binary"
	"encoding/hex"
	"errors"
	"fmt"
	"maps"
	"slices"

	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
	"github.com/beliefd/beliefd/service/sampling/gibbs"
)

// MaxIdempotencyKeyLen bounds idempotency keys.
const MaxIdempotencyKeyLen = 256

// plan is a job resolved against its network: what a worker needs to run
// and merge its work. It is immutable once built.
type plan struct {
	net     *model.Network
	ev      *model.Evidence
	targets []int
	kernel  *sampling.Kernel // block-wise jobs only
}

// Submit validates q against its model now (unknown variables or states,
// a bad stopping rule, the method: "auto" becomes exact inference,
// adaptive importance sampling or likelihood weighting, Gibbs
// reducibility), draws a seed when q has none, plans the work (blocks of
// sampling.DefaultBlockSize samples for forward, rejection and likelihood
// weighting; one unit for exact inference, Gibbs sampling and adaptive
// importance sampling) and queues the job. A query whose idempotency key names a
// job still kept returns that job with created == false. When the queue
// holds Config.MaxUnfinished unfinished jobs it fails with ErrQueueFull.
func (s *Service) Submit(ctx context.Context, q *infer.Query) (*Job, bool, error) {
	j, p, err := s.plan(ctx, q)
	if err != nil {
		return nil, false, fmt.Errorf("submit: %w", err)
	}
	stored, created, err := s.store.CreateJob(ctx, j, s.cfg.MaxUnfinished)
	if err != nil {
		return nil, false, fmt.Errorf("submit: %w", err)
	}
	if !created {
		return mirror(stored), false, nil
	}
	s.plans.put(stored.ID, p)
	s.obs.JobSubmitted(stored.Method)
	s.log.Info("job submitted", "job", stored.ID, "model", stored.Model.Name, "version", stored.Model.Version,
		"method", stored.Method, "blocks", stored.Blocks, "priority", stored.Priority.String())
	if err := s.store.Notify(ctx, TopicQueue); err != nil {
		s.log.Warn("notify queue", "job", stored.ID, "err", err)
	}
	return mirror(stored), true, nil
}

// plan builds the job record of a query.
func (s *Service) plan(ctx context.Context, q *infer.Query) (*Job, *plan, error) {
	if q == nil {
		return nil, nil, fmt.Errorf("%w: no query", infer.ErrBadQuery)
	}
	qc := cloneQuery(q)
	if err := qc.Validate(); err != nil {
		return nil, nil, err
	}
	stop, err := qc.Stop.Sampling()
	if err != nil {
		return nil, nil, err
	}
	prio, err := ParsePriority(qc.Priority)
	if err != nil {
		return nil, nil, err
	}
	if len(qc.IdempotencyKey) > MaxIdempotencyKeyLen {
		return nil, nil, fmt.Errorf("%w: idempotency_key of %d bytes exceeds %d", infer.ErrBadQuery, len(qc.IdempotencyKey), MaxIdempotencyKeyLen)
	}
	info, net, err := s.resolveModel(ctx, qc.Model)
	if err != nil {
		return nil, nil, err
	}
	ev, err := net.ResolveEvidence(qc.Evidence, qc.SoftEvidence)
	if err != nil {
		return nil, nil, err
	}
	targets, err := net.ResolveTargets(qc.Targets, ev)
	if err != nil {
		return nil, nil, err
	}
	var seed uint64
	if qc.Seed != nil {
		seed = *qc.Seed
	} else {
		seed = drawSeed()
		qc.Seed = &seed
	}
	method, reason, err := s.runner.ChooseQueryMethod(ctx, net, qc, ev, targets, seed)
	if err != nil {
		return nil, nil, err
	}
	p := &plan{net: net, ev: ev, targets: targets}
	now := s.now()
	j := &Job{
		ID: newJobID(), State: StateQueued, Priority: prio, Query: *qc, Model: info,
		Method: method, MethodReason: reason, Seed: seed, Stop: stop, Blocks: 1,
		IdempotencyKey: qc.IdempotencyKey, CreatedAt: now, UpdatedAt: now, Retention: s.cfg.Retention,
	}
	switch method {
	case infer.MethodExact:
	case infer.MethodAdaptive:
		// One unit, like Gibbs sampling: its learning phase runs first.
		if _, err := infer.AdaptiveOptionsFor(net, qc, ev, targets); err != nil {
			return nil, nil, err
		}
	case infer.MethodGibbs:
		if err := checkGibbs(net, ev, targets, seed, stop); err != nil {
			return nil, nil, err
		}
	default:
		k, err := sampling.NewKernel(net, ev, method, targets)
		if err != nil {
			return nil, nil, wrapRunError(err)
		}
		p.kernel = k
		j.BlockSize = sampling.DefaultBlockSize
		j.Blocks = sampling.NumBlocks(stop.MaxSamples, j.BlockSize)
	}
	if qc.MPE && method != infer.MethodExact {
		if _, _, err := s.runner.ChooseMethod(net, infer.MethodExact); err != nil {
			return nil, nil, fmt.Errorf("mpe needs exact inference: %w", err)
		}
	}
	return j, p, nil
}

// checkGibbs runs the checks of a Gibbs run that need no sampling (options,
// stopping rule, reducibility, a starting state) on a cancelled context, on
// a sample budget capped so that the check allocates little.
func checkGibbs(net *model.Network, ev *model.Evidence, targets []int, seed uint64, stop sampling.Stop) error {
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	probe := sampling.Stop{MaxSamples: min(stop.MaxSamples, 4096), Confidence: stop.Confidence}
	_, err := gibbs.Run(ctx, net, ev, targets, gibbs.Options{Seed: seed, Stop: probe, Workers: 1})
	if errors.Is(err, gibbs.ErrImpossibleEvidence) {
		return fmt.Errorf("%w: %w", infer.ErrBadQuery, err)
	}
	return err
}

// cloneQuery copies q deeply, so that the job record shares nothing with
// the caller.
func cloneQuery(q *infer.Query) *infer.Query {
	c := *q
	c.Evidence = maps.Clone(q.Evidence)
	if q.SoftEvidence != nil {
		c.SoftEvidence = make(map[string][]float64, len(q.SoftEvidence))
		for k, v := range q.SoftEvidence {
			c.SoftEvidence[k] = slices.Clone(v)
		}
	}
	c.Targets = slices.Clone(q.Targets)
	if q.Adaptive != nil {
		a := *q.Adaptive
		a.RareTargets = slices.Clone(q.Adaptive.RareTargets)
		if q.Adaptive.EpsDelta != nil {
			e := *q.Adaptive.EpsDelta
			a.EpsDelta = &e
		}
		c.Adaptive = &a
	}
	if q.Seed != nil {
		seed := *q.Seed
		c.Seed = &seed
	}
	return &c
}

// drawSeed draws a seed as infer.Runner does: 53 random bits, so that it
// stays exact in JSON numbers.
func drawSeed() uint64 {
	var b [8]byte
	_, _ = crand.Read(b[:])
	return binary.LittleEndian.Uint64(b[:]) >> 11
}

func newJobID() string {
	var b [12]byte
	_, _ = crand.Read(b[:])
	return "j" + hex.EncodeToString(b[:])
}

// planOf returns the resolved plan of a job, building it when this process
// has not seen the job yet.
func (s *Service) planOf(ctx context.Context, j *Job) (*plan, error) {
	if p, ok := s.plans.get(j.ID); ok {
		return p, nil
	}
	net, err := s.network(ctx, j.Model)
	if err != nil {
		return nil, err
	}
	ev, err := net.ResolveEvidence(j.Query.Evidence, j.Query.SoftEvidence)
	if err != nil {
		return nil, err
	}
	targets, err := net.ResolveTargets(j.Query.Targets, ev)
	if err != nil {
		return nil, err
	}
	p := &plan{net: net, ev: ev, targets: targets}
	if j.Blockwise() {
		if p.kernel, err = sampling.NewKernel(net, ev, j.Method, targets); err != nil {
			return nil, err
		}
	}
	s.plans.put(j.ID, p)
	return p, nil
}
