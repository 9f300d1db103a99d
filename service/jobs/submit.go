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
	kernel  *sampling.Kernel // forward, rejection and likelihood-weighting jobs
	// adaptive holds an adaptive importance sampling job's options and,
	// once learned in this process, its sampler.
	adaptive *adaptivePlan
}

// Submit validates q against its model now (unknown variables or states,
// a bad stopping rule, the method: "auto" becomes exact inference,
// adaptive importance sampling or likelihood weighting, Gibbs
// reducibility), draws a seed when q has none, plans the work (blocks of
// sampling.DefaultBlockSize samples for forward, rejection, likelihood
// weighting and adaptive importance sampling; one unit for exact inference
// and Gibbs sampling) and queues the job. A query whose idempotency key names a
// job still kept returns that job with created == false. When the queue
// holds Config.MaxUnfinished unfinished jobs it fails with ErrQueueFull.
func (s *Service) Submit(ctx context.Context, q *infer.Query) (*Job, bool, error) {
	j, p, err := s.plan(ctx, q)
	if err != nil {
		return nil, false, fmt.Errorf("submit: %w", err)
	}
	stored, created, err := s.store.CreateJob(ctx, j, CreateLimits{
		MaxUnfinished: s.cfg.MaxUnfinished, TenantMaxUnfinished: s.policy(j.Tenant).MaxUnfinished,
	})
	if err != nil {
		return nil, false, fmt.Errorf("submit: %w", err)
	}
	if !created && stored.Tenant != j.Tenant {
		// Idempotency keys are each tenant's own: another tenant's job is
		// never handed out for one.
		return nil, false, fmt.Errorf("submit: %w: idempotency_key %q is taken; choose another (a random one, such as a UUID)", infer.ErrBadQuery, j.IdempotencyKey)
	}
	if !created {
		return mirror(stored), false, nil
	}
	s.plans.put(stored.ID, p)
	s.obs.JobSubmitted(stored.Method)
	s.log.Info("job submitted", "job", stored.ID, "tenant", stored.Tenant, "model", stored.Model.Name, "version", stored.Model.Version,
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
	caller := principal(ctx)
	if err := s.limitSamples(caller, &qc.Stop); err != nil {
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
		ID: newJobID(), Tenant: caller.Tenant, State: StateQueued, Priority: prio, Query: *qc, Model: info,
		Method: method, MethodReason: reason, Seed: seed, Stop: stop, Blocks: 1,
		IdempotencyKey: qc.IdempotencyKey, CreatedAt: now, UpdatedAt: now, Retention: s.cfg.Retention,
	}
	switch method {
	case infer.MethodExact:
	case infer.MethodAdaptive:
		// Blocks, like likelihood weighting. The learning phase runs in
		// the first worker process that needs it (see adaptivePlan), not
		// here; the blocks past the samples left after the initial block
		// draw nothing and are never merged (the sample cap stops the
		// run first).
		ap, err := newAdaptivePlan(net, qc, ev, targets, seed, stop)
		if err != nil {
			return nil, nil, err
		}
		p.adaptive = ap
		j.BlockSize = sampling.DefaultBlockSize
		j.Blocks = sampling.NumBlocks(stop.MaxSamples, j.BlockSize)
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
	// The record names its model as the job's tenant does (scope.go).
	info := j.Model
	if stored, ok := (Principal{Tenant: j.Tenant, Admin: true}).storeName(info.Name); ok {
		info.Name = stored
	}
	net, err := s.network(ctx, info)
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
	switch {
	case !j.Blockwise():
	case j.Method == infer.MethodAdaptive:
		if p.adaptive, err = newAdaptivePlan(net, &j.Query, ev, targets, j.Seed, j.Stop); err != nil {
			return nil, err
		}
	default:
		if p.kernel, err = sampling.NewKernel(net, ev, j.Method, targets); err != nil {
			return nil, err
		}
	}
	s.plans.put(j.ID, p)
	return p, nil
}

// newAdaptivePlan resolves the adaptive options of a query, as
// infer.Runner does, for the job's seed and stopping rule.
func newAdaptivePlan(net *model.Network, q *infer.Query, ev *model.Evidence, targets []int, seed uint64, stop sampling.Stop) (*adaptivePlan, error) {
	opt, err := infer.AdaptiveOptionsFor(net, q, ev, targets)
	if err != nil {
		return nil, err
	}
	opt.Seed, opt.Stop = seed, stop
	return &adaptivePlan{net: net, ev: ev, targets: targets, opt: opt}, nil
}
