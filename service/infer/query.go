package infer

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
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
)

// Methods lists the method names a query may ask for.
var Methods = []string{MethodAuto, MethodExact, MethodForward, MethodRejection, MethodLikelihoodWeighting, MethodGibbs}

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
	Priority       string               `json:"priority,omitempty"`
	IdempotencyKey string               `json:"idempotency_key,omitempty"`
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
