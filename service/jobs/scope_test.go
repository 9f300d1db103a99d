package jobs_test

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"strings"
	"testing"

	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/jobs/memstore"
	"github.com/beliefd/beliefd/service/model"
)

func asTenant(ctx context.Context, tenant string, admin bool) context.Context {
	return jobs.WithPrincipal(ctx, jobs.Principal{Tenant: tenant, Admin: admin})
}

// alphaClinic is the chest-clinic network (Lauritzen & Spiegelhalter 1988)
// with P(asia = yes) changed from 0.01 to 0.2, so that answers tell which
// tenant's model a job ran on.
func alphaClinic() *model.Document {
	d := testnets.ChestClinic()
	for i := range d.Variables {
		if d.Variables[i].Name == "asia" {
			d.Variables[i].Table = [][]float64{{0.8, 0.2}}
		}
	}
	return d
}

func putAs(t *testing.T, ctx context.Context, svc *jobs.Service, d *model.Document) jobs.ModelInfo {
	t.Helper()
	data, err := json.Marshal(d)
	if err != nil {
		t.Fatal(err)
	}
	info, _, err := svc.PutModel(ctx, data)
	if err != nil {
		t.Fatalf("PutModel(%s): %v", d.Name, err)
	}
	return info
}

func TestTenantModelsAreNamespaced(t *testing.T) {
	e := newEnv(t, jobs.Config{}, nil) // the open tenant has chest-clinic
	alpha, beta := asTenant(e.ctx, "alpha", false), asTenant(e.ctx, "beta", false)
	admin := asTenant(e.ctx, "ops", true)

	info := putAs(t, alpha, e.svc, alphaClinic())
	if info.Name != "chest-clinic" || info.Version != 1 {
		t.Errorf("alpha's first upload: %s@%d", info.Name, info.Version)
	}
	for _, name := range []string{"b-net", "a-net", "c-net"} {
		d := testnets.ChestClinic()
		d.Name = name
		putAs(t, alpha, e.svc, d)
	}
	d := testnets.ChestClinic()
	d.Name = "zz-beta"
	putAs(t, beta, e.svc, d)

	// Beta gets for alpha's model what it gets for a model that does not exist.
	_, _, err := e.svc.GetModel(beta, "chest-clinic")
	_, _, none := e.svc.GetModel(beta, "no-such")
	if !errors.Is(err, jobs.ErrNotFound) || strings.ReplaceAll(err.Error(), "chest-clinic", "no-such") != none.Error() {
		t.Errorf("beta GetModel(chest-clinic) = %v; of a missing model %v", err, none)
	}
	for _, ref := range []string{"alpha/chest-clinic", "/chest-clinic", "alpha/", "~alpha/chest-clinic"} {
		if _, _, err := e.svc.GetModel(beta, ref); !errors.Is(err, jobs.ErrNotFound) {
			t.Errorf("member GetModel(%q) = %v, want not found", ref, err)
		}
	}
	if err := e.svc.DeleteModel(beta, "a-net"); !errors.Is(err, jobs.ErrNotFound) {
		t.Errorf("beta DeleteModel(alpha's a-net) = %v", err)
	}

	// Each caller lists its own models, a page at a time.
	list := func(ctx context.Context) []string {
		t.Helper()
		var names []string
		tok := ""
		for range 20 {
			infos, next, err := e.svc.ListModels(ctx, tok, 1)
			if err != nil {
				t.Fatal(err)
			}
			for _, i := range infos {
				names = append(names, i.Name)
			}
			if next == "" {
				return names
			}
			tok = next
		}
		t.Fatal("listing does not end")
		return nil
	}
	for _, c := range []struct {
		ctx  context.Context
		want string
	}{
		{e.ctx, "chest-clinic"},
		{alpha, "a-net b-net c-net chest-clinic"},
		{beta, "zz-beta"},
		{asTenant(e.ctx, "gamma", false), ""},
		// The admin sees every tenant's, qualified when not its own.
		{admin, "/chest-clinic alpha/a-net alpha/b-net alpha/c-net alpha/chest-clinic beta/zz-beta"},
	} {
		if got := strings.Join(list(c.ctx), " "); got != c.want {
			p, _ := jobs.PrincipalFrom(c.ctx)
			t.Errorf("%+v lists %q, want %q", p, got, c.want)
		}
	}
	// Qualified names work for the admin, and name the models it listed.
	if info, _, err := e.svc.GetModel(admin, "alpha/chest-clinic"); err != nil || info.Name != "alpha/chest-clinic" {
		t.Errorf("admin GetModel(alpha/chest-clinic) = %v, %v", info, err)
	}
	if info, _, err := e.svc.GetModel(admin, "/chest-clinic@1"); err != nil || info.Name != "/chest-clinic" {
		t.Errorf("admin GetModel(/chest-clinic@1) = %v, %v", info, err)
	}
	if err := e.svc.DeleteModel(admin, "beta/zz-beta"); err != nil {
		t.Errorf("admin DeleteModel(beta/zz-beta): %v", err)
	}
	if got := list(beta); len(got) != 0 {
		t.Errorf("beta still lists %v", got)
	}
}

func TestTenantJobsRunOnTheirModelAndStayScoped(t *testing.T) {
	e := newEnv(t, jobs.Config{}, nil)
	alpha, beta := asTenant(e.ctx, "alpha", false), asTenant(e.ctx, "beta", false)
	putAs(t, alpha, e.svc, alphaClinic())
	q := &infer.Query{Model: "chest-clinic", Method: infer.MethodExact, Evidence: map[string]string{"xray": "yes"}, Targets: []string{"tub"}}
	j, _, err := e.svc.Submit(alpha, q)
	if err != nil {
		t.Fatal(err)
	}
	if j.Tenant != "alpha" || j.Model.Name != "chest-clinic" {
		t.Errorf("job of tenant %q on model %q", j.Tenant, j.Model.Name)
	}

	// Beta: the same answers as for a job that does not exist.
	const ghost = "j000000000000000000000000"
	same := func(op string, err, none error) {
		t.Helper()
		if !errors.Is(err, jobs.ErrNotFound) || strings.ReplaceAll(err.Error(), j.ID, ghost) != none.Error() {
			t.Errorf("beta %s: %v; a job that does not exist: %v", op, err, none)
		}
	}
	_, err = e.svc.Get(beta, j.ID)
	_, none := e.svc.Get(beta, ghost)
	same("Get", err, none)
	_, err = e.svc.Cancel(beta, j.ID)
	_, none = e.svc.Cancel(beta, ghost)
	same("Cancel", err, none)
	_, err = e.svc.Watch(beta, j.ID)
	_, none = e.svc.Watch(beta, ghost)
	same("Watch", err, none)
	if _, err := e.svc.Get(asTenant(e.ctx, "ops", true), j.ID); err != nil {
		t.Errorf("admin Get: %v", err)
	}
	// An idempotency key never hands out another tenant's job.
	kq := *q
	kq.IdempotencyKey = "nightly-clinic"
	ka, _, err := e.svc.Submit(alpha, &kq)
	if err != nil {
		t.Fatal(err)
	}
	if kb, _, err := e.svc.Submit(beta, &kq); err == nil && (kb.ID == ka.ID || kb.Tenant != "beta") {
		t.Errorf("beta's submission with alpha's idempotency key gave job %s of tenant %q", kb.ID, kb.Tenant)
	}
	if again, created, err := e.svc.Submit(alpha, &kq); err != nil || created || again.ID != ka.ID {
		t.Errorf("alpha's second submission with its key: %v created %v, %v", again, created, err)
	}

	// Workers run it on alpha's model: the answer is the reference answer
	// on alpha's numbers, not on the open tenant's model of the same name.
	e.ctx = asTenant(e.ctx, "ops", true) // drain follows the job as an admin
	done := e.drain(j.ID, 1)
	if done.State != jobs.StateSucceeded {
		t.Fatalf("job %s: %s", done.State, done.Error)
	}
	ref := reference(t, alphaClinic(), q)
	other := reference(t, testnets.ChestClinic(), q)
	got, _ := e.svc.Get(alpha, j.ID)
	if g, w := got.Result.Marginals["tub"]["yes"].P, ref.Marginals["tub"]["yes"].P; g != w || w == other.Marginals["tub"]["yes"].P {
		t.Errorf("P(tub=yes | xray=yes) = %v, want alpha's %v (the open tenant's model gives %v)", g, w, other.Marginals["tub"]["yes"].P)
	}
}

func TestSampleAndModelQuotas(t *testing.T) {
	policy := func(tenant string) jobs.TenantPolicy {
		if tenant == "alpha" {
			return jobs.TenantPolicy{MaxSamplesPerJob: 30000, MaxModelBytes: 2000}
		}
		return jobs.TenantPolicy{}
	}
	e := newEnv(t, jobs.Config{TenantPolicy: policy}, nil)
	alpha := asTenant(e.ctx, "alpha", false)
	putAs(t, alpha, e.svc, testnets.ChestClinic())
	lw := func(stop infer.StopRule) *infer.Query {
		return &infer.Query{Model: "chest-clinic", Method: infer.MethodLikelihoodWeighting, Targets: []string{"tub"}, Stop: stop}
	}
	_, _, err := e.svc.Submit(alpha, lw(infer.StopRule{MaxSamples: 30001}))
	if !errors.Is(err, jobs.ErrQuotaExceeded) || !strings.Contains(err.Error(), `max_samples_per_job of tenant "alpha" is 30000; stop.max_samples asks for 30001`) {
		t.Errorf("Submit over the quota: %v", err)
	}
	if _, err := e.svc.Query(alpha, lw(infer.StopRule{MaxSamples: 30001})); !errors.Is(err, jobs.ErrQuotaExceeded) {
		t.Errorf("Query over the quota: %v", err)
	}
	// No bound of its own: the quota becomes the bound (30000 samples in
	// blocks of 8192: 4 blocks).
	j, _, err := e.svc.Submit(alpha, lw(infer.StopRule{AbsErr: 1e-6}))
	if err != nil {
		t.Fatal(err)
	}
	if j.Query.Stop.MaxSamples != 30000 || j.Stop.MaxSamples != 30000 || j.Blocks != 4 {
		t.Errorf("unbounded job: stop %+v, %d blocks", j.Stop, j.Blocks)
	}
	res, err := e.svc.Query(alpha, lw(infer.StopRule{}))
	if err != nil || res.Samples != 30000 {
		t.Errorf("unbounded query drew %d samples (%v), want the quota 30000", res.Samples, err)
	}
	// Within the quota, and other tenants, are untouched.
	if _, _, err := e.svc.Submit(alpha, lw(infer.StopRule{MaxSamples: 30000})); err != nil {
		t.Errorf("Submit at the quota: %v", err)
	}
	if j, _, err := e.svc.Submit(e.ctx, lw(infer.StopRule{})); err != nil || j.Stop.MaxSamples != 1_000_000 {
		t.Errorf("open tenant: %v, %+v", err, j.Stop)
	}

	data, _ := json.Marshal(testnets.ChestClinic())
	if len(data) > 2001 {
		t.Fatalf("the document has %d bytes already", len(data))
	}
	data = append(data, bytes.Repeat([]byte(" "), 2001-len(data))...)
	if _, _, err := e.svc.PutModel(alpha, data); !errors.Is(err, jobs.ErrQuotaExceeded) ||
		!strings.Contains(err.Error(), `max_model_bytes of tenant "alpha" is 2000; the document has 2001 bytes`) {
		t.Errorf("PutModel over the size quota: %v", err)
	}
}

func TestTenantUsageIsForAdmins(t *testing.T) {
	policy := func(tenant string) jobs.TenantPolicy { return jobs.TenantPolicy{MaxUnfinished: len(tenant)} }
	e := newEnv(t, jobs.Config{TenantPolicy: policy}, nil)
	alpha := asTenant(e.ctx, "alpha", false)
	putAs(t, alpha, e.svc, testnets.ChestClinic())
	q := &infer.Query{Model: "chest-clinic", Method: infer.MethodExact, Targets: []string{"tub"}}
	for range 2 {
		if _, _, err := e.svc.Submit(alpha, q); err != nil {
			t.Fatal(err)
		}
	}
	if _, err := e.svc.TenantUsage(alpha, nil); !errors.Is(err, jobs.ErrForbidden) {
		t.Errorf("member TenantUsage: %v, want ErrForbidden", err)
	}
	us, err := e.svc.TenantUsage(asTenant(e.ctx, "ops", true), []string{"zeta", "alpha"})
	if err != nil {
		t.Fatal(err)
	}
	got, _ := json.Marshal(us)
	want := `[{"tenant":"alpha","queued":2,"running":0,"quotas":{"max_unfinished":5}},{"tenant":"zeta","queued":0,"running":0,"quotas":{"max_unfinished":4}}]`
	if string(got) != want {
		t.Errorf("usage %s, want %s", got, want)
	}
}

// hidingStore leaves one tenant's jobs out of ClaimableJobs, as a store
// does for a tenant whose jobs all run with no block left to hand out.
type hidingStore struct {
	jobs.Store
	hide string
}

func (h hidingStore) ClaimableJobs(ctx context.Context, limit int) ([]jobs.Claimable, error) {
	cl, err := h.Store.ClaimableJobs(ctx, limit)
	out := cl[:0]
	for _, c := range cl {
		if c.Tenant != h.hide {
			out = append(out, c)
		}
	}
	return out, err
}

// TenantUsage answers from the store's per-tenant counts, and reads the
// job records when those miss a tenant: both ways give the counts that
// listing every job gives.
func TestTenantUsageCountsEveryTenant(t *testing.T) {
	for _, hide := range []string{"", "gamma"} {
		st := memstore.New(memstore.Options{})
		svc, err := jobs.NewService(hidingStore{Store: st, hide: hide}, jobs.Config{Logger: quietLogger()}, nil)
		if err != nil {
			t.Fatal(err)
		}
		ctx := context.Background()
		q := &infer.Query{Model: "chest-clinic", Method: infer.MethodExact, Targets: []string{"tub"}}
		want := map[string]int{"alpha": 2, "gamma": 3, "": 1}
		for tenant, n := range want {
			as := asTenant(ctx, tenant, false)
			putAs(t, as, svc, testnets.ChestClinic())
			for range n {
				if _, _, err := svc.Submit(as, q); err != nil {
					t.Fatal(err)
				}
			}
		}
		us, err := svc.TenantUsage(asTenant(ctx, "ops", true), []string{"alpha", "zeta"})
		if err != nil {
			t.Fatal(err)
		}
		got := map[string]int{}
		var names []string
		for _, u := range us {
			got[u.Tenant] = u.Queued + u.Running
			names = append(names, u.Tenant)
		}
		if fmt.Sprint(names) != fmt.Sprint([]string{"", "alpha", "gamma", "zeta"}) {
			t.Errorf("hiding %q: tenants %q; want the open tenant, alpha, gamma and zeta in order", hide, names)
		}
		for tenant, n := range want {
			if got[tenant] != n {
				t.Errorf("hiding %q: tenant %q has %d unfinished; want %d", hide, tenant, got[tenant], n)
			}
		}
	}
}
