package infer

import (
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
)

// FromEstimate shapes a sampling estimate into a result document exactly as
// Runner.Run does, so that a job service which merges blocks itself reports
// the same bits. confidence is the level of the intervals (the normalised
// stopping rule's Confidence). ElapsedSeconds is e.Elapsed; State is left
// for the caller.
func FromEstimate(net *model.Network, targets []int, e *sampling.Estimate, method, reason string, seed uint64, confidence float64) *Result {
	res := newResult(net, targets)
	res.Method, res.MethodReason, res.Seed, res.Confidence = method, reason, seed, confidence
	res.fill(net, targets, e)
	return res
}

// ChooseMethod resolves a query's method as Run does: "auto" (or "") picks
// exact inference when its junction tree fits the limit and likelihood
// weighting otherwise; "exact" fails with *exact.TooCostlyError when it does
// not fit. It returns the method and the reason it was picked. Compiled
// exact engines are kept in r's cache.
func (r *Runner) ChooseMethod(net *model.Network, method string) (chosen, reason string, err error) {
	chosen, reason, _, err = r.choose(net, method)
	return chosen, reason, err
}

// AddMPE adds the most probable explanation given ev to res, as Run does for
// a query with "mpe": true. It needs exact inference and fails with
// *exact.TooCostlyError when the network is too large for it.
func (r *Runner) AddMPE(net *model.Network, ev *model.Evidence, res *Result) error {
	return r.addMPE(net, ev, res, nil)
}
