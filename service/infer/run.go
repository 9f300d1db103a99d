package infer

import (
	"context"
	crand "crypto/rand"
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"sync"
	"time"

	"github.com/beliefd/beliefd/service/exact"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
	"github.com/beliefd/beliefd/service/sampling/adaptive"
	"github.com/beliefd/beliefd/service/sampling/gibbs"
)

// Options configure a Runner. Zero values take the documented defaults.
type Options struct {
	// ExactMaxEntries bounds the junction-tree size (total table entries)
	// that exact inference accepts; 0 means exact.DefaultMaxEntries.
	ExactMaxEntries int
	// Workers is the number of sampling goroutines; 0 means GOMAXPROCS.
	Workers int
	// ProgressEvery is the interval between partial results; 0 means 250ms.
	ProgressEvery time.Duration
	// EngineCache is how many compiled exact engines are kept; 0 means 32.
	EngineCache int
}

// Runner answers queries. It is safe for concurrent use and keeps compiled
// exact-inference engines of recently used models.
type Runner struct {
	opt     Options
	mu      sync.Mutex
	engines map[string]*exact.Engine
}

// NewRunner returns a Runner with the given options.
func NewRunner(opt Options) *Runner {
	if opt.EngineCache <= 0 {
		opt.EngineCache = 32
	}
	if opt.ProgressEvery <= 0 {
		opt.ProgressEvery = 250 * time.Millisecond
	}
	return &Runner{opt: opt, engines: map[string]*exact.Engine{}}
}

// engine returns the compiled exact engine of net, or the reason it cannot
// be used (a *exact.TooCostlyError).
func (r *Runner) engine(net *model.Network) (*exact.Engine, error) {
	key := net.Hash
	r.mu.Lock()
	eng, ok := r.engines[key]
	r.mu.Unlock()
	if ok {
		return eng, nil
	}
	eng, err := exact.Compile(net, exact.Options{MaxEntries: r.opt.ExactMaxEntries})
	if err != nil {
		return nil, err
	}
	r.mu.Lock()
	if len(r.engines) >= r.opt.EngineCache {
		for k := range r.engines { // evict one at random
			delete(r.engines, k)
			break
		}
	}
	r.engines[key] = eng
	r.mu.Unlock()
	return eng, nil
}

// choose resolves "auto" and returns the method with the reason it was picked.
func (r *Runner) choose(net *model.Network, method string) (string, string, *exact.Engine, error) {
	switch method {
	case MethodExact:
		eng, err := r.engine(net)
		if err != nil {
			return "", "", nil, err
		}
		return MethodExact, "requested", eng, nil
	case MethodAuto, "":
		eng, err := r.engine(net)
		if err == nil {
			c := eng.Cost()
			return MethodExact, fmt.Sprintf("auto: exact inference fits (junction tree of %d table entries, largest clique %d)", c.TotalEntries, c.LargestClique), eng, nil
		}
		var tc *exact.TooCostlyError
		if errors.As(err, &tc) {
			return MethodLikelihoodWeighting, fmt.Sprintf("auto: exact inference would need about %.3g table entries (limit %d); sampling instead", float64(tc.Estimate.TotalEntries), tc.Limit), nil, nil
		}
		return "", "", nil, err
	}
	return method, "requested", nil, nil
}

// Run answers q on net. progress, when not nil, receives partial results
// while a sampler runs. Cancelling ctx ends a sampler early with its
// partial result and stop reason "cancelled".
func (r *Runner) Run(ctx context.Context, net *model.Network, q *Query, progress func(*Result)) (*Result, error) {
	if err := q.Validate(); err != nil {
		return nil, err
	}
	stop, err := q.Stop.Sampling()
	if err != nil {
		return nil, err
	}
	ev, err := net.ResolveEvidence(q.Evidence, q.SoftEvidence)
	if err != nil {
		return nil, err
	}
	targets, err := net.ResolveTargets(q.Targets, ev)
	if err != nil {
		return nil, err
	}
	var seed uint64
	if q.Seed != nil {
		seed = *q.Seed
	} else {
		var b [8]byte
		_, _ = crand.Read(b[:])
		seed = binary.LittleEndian.Uint64(b[:]) >> 11 // stays exact in JSON numbers
	}
	start := time.Now()
	method, reason, eng, err := r.chooseFor(ctx, net, q, ev, targets, seed)
	if err != nil {
		return nil, err
	}
	res := newResult(net, targets)
	res.Method, res.MethodReason, res.Seed, res.Confidence = method, reason, seed, stop.Confidence

	if method == MethodExact {
		post, err := eng.Posterior(ev, targets)
		if err != nil {
			return nil, err
		}
		m := make([][]sampling.Interval, len(targets))
		for i := range targets {
			m[i] = make([]sampling.Interval, len(post.Marginals[i]))
			for s, p := range post.Marginals[i] {
				m[i][s] = sampling.Interval{P: p, Lo: p, Hi: p}
			}
		}
		res.setMarginals(net, targets, m)
		if !ev.Empty() {
			p := math.Exp(post.LogEvidence)
			res.EvidenceProbability = &EvidenceProbability{P: p, Lo: p, Hi: p, Log10: finitePtr(post.LogEvidence / math.Ln10)}
		}
		res.StopReason = sampling.ReasonExact
	} else {
		var partial func(*sampling.Estimate)
		if progress != nil {
			partial = func(e *sampling.Estimate) {
				pr := newResult(net, targets)
				pr.Method, pr.MethodReason, pr.Seed, pr.Confidence = method, reason, seed, stop.Confidence
				pr.fill(net, targets, e)
				progress(pr)
			}
		}
		var est *sampling.Estimate
		switch method {
		case MethodGibbs:
			est, err = gibbs.Run(ctx, net, ev, targets, gibbs.Options{Seed: seed, Stop: stop, Workers: r.opt.Workers, Progress: partial, ProgressEvery: r.opt.ProgressEvery})
		case MethodAdaptive:
			var ao adaptive.Options
			if ao, err = AdaptiveOptionsFor(net, q, ev, targets); err != nil {
				return nil, err
			}
			ao.Seed, ao.Stop, ao.Workers, ao.ProgressEvery = seed, stop, r.opt.Workers, r.opt.ProgressEvery
			if partial != nil {
				ao.Progress = func(a *adaptive.Result) { partial(a.Estimate) }
			}
			var ar *adaptive.Result
			if ar, err = adaptive.Run(ctx, net, ev, targets, ao); err == nil {
				est = ar.Estimate
			}
		default:
			est, err = sampling.Run(ctx, net, ev, targets, sampling.Options{Method: method, Seed: seed, Stop: stop, Workers: r.opt.Workers, Progress: partial, ProgressEvery: r.opt.ProgressEvery})
		}
		if err != nil {
			return nil, err
		}
		res.fill(net, targets, est)
	}
	if q.MPE {
		if err := r.addMPE(net, ev, res, eng); err != nil {
			return nil, err
		}
	}
	res.ElapsedSeconds = time.Since(start).Seconds()
	return res, nil
}

func (r *Runner) addMPE(net *model.Network, ev *model.Evidence, res *Result, eng *exact.Engine) error {
	if eng == nil {
		var err error
		if eng, err = r.engine(net); err != nil {
			return fmt.Errorf("mpe needs exact inference: %w", err)
		}
	}
	mpe, err := eng.MPE(ev)
	if err != nil {
		return err
	}
	out := &MPE{Assignment: make(map[string]string, len(net.Vars))}
	for v, s := range mpe.Assignment {
		out.Assignment[net.Vars[v].Name] = net.Vars[v].States[s]
	}
	out.Joint = math.Exp(mpe.LogProb)
	out.Log10Joint = finitePtr(mpe.LogProb / math.Ln10)
	out.P = out.Joint
	if !ev.Empty() {
		post, err := eng.Posterior(ev, nil)
		if err != nil {
			return err
		}
		out.P = math.Exp(mpe.LogProb - post.LogEvidence)
	}
	res.MPE = out
	return nil
}

// fill copies a sampling estimate into the result.
func (res *Result) fill(net *model.Network, targets []int, e *sampling.Estimate) {
	res.Samples = e.Samples
	res.EffectiveSamples = e.EffectiveSamples
	res.StopReason = e.StopReason
	res.ElapsedSeconds = e.Elapsed.Seconds()
	res.setMarginals(net, targets, e.Marginals)
	if e.Evidence != nil {
		res.EvidenceProbability = &EvidenceProbability{P: e.Evidence.P, Lo: e.Evidence.Lo, Hi: e.Evidence.Hi, Log10: finitePtr(e.Log10Evidence)}
	}
	d := &Diagnostics{}
	switch e.Method {
	case MethodRejection:
		d.AcceptanceRate = finitePtr(e.AcceptanceRate)
	case MethodLikelihoodWeighting, MethodAdaptive:
		d.MaxWeightShare = finitePtr(e.MaxWeightShare)
	case MethodGibbs:
		d.RHat = map[string]float64{}
		d.ESS = map[string]float64{}
		for i, v := range targets {
			if i < len(e.RHat) && !math.IsNaN(e.RHat[i]) && !math.IsInf(e.RHat[i], 0) {
				d.RHat[net.Vars[v].Name] = e.RHat[i]
			}
			if i < len(e.ESS) && !math.IsNaN(e.ESS[i]) && !math.IsInf(e.ESS[i], 0) {
				d.ESS[net.Vars[v].Name] = e.ESS[i]
			}
		}
	}
	if d.AcceptanceRate != nil || d.MaxWeightShare != nil || len(d.RHat) > 0 || len(d.ESS) > 0 {
		res.Diagnostics = d
	}
	res.Warnings = append(res.Warnings[:0], e.Warnings...)
}

// Thresholds of method "auto" for adaptive importance sampling, applied to
// a pilot run of likelihood weighting (see ChooseQueryMethod).
const (
	autoPilotSamples   = 20_000
	autoEvidenceBelow  = 1e-4
	autoESSRatioBelow  = 0.01
	autoRareStateBelow = adaptive.DefaultRareThreshold
)

// ChooseQueryMethod resolves a query's method as Run does: "auto" (or "")
// picks exact inference when its junction tree fits the limit; otherwise
// it draws a pilot of 20,000 likelihood-weighting samples with the query's
// seed and picks adaptive importance sampling when the evidence is
// unlikely (estimated P(evidence) below 1e-4, or effective samples below
// 1% of the pilot), when the query names rare targets, or when a target
// it names has a state estimated below 1e-3; likelihood weighting
// otherwise. The reason carries the pilot's numbers.
func (r *Runner) ChooseQueryMethod(ctx context.Context, net *model.Network, q *Query, ev *model.Evidence, targets []int, seed uint64) (method, reason string, err error) {
	method, reason, _, err = r.chooseFor(ctx, net, q, ev, targets, seed)
	return method, reason, err
}

func (r *Runner) chooseFor(ctx context.Context, net *model.Network, q *Query, ev *model.Evidence, targets []int, seed uint64) (string, string, *exact.Engine, error) {
	method, reason, eng, err := r.choose(net, q.Method)
	if err != nil || method != MethodLikelihoodWeighting || (q.Method != MethodAuto && q.Method != "") {
		return method, reason, eng, err
	}
	if q.Adaptive != nil && len(q.Adaptive.RareTargets) > 0 {
		return MethodAdaptive, reason + "; the query names rare targets, so adaptive importance sampling", nil, nil
	}
	pilot, err := sampling.Run(ctx, net, ev, targets, sampling.Options{Method: MethodLikelihoodWeighting, Seed: seed,
		Stop: sampling.Stop{MaxSamples: autoPilotSamples}, Workers: 1, BlockSize: 4096})
	if err != nil {
		return "", "", nil, err
	}
	if ctx.Err() != nil {
		return "", "", nil, ctx.Err()
	}
	if pilot.Evidence != nil {
		pe := pilot.Evidence
		switch {
		case pe.P < autoEvidenceBelow:
			return MethodAdaptive, fmt.Sprintf("%s; a pilot of %d likelihood-weighting samples puts P(evidence) at %.3g [%.3g, %.3g] (effective samples %.4g): unlikely evidence, so adaptive importance sampling",
				reason, pilot.Samples, pe.P, pe.Lo, pe.Hi, pilot.EffectiveSamples), nil, nil
		case pilot.EffectiveSamples < autoESSRatioBelow*float64(pilot.Samples):
			return MethodAdaptive, fmt.Sprintf("%s; a pilot of %d likelihood-weighting samples has %.4g effective samples (P(evidence) %.3g [%.3g, %.3g]): the weights collapse, so adaptive importance sampling",
				reason, pilot.Samples, pilot.EffectiveSamples, pe.P, pe.Lo, pe.Hi), nil, nil
		}
	}
	if len(q.Targets) > 0 {
		for i, v := range targets {
			if ev.Hard[v] >= 0 {
				continue
			}
			for st, iv := range pilot.Marginals[i] {
				if iv.P < autoRareStateBelow {
					return MethodAdaptive, fmt.Sprintf("%s; a pilot of %d likelihood-weighting samples puts %s=%s at %.3g [%.3g, %.3g]: a rare target state, so adaptive importance sampling",
						reason, pilot.Samples, net.Vars[v].Name, net.Vars[v].States[st], iv.P, iv.Lo, iv.Hi), nil, nil
				}
			}
		}
	}
	pe := "no evidence"
	if pilot.Evidence != nil {
		pe = fmt.Sprintf("P(evidence) %.3g", pilot.Evidence.P)
	}
	return MethodLikelihoodWeighting, fmt.Sprintf("%s; a pilot of %d likelihood-weighting samples (%s, %.4g effective samples) shows neither unlikely evidence nor rare target states",
		reason, pilot.Samples, pe, pilot.EffectiveSamples), nil, nil
}

// AdaptiveOptionsFor resolves the adaptive options of q against net: rare
// target names become indices (each must be a target), and the threshold
// and (ε, δ) rule are copied. Seed, stopping rule and workers are left to
// the caller.
func AdaptiveOptionsFor(net *model.Network, q *Query, ev *model.Evidence, targets []int) (adaptive.Options, error) {
	var o adaptive.Options
	a := q.Adaptive
	if a == nil {
		return o, nil
	}
	for _, name := range a.RareTargets {
		v, ok := net.Index(name)
		if !ok {
			return o, fmt.Errorf("%w: adaptive.rare_targets: unknown variable %q", model.ErrBadEvidence, name)
		}
		in := false
		for _, t := range targets {
			in = in || t == v
		}
		if !in {
			return o, fmt.Errorf("%w: adaptive.rare_targets: %q is not among the query's targets", model.ErrBadEvidence, name)
		}
		if ev != nil && ev.Hard[v] >= 0 {
			return o, fmt.Errorf("%w: adaptive.rare_targets: %q has hard evidence, so it is not rare", model.ErrBadEvidence, name)
		}
		o.RareTargets = append(o.RareTargets, v)
	}
	o.RareThreshold = a.RareThreshold
	if e := a.EpsDelta; e != nil {
		o.EpsDelta = &adaptive.EpsDelta{Epsilon: e.Epsilon, Delta: e.Delta}
	}
	return o, nil
}
