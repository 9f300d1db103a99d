package sampling

import (
	"errors"
	"fmt"
	"math"
	"time"
)

// ErrBadStop is wrapped by errors about a stopping rule that cannot be used.
var ErrBadStop = errors.New("bad stopping rule")

// Stop is a stopping rule: a run ends at the first of these that holds.
// Precision rules are checked on the merged statistics of a prefix of
// blocks, so the samples a run ends with do not depend on scheduling
// (Timeout and cancellation are the exceptions: they depend on the clock).
type Stop struct {
	// MaxSamples caps the samples drawn. Zero means DefaultMaxSamples when
	// no other rule is given, and PrecisionMaxSamples when a precision rule
	// or a timeout is given (so a precision that is never reached still ends).
	MaxSamples int64 `json:"max_samples,omitempty"`
	// Timeout bounds the wall time of the run.
	Timeout time.Duration `json:"timeout,omitempty"`
	// AbsErr stops when every reported interval's half-width is at most AbsErr.
	AbsErr float64 `json:"abs_err,omitempty"`
	// RelErr stops when every reported interval's half-width is at most
	// RelErr times its estimate (an estimate of 0 never meets it).
	RelErr float64 `json:"rel_err,omitempty"`
	// Confidence is the two-sided level of every interval; default 0.95.
	Confidence float64 `json:"confidence,omitempty"`
}

// Default caps on the samples of one run.
const (
	DefaultMaxSamples   = 1_000_000
	PrecisionMaxSamples = 1_000_000_000
	DefaultConfidence   = 0.95
	// HardMaxSamples is the largest MaxSamples accepted.
	HardMaxSamples = 1 << 50
)

// Stop reasons, as reported in results.
const (
	ReasonMaxSamples = "max_samples"
	ReasonTimeout    = "timeout"
	ReasonAbsErr     = "abs_err"
	ReasonRelErr     = "rel_err"
	ReasonCancelled  = "cancelled"
	ReasonExact      = "exact"
)

// Normalize validates the rule and fills in defaults.
func (s Stop) Normalize() (Stop, error) {
	bad := func(format string, a ...any) (Stop, error) {
		return s, fmt.Errorf("%w: "+format, append([]any{ErrBadStop}, a...)...)
	}
	switch {
	case s.MaxSamples < 0:
		return bad("max_samples = %d must be positive", s.MaxSamples)
	case s.MaxSamples > HardMaxSamples:
		return bad("max_samples = %d exceeds the limit of %d", s.MaxSamples, int64(HardMaxSamples))
	case s.Timeout < 0:
		return bad("timeout = %s must be positive", s.Timeout)
	case math.IsNaN(s.AbsErr) || s.AbsErr < 0 || s.AbsErr >= 1:
		return bad("abs_err = %g must be in (0, 1)", s.AbsErr)
	case math.IsNaN(s.RelErr) || s.RelErr < 0 || math.IsInf(s.RelErr, 0):
		return bad("rel_err = %g must be a positive number", s.RelErr)
	case math.IsNaN(s.Confidence) || s.Confidence < 0 || s.Confidence >= 1:
		return bad("confidence = %g must be in (0, 1), such as 0.95", s.Confidence)
	}
	if s.Confidence == 0 {
		s.Confidence = DefaultConfidence
	}
	if s.Confidence < 0.5 {
		return bad("confidence = %g is below 0.5; use a level such as 0.95", s.Confidence)
	}
	if s.MaxSamples == 0 {
		if s.AbsErr > 0 || s.RelErr > 0 || s.Timeout > 0 {
			s.MaxSamples = PrecisionMaxSamples
		} else {
			s.MaxSamples = DefaultMaxSamples
		}
	}
	return s, nil
}

// PrecisionMet reports which precision rule, if any, the intervals meet:
// ReasonAbsErr, ReasonRelErr, or "".
func (s Stop) PrecisionMet(ivs []Interval) string {
	if len(ivs) == 0 {
		return ""
	}
	if s.AbsErr > 0 {
		ok := true
		for _, iv := range ivs {
			if iv.HalfWidth() > s.AbsErr {
				ok = false
				break
			}
		}
		if ok {
			return ReasonAbsErr
		}
	}
	if s.RelErr > 0 {
		ok := true
		for _, iv := range ivs {
			if iv.P <= 0 || iv.HalfWidth() > s.RelErr*iv.P {
				ok = false
				break
			}
		}
		if ok {
			return ReasonRelErr
		}
	}
	return ""
}
