package api

import (
	"context"
	"time"

	"github.com/beliefd/beliefd/service/standing"
)

// StandingService is what the transports need for standing queries.
// *standing.Service implements it. Every call is scoped to the tenant of
// the caller's principal (standing.WithTenant lets an admin name another).
type StandingService interface {
	// Create registers a standing query.
	Create(ctx context.Context, spec *standing.Spec) (*standing.View, error)
	// Get returns a standing query with its latest result.
	Get(ctx context.Context, id string) (*standing.View, error)
	// List returns the caller's standing queries, oldest first.
	List(ctx context.Context) ([]*standing.View, error)
	// Delete removes a standing query.
	Delete(ctx context.Context, id string) error
	// UpdateEvidence sets, changes or clears evidence items.
	UpdateEvidence(ctx context.Context, id string, u *standing.Update) (*standing.View, error)
	// Wait returns the standing query once an outcome answers at least
	// revision, or as it is when timeout passes.
	Wait(ctx context.Context, id string, revision int64, timeout time.Duration) (*standing.View, error)
}

// MaxStandingWait bounds how long a create or update request may wait for
// its result (?wait= over HTTP, the wait field over gRPC).
const MaxStandingWait = time.Minute

var _ StandingService = (*standing.Service)(nil)
