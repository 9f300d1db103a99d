package standing

import (
	"context"
	"time"
)

// Store keeps standing queries for any number of processes. Every backend
// passes the conformance suite in service/standing/standingtest. Records
// returned are copies: changing them changes nothing in the store.
type Store interface {
	// Create stores rec (Revision 1, no outcomes). It fails with ErrExists
	// when rec.Key is taken and, when max > 0, with ErrLimit when max
	// standing queries (of all tenants) are stored.
	Create(ctx context.Context, rec *Record, max int) error
	// Get returns the record of key, or an error wrapping jobs.ErrNotFound.
	Get(ctx context.Context, key Key) (*Record, error)
	// List returns every record of every tenant, oldest first.
	List(ctx context.Context) ([]*Record, error)
	// Delete removes the record of key and its lease (jobs.ErrNotFound when
	// there is none).
	Delete(ctx context.Context, key Key) error
	// SetEvidence replaces the evidence when the record is at revision
	// expect, making it expect+1 with EvidenceAt = at, and returns the new
	// record; ErrConflict when it is at another revision.
	SetEvidence(ctx context.Context, key Key, expect int64, ev map[string]string, at time.Time) (*Record, error)
	// Claim grants owner the recompute lease of key for the lease time when
	// the record NeedsRecompute at now and no other owner holds an
	// unexpired lease, and returns the record as of the claim; it returns
	// nil and no error when there is nothing to do.
	Claim(ctx context.Context, key Key, owner string, now time.Time, lease time.Duration) (*Record, error)
	// Release gives up owner's lease of key without an outcome (a process
	// stopping mid-recompute), so another process need not wait for it to
	// expire. It is not an error when owner no longer holds it.
	Release(ctx context.Context, key Key, owner string) error
	// Complete keeps out as Record.Keep decides, in one step, and releases
	// owner's lease (whoever holds it now, the outcome is judged by its
	// revision alone). It reports whether out was kept; a deleted record
	// gives jobs.ErrNotFound.
	Complete(ctx context.Context, key Key, owner string, out *Outcome) (kept bool, err error)
}
