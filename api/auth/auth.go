package auth

import (
	"context"
	"fmt"
	"log/slog"
	"net/http"
	"strings"

	"github.com/beliefd/beliefd/api/errmap"
	"github.com/beliefd/beliefd/service/jobs"
	"google.golang.org/grpc"
	"google.golang.org/grpc/metadata"
	"google.golang.org/grpc/peer"
)

// OpenPrincipal is every caller's principal when no tenants document is
// configured: the open tenant with the admin role.
var OpenPrincipal = jobs.Principal{Tenant: "", Admin: true}

// Paths and methods that need no token or the admin role.
const (
	// APIPrefix starts the HTTP paths that need a token.
	APIPrefix = "/v1/"
	// AdminPrefix starts the HTTP paths that need the admin role.
	AdminPrefix = "/v1/admin/"
	// AdminService is the gRPC service whose methods need the admin role.
	AdminService = "/belief.v1.AdminService/"
	// MetricsPath serves the Prometheus metrics: open, unless
	// RequireMetricsToken is on.
	MetricsPath = "/metrics"
)

// openGRPC are the gRPC services that need no token.
var openGRPC = []string{"/grpc.health.v1.Health/", "/grpc.reflection.v1.ServerReflection/", "/grpc.reflection.v1alpha.ServerReflection/"}

// Authenticator checks the callers of both transports against a Registry.
type Authenticator struct {
	reg *Registry
	log *slog.Logger
	// metricsToken: MetricsPath needs a token with RoleMetrics or RoleAdmin.
	metricsToken bool
}

// RequireMetricsToken makes MetricsPath need a token with the metrics or
// the admin role when tokens are configured: the standing-query gauges
// carry every tenant's posteriors. It returns a.
func (a *Authenticator) RequireMetricsToken() *Authenticator {
	a.metricsToken = true
	return a
}

// New returns an Authenticator over reg; a nil reg leaves the API open
// (every caller is OpenPrincipal). log may be nil (slog.Default()).
func New(reg *Registry, log *slog.Logger) *Authenticator {
	if log == nil {
		log = slog.Default()
	}
	return &Authenticator{reg: reg, log: log}
}

// Open reports whether the API is open (no tenants document).
func (a *Authenticator) Open() bool { return a.reg == nil }

// Registry returns the registry in force (nil when the API is open).
func (a *Authenticator) Registry() *Registry { return a.reg }

// authenticate reads an Authorization value. Failures wrap
// errmap.ErrUnauthenticated; their text names what is wrong and never the
// token.
func (a *Authenticator) authenticate(header, transport, route, remote string) (identity, error) {
	if a.reg == nil {
		return identity{principal: OpenPrincipal}, nil
	}
	scheme, token, ok := strings.Cut(strings.TrimSpace(header), " ")
	token = strings.TrimSpace(token)
	var reason, problem string
	switch {
	case header == "":
		reason, problem = "no token", "no bearer token (send \"Authorization: Bearer TOKEN\")"
	case !ok || !strings.EqualFold(scheme, "Bearer") || token == "":
		reason, problem = "not a bearer token", "the authorization is not a bearer token (send \"Authorization: Bearer TOKEN\")"
	default:
		if id, known := a.reg.lookup(token); known {
			a.log.Debug("auth: accepted", "transport", transport, "route", route, "tenant", id.principal.Tenant,
				"admin", id.principal.Admin, "token_label", id.label)
			return id, nil
		}
		reason, problem = "unknown token", "the bearer token is not known (revoked, mistyped or for another server)"
	}
	a.log.Info("auth: refused", "transport", transport, "route", route, "remote", remote, "reason", reason)
	return identity{}, fmt.Errorf("%w: %s", errmap.ErrUnauthenticated, problem)
}

// metricsOnly is the error for a metrics-role token used on the API.
func metricsOnly(what string) error {
	return fmt.Errorf("%w: %s needs a token with the member or admin role (this token may only read %s)", jobs.ErrForbidden, what, MetricsPath)
}

// forbidden is the error for a call that needs the admin role.
func forbidden(what string) error {
	return fmt.Errorf("%w: %s needs a token with the admin role", jobs.ErrForbidden, what)
}

// HTTP wraps an HTTP handler: requests to paths under APIPrefix must
// authenticate (401 with WWW-Authenticate otherwise), paths under
// AdminPrefix need the admin role (403); the principal is attached to the
// request's context. Other paths pass through untouched.
func (a *Authenticator) HTTP(next http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		metrics := a.metricsToken && r.URL.Path == MetricsPath
		if !strings.HasPrefix(r.URL.Path, APIPrefix) && !metrics {
			next.ServeHTTP(w, r)
			return
		}
		id, err := a.authenticate(r.Header.Get("Authorization"), "http", r.URL.Path, r.RemoteAddr)
		if err != nil {
			challenge := `Bearer realm="beliefd"`
			if r.Header.Get("Authorization") != "" {
				challenge += `, error="invalid_token"`
			}
			w.Header().Set("WWW-Authenticate", challenge)
			errmap.Map(err).WriteHTTP(w)
			return
		}
		p := id.principal
		if metrics {
			if !p.Admin && !id.metricsOnly {
				a.log.Info("auth: metrics role needed", "transport", "http", "route", r.URL.Path, "tenant", p.Tenant)
				errmap.Map(fmt.Errorf("%w: %s needs a token with the metrics or the admin role", jobs.ErrForbidden, MetricsPath)).WriteHTTP(w)
				return
			}
			next.ServeHTTP(w, r)
			return
		}
		if id.metricsOnly {
			a.log.Info("auth: metrics-only token on the API", "transport", "http", "route", r.URL.Path, "tenant", p.Tenant)
			errmap.Map(metricsOnly(r.URL.Path)).WriteHTTP(w)
			return
		}
		if strings.HasPrefix(r.URL.Path, AdminPrefix) && !p.Admin {
			a.log.Info("auth: admin role needed", "transport", "http", "route", r.URL.Path, "tenant", p.Tenant)
			errmap.Map(forbidden(r.URL.Path)).WriteHTTP(w)
			return
		}
		next.ServeHTTP(w, r.WithContext(jobs.WithPrincipal(r.Context(), p)))
	})
}

// grpcCheck authenticates a gRPC call and returns its context with the
// principal, or a status error.
func (a *Authenticator) grpcCheck(ctx context.Context, method string) (context.Context, error) {
	for _, open := range openGRPC {
		if strings.HasPrefix(method, open) {
			return ctx, nil
		}
	}
	header := ""
	if md, ok := metadata.FromIncomingContext(ctx); ok {
		if v := md.Get("authorization"); len(v) > 0 {
			header = v[0]
		}
	}
	remote := ""
	if pr, ok := peer.FromContext(ctx); ok && pr.Addr != nil {
		remote = pr.Addr.String()
	}
	id, err := a.authenticate(header, "grpc", method, remote)
	if err != nil {
		return nil, errmap.GRPC(err, "")
	}
	p := id.principal
	if id.metricsOnly {
		a.log.Info("auth: metrics-only token on the API", "transport", "grpc", "route", method, "tenant", p.Tenant)
		return nil, errmap.GRPC(metricsOnly(method), "")
	}
	if strings.HasPrefix(method, AdminService) && !p.Admin {
		a.log.Info("auth: admin role needed", "transport", "grpc", "route", method, "tenant", p.Tenant)
		return nil, errmap.GRPC(forbidden(method), "")
	}
	return jobs.WithPrincipal(ctx, p), nil
}

// UnaryInterceptor authenticates unary calls (see HTTP for the rules).
func (a *Authenticator) UnaryInterceptor() grpc.UnaryServerInterceptor {
	return func(ctx context.Context, req any, info *grpc.UnaryServerInfo, handler grpc.UnaryHandler) (any, error) {
		ctx, err := a.grpcCheck(ctx, info.FullMethod)
		if err != nil {
			return nil, err
		}
		return handler(ctx, req)
	}
}

// StreamInterceptor authenticates streaming calls.
func (a *Authenticator) StreamInterceptor() grpc.StreamServerInterceptor {
	return func(srv any, ss grpc.ServerStream, info *grpc.StreamServerInfo, handler grpc.StreamHandler) error {
		ctx, err := a.grpcCheck(ss.Context(), info.FullMethod)
		if err != nil {
			return err
		}
		return handler(srv, &principalStream{ServerStream: ss, ctx: ctx})
	}
}

// principalStream is a server stream whose context carries the principal.
type principalStream struct {
	grpc.ServerStream
	ctx context.Context
}

func (s *principalStream) Context() context.Context { return s.ctx }
