package jobs

import (
	"context"
	"errors"
	"fmt"
	"sort"
	"strings"

	"github.com/beliefd/beliefd/service/infer"
)

// Tenant scoping.
//
// Models live in one store namespace per tenant: the open tenant's under
// their own names, tenant T's under "~T/NAME". Model and tenant names hold
// only letters, digits, '.', '_' and '-', so the marker '~' and the
// separator '/' cannot occur in them, and '~' sorts after every character
// they may hold: the open tenant's models come first in the store's name
// order, and each tenant's models are one contiguous run.
//
// A caller names its own tenant's models by their plain names. An admin may
// also name another tenant's model "TENANT/NAME", and the open tenant's
// "/NAME"; a member's reference with a '/' names nothing (not found).
//
// Jobs carry their tenant in Job.Tenant. A job or model of another tenant
// is reported exactly as one that does not exist (ErrNotFound, with the
// same message), so that its existence is not revealed.

// tenantMark starts the store name of a model of a named tenant.
const tenantMark = "~"

// storeModelName is the store name of model name of tenant.
func storeModelName(tenant, name string) string {
	if tenant == "" {
		return name
	}
	return tenantMark + tenant + "/" + name
}

// modelOwner splits a store name into its tenant and model name.
func modelOwner(stored string) (tenant, name string) {
	if rest, ok := strings.CutPrefix(stored, tenantMark); ok {
		if t, n, ok := strings.Cut(rest, "/"); ok {
			return t, n
		}
	}
	return "", stored
}

// principal is the caller of ctx (the open tenant when none is attached).
func principal(ctx context.Context) Principal {
	p, _ := PrincipalFrom(ctx)
	return p
}

// visible reports whether p may see an object of tenant owner.
func (p Principal) visible(owner string) bool { return p.Admin || owner == p.Tenant }

// storeName resolves a model name as p gives it to its store name; ok is
// false when the reference can name no model p may see.
func (p Principal) storeName(name string) (string, bool) {
	t, n, qualified := strings.Cut(name, "/")
	if !qualified {
		return storeModelName(p.Tenant, name), true
	}
	if !p.Admin || n == "" || strings.Contains(n, "/") || (t != "" && checkTenantName(t) != nil) {
		return "", false
	}
	return storeModelName(t, n), true
}

// displayName is the name under which p sees the model of store name stored.
func (p Principal) displayName(stored string) string {
	t, n := modelOwner(stored)
	if t == p.Tenant {
		return n
	}
	return t + "/" + n
}

// checkTenantName accepts what model names accept.
func checkTenantName(t string) error {
	if err := checkModelName(t); err != nil {
		return fmt.Errorf("tenant name %q may hold only letters, digits, '.', '_' and '-' (at most %d bytes)", t, MaxModelNameLen)
	}
	return nil
}

// CheckTenantName reports whether t may name a tenant: 1 to
// MaxModelNameLen bytes of letters, digits, '.', '_' and '-'. The open
// tenant "" is not a name that configuration may give.
func CheckTenantName(t string) error { return checkTenantName(t) }

// errModelNotFound is the one answer for a model that does not exist or
// that the caller may not see.
func errModelNotFound(op, ref string) error {
	return fmt.Errorf("%s %q: %w", op, ref, ErrNotFound)
}

// errJobNotFound is the one answer for a job that does not exist or that
// the caller may not see.
func errJobNotFound(op, id string) error {
	return fmt.Errorf("%s %q: %w", op, id, ErrNotFound)
}

// scopeJob hides a job of another tenant from the caller: a read error of
// ErrNotFound, and a job the caller may not see, become the same error.
func scopeJob(ctx context.Context, op, id string, j *Job, err error) (*Job, error) {
	if errors.Is(err, ErrNotFound) || (err == nil && !principal(ctx).visible(j.Tenant)) {
		return nil, errJobNotFound(op, id)
	}
	if err != nil {
		return nil, fmt.Errorf("%s %q: %w", op, id, err)
	}
	return j, nil
}

// policy returns the quotas of tenant.
func (s *Service) policy(tenant string) TenantPolicy {
	if s.cfg.TenantPolicy == nil {
		return TenantPolicy{}
	}
	return s.cfg.TenantPolicy(tenant)
}

// tenantLabel names a tenant in messages.
func tenantLabel(t string) string {
	if t == "" {
		return "the open tenant"
	}
	return fmt.Sprintf("tenant %q", t)
}

// limitSamples applies the caller's samples-per-job quota to a stopping
// rule: a rule asking for more samples is refused; a rule with no sample
// bound of its own (whose default cap is larger) gets the quota as its bound.
func (s *Service) limitSamples(p Principal, stop *infer.StopRule) error {
	limit := s.policy(p.Tenant).MaxSamplesPerJob
	if limit <= 0 {
		return nil
	}
	if stop.MaxSamples > limit {
		return fmt.Errorf("%w: max_samples_per_job of %s is %d; stop.max_samples asks for %d",
			ErrQuotaExceeded, tenantLabel(p.Tenant), limit, stop.MaxSamples)
	}
	if stop.MaxSamples == 0 {
		n, err := stop.Sampling()
		if err != nil {
			return err
		}
		if n.MaxSamples > limit {
			stop.MaxSamples = limit
		}
	}
	return nil
}

// checkModelQuota applies the caller's model-size quota.
func (s *Service) checkModelQuota(p Principal, size int) error {
	if limit := s.policy(p.Tenant).MaxModelBytes; limit > 0 && int64(size) > limit {
		return fmt.Errorf("%w: max_model_bytes of %s is %d; the document has %d bytes",
			ErrQuotaExceeded, tenantLabel(p.Tenant), limit, size)
	}
	return nil
}

// TenantUsage is one tenant's unfinished jobs and its quotas.
type TenantUsage struct {
	Tenant  string       `json:"tenant"`
	Queued  int          `json:"queued"`
	Running int          `json:"running"`
	Quotas  TenantPolicy `json:"quotas"`
}

// TenantUsage counts the queued and running jobs of each tenant, with the
// tenant's quotas, in tenant order: the tenants listed and every other
// tenant that has unfinished jobs. Only an admin may ask (ErrForbidden).
// It asks the store for the counts of the tenants listed, of the open
// tenant and of the tenants with claimable work; only when those do not
// add up to the store's total (a tenant no longer listed whose jobs all
// run) does it read every kept job record.
func (s *Service) TenantUsage(ctx context.Context, tenants []string) ([]TenantUsage, error) {
	if !principal(ctx).Admin {
		return nil, fmt.Errorf("tenant usage: %w: the admin role is needed", ErrForbidden)
	}
	if out, ok, err := s.tenantUsageCounted(ctx, tenants); err != nil || ok {
		return out, err
	}
	byTenant := map[string]*TenantUsage{}
	add := func(t string) *TenantUsage {
		u, ok := byTenant[t]
		if !ok {
			u = &TenantUsage{Tenant: t, Quotas: s.policy(t)}
			byTenant[t] = u
		}
		return u
	}
	for _, t := range tenants {
		add(t)
	}
	token := ""
	for {
		js, next, err := s.List(ctx, token, MaxPageSize)
		if err != nil {
			return nil, fmt.Errorf("tenant usage: %w", err)
		}
		for _, j := range js {
			switch j.State {
			case StateQueued:
				add(j.Tenant).Queued++
			case StateRunning:
				add(j.Tenant).Running++
			}
		}
		if next == "" {
			break
		}
		token = next
	}
	out := make([]TenantUsage, 0, len(byTenant))
	for _, u := range byTenant {
		out = append(out, *u)
	}
	sort.Slice(out, func(a, b int) bool { return out[a].Tenant < out[b].Tenant })
	return out, nil
}

// tenantUsageCounted is TenantUsage from the store's per-tenant counts;
// ok is false when they do not account for every unfinished job.
func (s *Service) tenantUsageCounted(ctx context.Context, tenants []string) (out []TenantUsage, ok bool, err error) {
	names := map[string]bool{"": true}
	for _, t := range tenants {
		names[t] = true
	}
	cl, err := s.store.ClaimableJobs(ctx, 1)
	if err != nil {
		return nil, false, fmt.Errorf("tenant usage: %w", err)
	}
	for _, c := range cl {
		names[c.Tenant] = true
	}
	listed := map[string]bool{}
	for _, t := range tenants {
		listed[t] = true
	}
	sumQ, sumR := 0, 0
	for t := range names {
		q, r, err := s.store.UnfinishedOf(ctx, t)
		if err != nil {
			return nil, false, fmt.Errorf("tenant usage: %w", err)
		}
		sumQ, sumR = sumQ+q, sumR+r
		if listed[t] || q+r > 0 {
			out = append(out, TenantUsage{Tenant: t, Queued: q, Running: r, Quotas: s.policy(t)})
		}
	}
	totQ, totR, err := s.store.Unfinished(ctx)
	if err != nil {
		return nil, false, fmt.Errorf("tenant usage: %w", err)
	}
	if sumQ != totQ || sumR != totR {
		return nil, false, nil
	}
	sort.Slice(out, func(a, b int) bool { return out[a].Tenant < out[b].Tenant })
	return out, true, nil
}
