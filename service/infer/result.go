package infer

import (
	"math"

	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
)

// Caution is carried by every result: the numbers are model-based.
const Caution = "Model-based estimates: they support, and do not replace, the analyses that local codes, standards and licensed practice require for safety decisions."

// Result is the result document.
type Result struct {
	Model               string                                  `json:"model,omitempty"`
	ModelHash           string                                  `json:"model_hash,omitempty"`
	Method              string                                  `json:"method"`
	MethodReason        string                                  `json:"method_reason,omitempty"`
	Seed                uint64                                  `json:"seed"`
	Samples             int64                                   `json:"samples"`
	EffectiveSamples    float64                                 `json:"effective_samples"`
	StopReason          string                                  `json:"stop_reason"`
	ElapsedSeconds      float64                                 `json:"elapsed_seconds"`
	Confidence          float64                                 `json:"confidence"`
	EvidenceProbability *EvidenceProbability                    `json:"evidence_probability,omitempty"`
	Marginals           map[string]map[string]sampling.Interval `json:"marginals"`
	MPE                 *MPE                                    `json:"mpe,omitempty"`
	Diagnostics         *Diagnostics                            `json:"diagnostics,omitempty"`
	Warnings            []string                                `json:"warnings,omitempty"`
	Caution             string                                  `json:"caution"`
	// State is the job state when the result comes from a job; empty otherwise.
	State string `json:"state,omitempty"`

	// order keeps the targets in document order for display; not serialised.
	order []target
}

type target struct {
	name   string
	states []string
}

// EvidenceProbability is P(evidence) with its interval. Log10 is null when
// the estimate is 0.
type EvidenceProbability struct {
	P     float64  `json:"p"`
	Lo    float64  `json:"lo"`
	Hi    float64  `json:"hi"`
	Log10 *float64 `json:"log10"`
}

// MPE is the most probable explanation.
type MPE struct {
	Assignment map[string]string `json:"assignment"`
	// P is P(assignment | evidence); Joint is P(assignment, evidence).
	P          float64  `json:"p"`
	Joint      float64  `json:"joint"`
	Log10Joint *float64 `json:"log10_joint"`
}

// Diagnostics are the sampler-specific accuracy indicators.
type Diagnostics struct {
	AcceptanceRate *float64           `json:"acceptance_rate,omitempty"`
	MaxWeightShare *float64           `json:"max_weight_share,omitempty"`
	RHat           map[string]float64 `json:"r_hat,omitempty"`
	ESS            map[string]float64 `json:"ess,omitempty"`
}

// Targets returns the target variables in display order with their states.
func (r *Result) Targets() (names []string, states [][]string) {
	for _, t := range r.order {
		names = append(names, t.name)
		states = append(states, t.states)
	}
	return names, states
}

// WidestHalfWidth is the largest half-width over all reported marginals.
func (r *Result) WidestHalfWidth() float64 {
	w := 0.0
	for _, m := range r.Marginals {
		for _, iv := range m {
			w = math.Max(w, iv.HalfWidth())
		}
	}
	return w
}

func finitePtr(x float64) *float64 {
	if math.IsInf(x, 0) || math.IsNaN(x) {
		return nil
	}
	return &x
}

func newResult(net *model.Network, targets []int) *Result {
	r := &Result{Model: net.Name, ModelHash: net.Hash, Marginals: make(map[string]map[string]sampling.Interval, len(targets)), Caution: Caution}
	for _, v := range targets {
		n := &net.Vars[v]
		r.order = append(r.order, target{name: n.Name, states: n.States})
	}
	return r
}

func (r *Result) setMarginals(net *model.Network, targets []int, m [][]sampling.Interval) {
	for i, v := range targets {
		n := &net.Vars[v]
		states := make(map[string]sampling.Interval, n.Card())
		for s, iv := range m[i] {
			states[n.States[s]] = iv
		}
		r.Marginals[n.Name] = states
	}
}

// SetOrder sets the display order of the targets from the model's document
// order. Results read back from JSON (a job record, an HTTP or gRPC reply)
// have lost it.
func (r *Result) SetOrder(net *model.Network) {
	r.order = r.order[:0]
	for _, v := range net.DocOrder {
		n := &net.Vars[v]
		if _, ok := r.Marginals[n.Name]; ok {
			r.order = append(r.order, target{name: n.Name, states: n.States})
		}
	}
}
