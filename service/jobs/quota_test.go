package jobs_test

import (
	"encoding/json"
	"errors"
	"testing"

	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/sampling"
)

// Submit applies the tenant's max_unfinished quota through the store, and
// List and idempotency keys are scoped by tenant.
func TestTenantQuotaAndScopedListing(t *testing.T) {
	cfg := jobs.Config{TenantPolicy: func(tenant string) jobs.TenantPolicy {
		if tenant == "acme" {
			return jobs.TenantPolicy{MaxUnfinished: 2}
		}
		return jobs.TenantPolicy{}
	}}
	e := newEnv(t, cfg, nil)
	doc, err := json.Marshal(testnets.ChestClinic())
	if err != nil {
		t.Fatal(err)
	}
	as := func(tenant string) *jobs.Principal { return &jobs.Principal{Tenant: tenant} }
	submit := func(p *jobs.Principal, key string) (*jobs.Job, bool, error) {
		ctx := jobs.WithPrincipal(e.ctx, *p)
		return e.svc.Submit(ctx, &infer.Query{Model: "chest-clinic", Method: infer.MethodForward, IdempotencyKey: key,
			Stop: infer.StopRule{MaxSamples: 4 * sampling.DefaultBlockSize}, Seed: seed(9)})
	}
	for _, tenant := range []string{"acme", "birch"} {
		if _, _, err := e.svc.PutModel(jobs.WithPrincipal(e.ctx, *as(tenant)), doc); err != nil {
			t.Fatal(err)
		}
	}
	var acme []string
	for _, key := range []string{"a1", "a2"} {
		j, created, err := submit(as("acme"), key)
		if err != nil || !created || j.Tenant != "acme" {
			t.Fatalf("acme's submission %s: %+v created %v, %v", key, j, created, err)
		}
		acme = append(acme, j.ID)
	}
	_, _, err = submit(as("acme"), "a3")
	if !errors.Is(err, jobs.ErrQuotaExceeded) || errors.Is(err, jobs.ErrQueueFull) {
		t.Fatalf("acme's third unfinished job with max_unfinished 2: %v; want ErrQuotaExceeded", err)
	}
	// A retry of a submission that was accepted finds its job even at the quota.
	if j, created, err := submit(as("acme"), "a1"); err != nil || created || j.ID != acme[0] {
		t.Fatalf("acme's retry of a1: %+v created %v, %v; want %s", j, created, err, acme[0])
	}
	// birch has no quota of its own, and its keys are its own.
	b, created, err := submit(as("birch"), "a1")
	if err != nil || !created || b.Tenant != "birch" || b.ID == acme[0] {
		t.Fatalf("birch's submission with acme's key: %+v created %v, %v; want a new job of birch", b, created, err)
	}
	// Cancelling one of acme's jobs frees a place.
	if _, err := e.svc.Cancel(jobs.WithPrincipal(e.ctx, *as("acme")), acme[0]); err != nil {
		t.Fatal(err)
	}
	if _, created, err := submit(as("acme"), "a3"); err != nil || !created {
		t.Fatalf("acme's submission after a cancel: created %v, %v", created, err)
	}
	count := func(p jobs.Principal) int {
		js, _, err := e.svc.List(jobs.WithPrincipal(e.ctx, p), "", 100)
		if err != nil {
			t.Fatal(err)
		}
		for _, j := range js {
			if !p.Admin && j.Tenant != p.Tenant {
				t.Fatalf("%s lists job %s of %q", p.Tenant, j.ID, j.Tenant)
			}
		}
		return len(js)
	}
	if a, b, o, all := count(*as("acme")), count(*as("birch")), count(*as("")), count(jobs.Principal{Admin: true}); a != 3 || b != 1 || o != 0 || all != 4 {
		t.Fatalf("listings: acme %d, birch %d, open %d, admin %d; want 3, 1, 0, 4", a, b, o, all)
	}
	if q, r, err := e.store.UnfinishedOf(e.ctx, "acme"); err != nil || q != 2 || r != 0 {
		t.Fatalf("UnfinishedOf(acme) = %d, %d, %v; want 2, 0", q, r, err)
	}
}
