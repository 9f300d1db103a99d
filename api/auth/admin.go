package auth

import (
	"context"
	"encoding/json"
	"log/slog"
	"net/http"

	"github.com/beliefd/beliefd/api/errmap"
	beliefv1 "github.com/beliefd/beliefd/proto/belief/v1"
	"github.com/beliefd/beliefd/service/jobs"
)

// UsageSource is what the admin endpoints need from the domain;
// *jobs.Service implements it.
type UsageSource interface {
	// TenantUsage counts the unfinished jobs of the tenants given and of
	// every other tenant that has some, with their quotas; admin only.
	TenantUsage(ctx context.Context, tenants []string) ([]jobs.TenantUsage, error)
}

// Admin serves the admin view of the tenants: GET /v1/admin/tenants over
// HTTP and belief.v1.AdminService over gRPC. The authenticator checks the
// role before a call gets here; the service checks it again.
type Admin struct {
	beliefv1.UnimplementedAdminServiceServer

	src  UsageSource
	auth *Authenticator
	log  *slog.Logger
}

// NewAdmin returns the admin endpoints over src, listing the tenants of
// a's registry (none when the API is open). log may be nil.
func NewAdmin(src UsageSource, a *Authenticator, log *slog.Logger) *Admin {
	if log == nil {
		log = slog.Default()
	}
	return &Admin{src: src, auth: a, log: log}
}

func (ad *Admin) usage(ctx context.Context) ([]jobs.TenantUsage, error) {
	var tenants []string
	if reg := ad.auth.Registry(); reg != nil {
		tenants = reg.Tenants()
	}
	return ad.src.TenantUsage(ctx, tenants)
}

// usageList is the body of GET /v1/admin/tenants.
type usageList struct {
	Tenants []jobs.TenantUsage `json:"tenants"`
}

// ServeHTTP answers GET /v1/admin/tenants with {"tenants": [usage...]}:
// each tenant's "tenant", "queued", "running" and "quotas"
// (max_unfinished, max_samples_per_job, max_model_bytes, share; absent
// when not set).
func (ad *Admin) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	us, err := ad.usage(r.Context())
	if err != nil {
		e := errmap.Map(err)
		if e.Server {
			ad.log.Error("http: request failed", "method", r.Method, "route", r.URL.Path, "status", e.HTTPStatus, "err", err)
		}
		e.WriteHTTP(w)
		return
	}
	if us == nil {
		us = []jobs.TenantUsage{}
	}
	body, err := json.Marshal(usageList{Tenants: us})
	if err != nil {
		ad.log.Error("http: encode response", "err", err)
		errmap.Map(err).WriteHTTP(w)
		return
	}
	w.Header().Set("Content-Type", "application/json")
	w.Header().Set("X-Content-Type-Options", "nosniff")
	_, _ = w.Write(append(body, '\n'))
}

// ListTenantUsage implements beliefv1.AdminServiceServer.
func (ad *Admin) ListTenantUsage(ctx context.Context, _ *beliefv1.ListTenantUsageRequest) (*beliefv1.ListTenantUsageResponse, error) {
	us, err := ad.usage(ctx)
	if err != nil {
		if e := errmap.Map(err); e.Server {
			ad.log.Error("grpc: request failed", "method", "ListTenantUsage", "code", e.Code.String(), "err", err)
		}
		return nil, errmap.GRPC(err, "")
	}
	out := &beliefv1.ListTenantUsageResponse{Tenants: make([]*beliefv1.TenantUsage, len(us))}
	for i, u := range us {
		out.Tenants[i] = &beliefv1.TenantUsage{
			Tenant: u.Tenant, Queued: int64(u.Queued), Running: int64(u.Running),
			MaxUnfinished: int64(u.Quotas.MaxUnfinished), MaxSamplesPerJob: u.Quotas.MaxSamplesPerJob,
			MaxModelBytes: u.Quotas.MaxModelBytes, Share: u.Quotas.EffectiveShare(),
		}
	}
	return out, nil
}
