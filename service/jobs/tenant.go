package jobs

import (
	"context"
	"errors"
)

// ErrQuotaExceeded: the calling tenant has used up one of its quotas
// (unfinished jobs, samples per job, model size). Transports map it to 429 /
// RESOURCE_EXHAUSTED; the wrapping message names the quota and its value.
var ErrQuotaExceeded = errors.New("tenant quota exceeded")

// ErrForbidden: the caller is known but its role does not allow the call.
var ErrForbidden = errors.New("forbidden")

// Principal is who makes a call: a tenant and whether it has the admin role.
// Transports authenticate the caller and attach its principal to the
// context with WithPrincipal; the service scopes every model, job and
// standing query by the principal's tenant.
type Principal struct {
	// Tenant names the tenant; "" is the open tenant used when no tokens
	// are configured.
	Tenant string
	// Admin may see and act on every tenant's objects.
	Admin bool
}

type principalKey struct{}

// WithPrincipal returns ctx carrying p.
func WithPrincipal(ctx context.Context, p Principal) context.Context {
	return context.WithValue(ctx, principalKey{}, p)
}

// PrincipalFrom returns the principal attached to ctx, or the open tenant
// (Tenant "", not admin) and false when there is none.
func PrincipalFrom(ctx context.Context) (Principal, bool) {
	p, ok := ctx.Value(principalKey{}).(Principal)
	return p, ok
}

// TenantPolicy holds one tenant's quotas. Zero fields mean no limit of the
// tenant's own (the service-wide limits still apply); Share zero means 1.
type TenantPolicy struct {
	// MaxUnfinished bounds the tenant's queued and running jobs.
	MaxUnfinished int `json:"max_unfinished,omitempty"`
	// MaxSamplesPerJob bounds stop.max_samples (and the samples a job with
	// no such bound may draw).
	MaxSamplesPerJob int64 `json:"max_samples_per_job,omitempty"`
	// MaxModelBytes bounds the tenant's model documents.
	MaxModelBytes int64 `json:"max_model_bytes,omitempty"`
	// Share weighs the tenant in fair scheduling: a tenant with share 2
	// gets twice the sampling capacity of a tenant with share 1 when both
	// have work.
	Share float64 `json:"share,omitempty"`
}

// EffectiveShare is Share, or 1 when Share is not positive.
func (p TenantPolicy) EffectiveShare() float64 {
	if p.Share > 0 {
		return p.Share
	}
	return 1
}
