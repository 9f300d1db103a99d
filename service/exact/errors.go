package exact

import (
	"errors"
	"fmt"
	"math"
)

// ErrZeroEvidence is wrapped by the error returned when the evidence has
// probability zero under the model, so no posterior exists.
var ErrZeroEvidence = errors.New("zero-probability evidence")

// ErrTooCostly is wrapped by *TooCostlyError when the junction tree of a
// network would need more table entries than Options.MaxEntries allows.
var ErrTooCostly = errors.New("exact inference too costly")

// TooCostlyError reports a network whose junction tree exceeds the limit on
// table entries. It wraps ErrTooCostly.
type TooCostlyError struct {
	Estimate Cost // the structure Compile would have built
	Limit    int  // the limit on total table entries in force
}

func (e *TooCostlyError) Error() string {
	total := fmt.Sprintf("%d", e.Estimate.TotalEntries)
	largest := fmt.Sprintf("%d", e.Estimate.LargestClique)
	if e.Estimate.TotalEntries == math.MaxInt {
		total = "more than 9.2e18"
	}
	if e.Estimate.LargestClique == math.MaxInt {
		largest = "more than 9.2e18"
	}
	return fmt.Sprintf("exact: %v: the junction tree needs %s table entries (%d cliques, largest clique %s entries, treewidth %d), over the limit of %d; use sampling instead, or raise the limit",
		ErrTooCostly, total, e.Estimate.Cliques, largest, e.Estimate.Treewidth, e.Limit)
}

// Unwrap lets errors.Is find ErrTooCostly.
func (e *TooCostlyError) Unwrap() error { return ErrTooCostly }

func zeroEvidenceError() error {
	return fmt.Errorf("exact: %w: the evidence is impossible under the model (its probability is 0)", ErrZeroEvidence)
}
