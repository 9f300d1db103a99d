package infer

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"strings"
	"time"

	"github.com/beliefd/beliefd/service/sampling"
)

// Methods.
const (
	MethodAuto                = "auto"
	MethodExact               = "exact"
	MethodForward             = "forward"
	MethodRejection           = "rejection"
	MethodLikelihoodWeighting = "likelihood-weighting"
	MethodGibbs               = "gibbs"
	MethodAdaptive            = "adaptive-importance"
)

// Methods lists the method names a query may ask for.
var Methods = []string{MethodAuto, MethodExact, MethodForward, MethodRejection, MethodLikelihoodWeighting, MethodGibbs, MethodAdaptive}

// ErrBadQuery is wrapped by errors about a query that cannot be run as written.
var ErrBadQuery = errors.New("bad query")

// Query is the query document.
type Query struct {
	Model          string               `json:"model,omitempty"`
	Evidence       map[string]string    `json:"evidence,omitempty"`
	SoftEvidence   map[string][]float64 `json:"soft_evidence,omitempty"`
	Targets        []string             `json:"targets,omitempty"`
	Method         string               `json:"method,omitempty"`
	MPE            bool                 `json:"mpe,omitempty"`
	Stop           StopRule             `json:"stop,omitempty"`
	Seed           *uint64              `json:"seed,omitempty"`
	Adaptive       *AdaptiveOptions     `json:"adaptive,omitempty"`
	Priority       string               `json:"priority,omitempty"`
	IdempotencyKey string               `json:"idempotency_key,omitempty"`
}

// AdaptiveOptions are the options of adaptive importance sampling (and of
// method "auto" when it picks it).
type AdaptiveOptions struct {
	// RareTargets are targets whose unlikely states each get their own
	// importance function, estimated as P(state, evidence)/P(evidence).
	RareTargets []string `json:"rare_targets,omitempty"`
	// RareThreshold: target states whose pilot estimate is below it get
	// their own importance function too (default 1e-3; negative: none).
	RareThreshold float64 `json:"rare_threshold,omitempty"`
	// EpsDelta adds the (ε, δ) stopping rule on P(evidence) and on the
	// rare states' joint probabilities.
	EpsDelta *EpsDeltaRule `json:"eps_delta,omitempty"`
}

// EpsDeltaRule asks for estimates within a factor 1 ± Epsilon of the truth
// with probability at least 1 - Delta.
type EpsDeltaRule struct {
	Epsilon float64 `json:"epsilon"`
	Delta   float64 `json:"delta"`
}

// validate checks what can be checked without the model.
func (a *AdaptiveOptions) validate() error {
	if a == nil {
		return nil
	}
	if math.IsNaN(a.RareThreshold) || a.RareThreshold >= 1 {
		return fmt.Errorf("%w: adaptive.rare_threshold = %g must be below 1", ErrBadQuery, a.RareThreshold)
	}
	if e := a.EpsDelta; e != nil {
		if math.IsNaN(e.Epsilon) || e.Epsilon <= 0 || e.Epsilon >= 1 {
			return fmt.Errorf("%w: adaptive.eps_delta.epsilon = %g must be in (0, 1)", ErrBadQuery, e.Epsilon)
		}
		if math.IsNaN(e.Delta) || e.Delta <= 0 || e.Delta >= 1 {
			return fmt.Errorf("%w: adaptive.eps_delta.delta = %g must be in (0, 1)", ErrBadQuery, e.Delta)
		}
	}
	return nil
}

// StopRule is the stopping rule as written in a query document. Timeout is
// a duration such as "30s" or "2m".
type StopRule struct {
	MaxSamples int64   `json:"max_samples,omitempty"`
	Timeout    string  `json:"timeout,omitempty"`
	AbsErr     float64 `json:"abs_err,omitempty"`
	RelErr     float64 `json:"rel_err,omitempty"`
	Confidence float64 `json:"confidence,omitempty"`
}

// Sampling converts the rule to the samplers' form, validated and with defaults.
func (r StopRule) Sampling() (sampling.Stop, error) {
	s := sampling.Stop{MaxSamples: r.MaxSamples, AbsErr: r.AbsErr, RelErr: r.RelErr, Confidence: r.Confidence}
	if r.Timeout != "" {
		d, err := time.ParseDuration(r.Timeout)
		if err != nil {
			return s, fmt.Errorf("%w: stop.timeout %q is not a duration such as \"30s\" or \"2m\"", ErrBadQuery, r.Timeout)
		}
		if d <= 0 {
			return s, fmt.Errorf("%w: stop.timeout %q must be positive", ErrBadQuery, r.Timeout)
		}
		s.Timeout = d
	}
	n, err := s.Normalize()
	if err != nil {
		return s, fmt.Errorf("%w: stop: %w", ErrBadQuery, err)
	}
	return n, nil
}

// Validate checks what can be checked without the model.
func (q *Query) Validate() error {
	if q.Method == "" {
		q.Method = MethodAuto
	}
	known := false
	for _, m := range Methods {
		if q.Method == m {
			known = true
		}
	}
	if !known {
		return fmt.Errorf("%w: unknown method %q (want one of %s)", ErrBadQuery, q.Method, strings.Join(Methods, ", "))
	}
	if _, err := q.Stop.Sampling(); err != nil {
		return err
	}
	if err := q.Adaptive.validate(); err != nil {
		return err
	}
	if q.Adaptive != nil && q.Method != MethodAdaptive && q.Method != MethodAuto {
		return fmt.Errorf("%w: adaptive options given for method %q; they apply to %q (or \"auto\")", ErrBadQuery, q.Method, MethodAdaptive)
	}
	switch q.Priority {
	case "", "normal", "high", "low":
	default:
		return fmt.Errorf("%w: priority %q (want low, normal or high)", ErrBadQuery, q.Priority)
	}
	return nil
}

// DecodeQuery reads one JSON query document of at most maxBytes bytes.
func DecodeQuery(r io.Reader, maxBytes int64) (*Query, error) {
	if maxBytes <= 0 {
		maxBytes = 1 << 20
	}
	data, err := io.ReadAll(io.LimitReader(r, maxBytes+1))
	if err != nil {
		return nil, fmt.Errorf("read query: %w", err)
	}
	if int64(len(data)) > maxBytes {
		return nil, fmt.Errorf("%w: query document larger than %d bytes", ErrBadQuery, maxBytes)
	}
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.DisallowUnknownFields()
	var q Query
	if err := dec.Decode(&q); err != nil {
		switch {
		case errors.Is(err, io.EOF):
			return nil, fmt.Errorf("%w: empty query document", ErrBadQuery)
		case errors.Is(err, io.ErrUnexpectedEOF):
			return nil, fmt.Errorf("%w: the query document ends early (unbalanced braces or brackets?)", ErrBadQuery)
		}
		return nil, fmt.Errorf("%w: %v", ErrBadQuery, err)
	}
	if dec.More() {
		return nil, fmt.Errorf("%w: unexpected data after the query document", ErrBadQuery)
	}
	if err := q.Validate(); err != nil {
		return nil, err
	}
	return &q, nil
}
