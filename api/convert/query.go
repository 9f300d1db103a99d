package convert

import (
	"fmt"

	beliefv1 "github.com/beliefd/beliefd/proto/belief/v1"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/sampling"
)

// QueryToProto converts a query document to its message.
func QueryToProto(q *infer.Query) *beliefv1.Query {
	if q == nil {
		return nil
	}
	m := &beliefv1.Query{
		Model:          q.Model,
		Evidence:       copyMap(q.Evidence, false),
		Targets:        nilIfEmpty(q.Targets),
		Method:         q.Method,
		Mpe:            q.MPE,
		Priority:       q.Priority,
		IdempotencyKey: q.IdempotencyKey,
		Stop:           stopRuleToProto(q.Stop),
	}
	if len(q.SoftEvidence) > 0 {
		m.SoftEvidence = make(map[string]*beliefv1.Likelihood, len(q.SoftEvidence))
		for v, l := range q.SoftEvidence {
			m.SoftEvidence[v] = &beliefv1.Likelihood{Values: nilIfEmpty(l)}
		}
	}
	if q.Seed != nil {
		s := *q.Seed
		m.Seed = &s
	}
	if a := q.Adaptive; a != nil {
		m.Adaptive = &beliefv1.AdaptiveOptions{RareTargets: nilIfEmpty(a.RareTargets), RareThreshold: a.RareThreshold}
		if e := a.EpsDelta; e != nil {
			m.Adaptive.EpsDelta = &beliefv1.EpsDeltaRule{Epsilon: e.Epsilon, Delta: e.Delta}
		}
	}
	return m
}

func stopRuleToProto(r infer.StopRule) *beliefv1.StopRule {
	if r == (infer.StopRule{}) {
		return nil
	}
	return &beliefv1.StopRule{MaxSamples: r.MaxSamples, Timeout: r.Timeout, AbsErr: r.AbsErr, RelErr: r.RelErr, Confidence: r.Confidence}
}

// QueryFromProto converts a query message to its document.
func QueryFromProto(m *beliefv1.Query) *infer.Query {
	if m == nil {
		return nil
	}
	q := &infer.Query{
		Model:          m.GetModel(),
		Evidence:       copyMap(m.GetEvidence(), false),
		Targets:        nilIfEmpty(m.GetTargets()),
		Method:         m.GetMethod(),
		MPE:            m.GetMpe(),
		Priority:       m.GetPriority(),
		IdempotencyKey: m.GetIdempotencyKey(),
	}
	if s := m.GetStop(); s != nil {
		q.Stop = infer.StopRule{MaxSamples: s.GetMaxSamples(), Timeout: s.GetTimeout(), AbsErr: s.GetAbsErr(), RelErr: s.GetRelErr(), Confidence: s.GetConfidence()}
	}
	if len(m.GetSoftEvidence()) > 0 {
		q.SoftEvidence = make(map[string][]float64, len(m.GetSoftEvidence()))
		for v, l := range m.GetSoftEvidence() {
			q.SoftEvidence[v] = nonNil(l.GetValues())
		}
	}
	if m.Seed != nil {
		s := m.GetSeed()
		q.Seed = &s
	}
	if a := m.GetAdaptive(); a != nil {
		q.Adaptive = &infer.AdaptiveOptions{RareTargets: nilIfEmpty(a.GetRareTargets()), RareThreshold: a.GetRareThreshold()}
		if e := a.GetEpsDelta(); e != nil {
			q.Adaptive.EpsDelta = &infer.EpsDeltaRule{Epsilon: e.GetEpsilon(), Delta: e.GetDelta()}
		}
	}
	return q
}

// ResultToProto converts a result document to its message. The only error
// is a state outside the job states.
func ResultToProto(r *infer.Result) (*beliefv1.Result, error) {
	if r == nil {
		return nil, nil
	}
	state, err := StateToProto(jobs.State(r.State))
	if err != nil {
		return nil, fmt.Errorf("convert result: %w", err)
	}
	m := &beliefv1.Result{
		Model:            r.Model,
		ModelHash:        r.ModelHash,
		Method:           r.Method,
		MethodReason:     r.MethodReason,
		Seed:             r.Seed,
		Samples:          r.Samples,
		EffectiveSamples: r.EffectiveSamples,
		StopReason:       r.StopReason,
		ElapsedSeconds:   r.ElapsedSeconds,
		Confidence:       r.Confidence,
		Warnings:         nilIfEmpty(r.Warnings),
		Caution:          r.Caution,
		State:            state,
	}
	if e := r.EvidenceProbability; e != nil {
		m.EvidenceProbability = &beliefv1.EvidenceProbability{P: e.P, Lo: e.Lo, Hi: e.Hi, Log10: optFloat(e.Log10)}
	}
	if len(r.Marginals) > 0 {
		m.Marginals = make(map[string]*beliefv1.StateMarginals, len(r.Marginals))
		for v, states := range r.Marginals {
			sm := &beliefv1.StateMarginals{}
			if len(states) > 0 {
				sm.States = make(map[string]*beliefv1.Interval, len(states))
			}
			for s, iv := range states {
				sm.States[s] = &beliefv1.Interval{P: iv.P, Lo: iv.Lo, Hi: iv.Hi}
			}
			m.Marginals[v] = sm
		}
	}
	if x := r.MPE; x != nil {
		m.Mpe = &beliefv1.MostProbableExplanation{Assignment: copyMap(x.Assignment, false), P: x.P, Joint: x.Joint, Log10Joint: optFloat(x.Log10Joint)}
	}
	if d := r.Diagnostics; d != nil {
		m.Diagnostics = &beliefv1.Diagnostics{
			AcceptanceRate: optFloat(d.AcceptanceRate),
			MaxWeightShare: optFloat(d.MaxWeightShare),
			RHat:           copyMap(d.RHat, false),
			Ess:            copyMap(d.ESS, false),
		}
	}
	return m, nil
}

// ResultFromProto converts a result message to its document.
func ResultFromProto(m *beliefv1.Result) *infer.Result {
	if m == nil {
		return nil
	}
	r := &infer.Result{
		Model:            m.GetModel(),
		ModelHash:        m.GetModelHash(),
		Method:           m.GetMethod(),
		MethodReason:     m.GetMethodReason(),
		Seed:             m.GetSeed(),
		Samples:          m.GetSamples(),
		EffectiveSamples: m.GetEffectiveSamples(),
		StopReason:       m.GetStopReason(),
		ElapsedSeconds:   m.GetElapsedSeconds(),
		Confidence:       m.GetConfidence(),
		Warnings:         nilIfEmpty(m.GetWarnings()),
		Caution:          m.GetCaution(),
		State:            string(StateFromProto(m.GetState())),
		// "marginals" is always written.
		Marginals: make(map[string]map[string]sampling.Interval, len(m.GetMarginals())),
	}
	if e := m.GetEvidenceProbability(); e != nil {
		r.EvidenceProbability = &infer.EvidenceProbability{P: e.GetP(), Lo: e.GetLo(), Hi: e.GetHi(), Log10: optFloat(e.Log10)}
	}
	for v, sm := range m.GetMarginals() {
		states := make(map[string]sampling.Interval, len(sm.GetStates()))
		for s, iv := range sm.GetStates() {
			states[s] = sampling.Interval{P: iv.GetP(), Lo: iv.GetLo(), Hi: iv.GetHi()}
		}
		r.Marginals[v] = states
	}
	if x := m.GetMpe(); x != nil {
		r.MPE = &infer.MPE{Assignment: copyMap(x.GetAssignment(), true), P: x.GetP(), Joint: x.GetJoint(), Log10Joint: optFloat(x.Log10Joint)}
	}
	if d := m.GetDiagnostics(); d != nil {
		r.Diagnostics = &infer.Diagnostics{
			AcceptanceRate: optFloat(d.AcceptanceRate),
			MaxWeightShare: optFloat(d.MaxWeightShare),
			RHat:           copyMap(d.GetRHat(), false),
			ESS:            copyMap(d.GetEss(), false),
		}
	}
	return r
}
