package auth

import (
	"bytes"
	"context"
	"encoding/base64"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/beliefd/beliefd/service/jobs"
	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/metadata"
	"google.golang.org/grpc/status"
)

// fixture mints tokens for two tenants and an admin and returns the
// document with their hashes.
type fixture struct {
	alpha, beta, admin, scrape string
	doc                        []byte
}

func newFixture(t *testing.T) fixture {
	t.Helper()
	var f fixture
	for _, tok := range []*string{&f.alpha, &f.beta, &f.admin, &f.scrape} {
		var err error
		if *tok, err = NewToken(); err != nil {
			t.Fatal(err)
		}
	}
	d := Document{
		Tenants: map[string]jobs.TenantPolicy{"alpha": {MaxSamplesPerJob: 50000}, "beta": {MaxModelBytes: 4096, Share: 2}, "ops": {}},
		Tokens: []TokenEntry{
			{Label: "alpha-ci", Tenant: "alpha", Role: RoleMember, SHA256: HashToken(f.alpha)},
			{Label: "beta-ci", Tenant: "beta", Role: RoleMember, SHA256: HashToken(f.beta)},
			{Label: "oncall", Tenant: "ops", Role: RoleAdmin, SHA256: HashToken(f.admin)},
			{Label: "prometheus", Tenant: "ops", Role: RoleMetrics, SHA256: HashToken(f.scrape)},
		},
	}
	var err error
	if f.doc, err = json.Marshal(d); err != nil {
		t.Fatal(err)
	}
	return f
}

func TestNewTokenAndHash(t *testing.T) {
	// SHA-256("abc") from FIPS 180-2, appendix B.1.
	if got := HashToken("abc"); got != "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad" {
		t.Errorf("HashToken(abc) = %s", got)
	}
	a, err := NewToken()
	if err != nil {
		t.Fatal(err)
	}
	b, _ := NewToken()
	if a == b {
		t.Error("two tokens are equal")
	}
	raw, err := base64.RawURLEncoding.DecodeString(strings.TrimPrefix(a, TokenPrefix))
	if !strings.HasPrefix(a, TokenPrefix) || err != nil || len(raw) != 32 {
		t.Errorf("token %q: want %s and 32 bytes of base64url (%d bytes, %v)", a, TokenPrefix, len(raw), err)
	}
}

func TestParseDocumentNamesTheFault(t *testing.T) {
	hash := HashToken("x")
	cases := []struct{ doc, want string }{
		{`{"tenants": {"a b": {}}}`, `tenant name "a b"`},
		{`{"tenants": {"a": {"max_unfinished": -1}}}`, "tenants[a].max_unfinished -1"},
		{`{"tenants": {"a": {"max_samples_per_job": -5}}}`, "tenants[a].max_samples_per_job -5"},
		{`{"tenants": {"a": {"max_model_bytes": -5}}}`, "tenants[a].max_model_bytes -5"},
		{`{"tenants": {"a": {"share": -1}}}`, "tenants[a].share -1"},
		{`{"tenants": {"a": {}}, "tokens": [{"label": "ci", "tenant": "b", "role": "member", "sha256": "` + hash + `"}]}`, `tokens[0] (label "ci"): tenant "b" is not listed`},
		{`{"tenants": {"a": {}}, "tokens": [{"tenant": "a", "role": "owner", "sha256": "` + hash + `"}]}`, `tokens[0]: role "owner"`},
		{`{"tenants": {"a": {}}, "tokens": [{"tenant": "a", "role": "member", "sha256": "bfd1_notahash"}]}`, "tokens[0]: sha256 is not 64 hex digits"},
		{`{"tenants": {"a": {}}, "tokens": [{"tenant": "a", "role": "member", "sha256": "` + hash + `"}, {"tenant": "a", "role": "admin", "sha256": "` + strings.ToUpper(hash) + `"}]}`, "tokens[1]: the same sha256 as tokens[0]"},
		{`{"tenants": {}, "token": []}`, `unknown field "token"`},
		{`{"tenants": {}} {}`, "data after the document"},
	}
	for _, tc := range cases {
		_, err := ParseDocument([]byte(tc.doc))
		if !errors.Is(err, ErrBadDocument) || !strings.Contains(err.Error(), tc.want) {
			t.Errorf("ParseDocument(%s) = %v, want ErrBadDocument naming %q", tc.doc, err, tc.want)
		}
		if err != nil && strings.Contains(err.Error(), hash) {
			t.Errorf("error %q shows a token hash", err)
		}
	}
}

func TestRegistryLookupAndLoad(t *testing.T) {
	f := newFixture(t)
	reg, err := NewRegistry(f.doc)
	if err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		token string
		want  jobs.Principal
		ok    bool
	}{
		{f.alpha, jobs.Principal{Tenant: "alpha"}, true},
		{f.beta, jobs.Principal{Tenant: "beta"}, true},
		{f.admin, jobs.Principal{Tenant: "ops", Admin: true}, true},
		{f.alpha + "x", jobs.Principal{}, false},
		{HashToken(f.alpha), jobs.Principal{}, false}, // the hash is not a token
		{"", jobs.Principal{}, false},
	} {
		id, ok := reg.lookup(tc.token)
		if ok != tc.ok || id.principal != tc.want {
			t.Errorf("lookup: %+v %v, want %+v %v", id.principal, ok, tc.want, tc.ok)
		}
	}
	if got := strings.Join(reg.Tenants(), ","); got != "alpha,beta,ops" {
		t.Errorf("Tenants = %s", got)
	}
	if p := reg.Policy("beta"); p.MaxModelBytes != 4096 || p.EffectiveShare() != 2 {
		t.Errorf("Policy(beta) = %+v", p)
	}
	if changed, err := reg.Load(f.doc); changed || err != nil {
		t.Errorf("reloading the same document: changed %v, %v", changed, err)
	}
	// An invalid document changes nothing.
	if _, err := reg.Load([]byte(`{"tenants": {"alpha": {}}, "tokens": [{"tenant": "alpha", "role": "boss", "sha256": "00"}]}`)); err == nil {
		t.Fatal("invalid document loaded")
	}
	if _, ok := reg.lookup(f.beta); !ok {
		t.Error("beta's token stopped working after an invalid document")
	}
	// A new document revokes the tokens it no longer lists.
	next := Document{Tenants: map[string]jobs.TenantPolicy{"alpha": {}}, Tokens: []TokenEntry{{Tenant: "alpha", Role: RoleMember, SHA256: HashToken(f.alpha)}}}
	data, _ := json.Marshal(next)
	if changed, err := reg.Load(data); !changed || err != nil {
		t.Fatalf("Load: %v %v", changed, err)
	}
	if _, ok := reg.lookup(f.beta); ok {
		t.Error("beta's token still works after it was removed")
	}
}

func TestFollowReloadsAndKeepsTheLastGoodDocument(t *testing.T) {
	f := newFixture(t)
	reg, err := NewRegistry(f.doc)
	if err != nil {
		t.Fatal(err)
	}
	onlyAlpha, _ := json.Marshal(Document{Tenants: map[string]jobs.TenantPolicy{"alpha": {}},
		Tokens: []TokenEntry{{Tenant: "alpha", Role: RoleMember, SHA256: HashToken(f.alpha)}}})
	var mu sync.Mutex
	feed := [][]byte{[]byte("{not json"), nil, onlyAlpha}
	fetches := 0
	done := make(chan struct{})
	fetch := func(context.Context) ([]byte, error) {
		mu.Lock()
		defer mu.Unlock()
		fetches++
		if len(feed) == 0 {
			select {
			case <-done:
			default:
				close(done)
			}
			return onlyAlpha, nil
		}
		d := feed[0]
		feed = feed[1:]
		if d == nil {
			return nil, errors.New("store unreachable")
		}
		return d, nil
	}
	var logs bytes.Buffer
	ctx, cancel := context.WithCancel(context.Background())
	stopped := make(chan struct{})
	go func() {
		defer close(stopped)
		reg.Follow(ctx, fetch, time.Millisecond, slog.New(slog.NewTextHandler(&syncWriter{w: &logs}, nil)))
	}()
	select {
	case <-done:
	case <-time.After(10 * time.Second):
		t.Fatal("Follow did not fetch the documents")
	}
	cancel()
	<-stopped
	if _, ok := reg.lookup(f.beta); ok {
		t.Error("the reloaded document did not revoke beta's token")
	}
	if _, ok := reg.lookup(f.alpha); !ok {
		t.Error("alpha's token was lost")
	}
	for _, want := range []string{"not reloaded", "store unreachable", "tenants document reloaded"} {
		if !strings.Contains(logs.String(), want) {
			t.Errorf("logs lack %q:\n%s", want, logs.String())
		}
	}
}

type syncWriter struct {
	mu sync.Mutex
	w  io.Writer
}

func (s *syncWriter) Write(b []byte) (int, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.w.Write(b)
}

// echo answers with the principal of the request.
var echo = http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
	p, ok := jobs.PrincipalFrom(r.Context())
	fmt.Fprintf(w, "%s %v %v", p.Tenant, p.Admin, ok)
})

func TestHTTPMiddleware(t *testing.T) {
	f := newFixture(t)
	reg, err := NewRegistry(f.doc)
	if err != nil {
		t.Fatal(err)
	}
	h := New(reg, slog.New(slog.DiscardHandler)).HTTP(echo)
	cases := []struct {
		name, path, authz string
		status            int
		body, challenge   string
	}{
		{"member", "/v1/jobs", "Bearer " + f.alpha, 200, "alpha false true", ""},
		{"scheme is case-insensitive", "/v1/jobs", "bearer " + f.beta, 200, "beta false true", ""},
		{"admin", "/v1/admin/tenants", "Bearer " + f.admin, 200, "ops true true", ""},
		{"no token", "/v1/jobs", "", 401, `"code":"UNAUTHENTICATED"`, `Bearer realm="beliefd"`},
		{"unknown token", "/v1/models", "Bearer " + f.alpha + "0", 401, "not known", `Bearer realm="beliefd", error="invalid_token"`},
		{"basic auth", "/v1/models", "Basic YTpi", 401, "not a bearer token", `Bearer realm="beliefd", error="invalid_token"`},
		{"member on admin path", "/v1/admin/tenants", "Bearer " + f.alpha, 403, `"code":"PERMISSION_DENIED"`, ""},
		{"health is open", "/healthz", "", 200, " false false", ""},
		{"readiness is open", "/readyz", "", 200, " false false", ""},
		{"metrics are open", "/metrics", "", 200, " false false", ""},
		{"the page is open", "/", "", 200, " false false", ""},
		{"a bad token on an open path is ignored", "/healthz", "Bearer nonsense", 200, " false false", ""},
		{"a metrics token calls no API", "/v1/jobs", "Bearer " + f.scrape, 403, "may only read /metrics", ""},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			req := httptest.NewRequest("GET", tc.path, nil)
			if tc.authz != "" {
				req.Header.Set("Authorization", tc.authz)
			}
			rec := httptest.NewRecorder()
			h.ServeHTTP(rec, req)
			if rec.Code != tc.status || !strings.Contains(rec.Body.String(), tc.body) {
				t.Errorf("%s: %d %s, want %d with %q", tc.path, rec.Code, rec.Body.String(), tc.status, tc.body)
			}
			if got := rec.Header().Get("WWW-Authenticate"); got != tc.challenge {
				t.Errorf("WWW-Authenticate %q, want %q", got, tc.challenge)
			}
			for _, tok := range []string{f.alpha, f.beta, f.admin} {
				if strings.Contains(rec.Body.String(), tok) {
					t.Error("the response shows a token")
				}
			}
		})
	}

	// Open: no registry, every caller is the open tenant with the admin role.
	open := New(nil, nil).HTTP(echo)
	rec := httptest.NewRecorder()
	open.ServeHTTP(rec, httptest.NewRequest("GET", "/v1/admin/tenants", nil))
	if rec.Code != 200 || rec.Body.String() != " true true" {
		t.Errorf("open API: %d %q", rec.Code, rec.Body.String())
	}
}

// With RequireMetricsToken, /metrics needs a token with the metrics or
// the admin role; a member's token is refused there.
func TestMetricsToken(t *testing.T) {
	f := newFixture(t)
	reg, err := NewRegistry(f.doc)
	if err != nil {
		t.Fatal(err)
	}
	h := New(reg, slog.New(slog.DiscardHandler)).RequireMetricsToken().HTTP(echo)
	for _, tc := range []struct {
		name, authz string
		status      int
		body        string
	}{
		{"no token", "", 401, "UNAUTHENTICATED"},
		{"member", "Bearer " + f.alpha, 403, "metrics or the admin role"},
		{"metrics role", "Bearer " + f.scrape, 200, " false false"},
		{"admin", "Bearer " + f.admin, 200, " false false"},
	} {
		req := httptest.NewRequest("GET", MetricsPath, nil)
		if tc.authz != "" {
			req.Header.Set("Authorization", tc.authz)
		}
		rec := httptest.NewRecorder()
		h.ServeHTTP(rec, req)
		if rec.Code != tc.status || !strings.Contains(rec.Body.String(), tc.body) {
			t.Errorf("%s: %d %s, want %d with %q", tc.name, rec.Code, rec.Body.String(), tc.status, tc.body)
		}
	}
	// Open (no tenants document): nothing to require.
	rec := httptest.NewRecorder()
	New(nil, nil).RequireMetricsToken().HTTP(echo).ServeHTTP(rec, httptest.NewRequest("GET", MetricsPath, nil))
	if rec.Code != 200 {
		t.Errorf("open API /metrics: %d", rec.Code)
	}
}

func TestGRPCInterceptors(t *testing.T) {
	f := newFixture(t)
	reg, err := NewRegistry(f.doc)
	if err != nil {
		t.Fatal(err)
	}
	a := New(reg, slog.New(slog.DiscardHandler))
	unary := a.UnaryInterceptor()
	stream := a.StreamInterceptor()
	var seen jobs.Principal
	handler := func(ctx context.Context, _ any) (any, error) {
		seen, _ = jobs.PrincipalFrom(ctx)
		return "ok", nil
	}
	sh := func(_ any, ss grpc.ServerStream) error {
		seen, _ = jobs.PrincipalFrom(ss.Context())
		return nil
	}
	cases := []struct {
		name, method, authz string
		code                codes.Code
		want                jobs.Principal
	}{
		{"member", "/belief.v1.JobService/GetJob", "Bearer " + f.alpha, codes.OK, jobs.Principal{Tenant: "alpha"}},
		{"admin", "/belief.v1.AdminService/ListTenantUsage", "Bearer " + f.admin, codes.OK, jobs.Principal{Tenant: "ops", Admin: true}},
		{"no token", "/belief.v1.JobService/GetJob", "", codes.Unauthenticated, jobs.Principal{}},
		{"unknown token", "/belief.v1.ModelService/ListModels", "Bearer bfd1_x", codes.Unauthenticated, jobs.Principal{}},
		{"member on admin service", "/belief.v1.AdminService/ListTenantUsage", "Bearer " + f.beta, codes.PermissionDenied, jobs.Principal{}},
		{"metrics token", "/belief.v1.JobService/GetJob", "Bearer " + f.scrape, codes.PermissionDenied, jobs.Principal{}},
		{"health is open", "/grpc.health.v1.Health/Check", "", codes.OK, jobs.Principal{}},
		{"reflection is open", "/grpc.reflection.v1.ServerReflection/ServerReflectionInfo", "", codes.OK, jobs.Principal{}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			ctx := context.Background()
			if tc.authz != "" {
				ctx = metadata.NewIncomingContext(ctx, metadata.Pairs("authorization", tc.authz))
			}
			seen = jobs.Principal{Tenant: "unset"}
			_, err := unary(ctx, nil, &grpc.UnaryServerInfo{FullMethod: tc.method}, handler)
			if status.Code(err) != tc.code {
				t.Fatalf("unary: %v, want %v", err, tc.code)
			}
			if err == nil && seen != tc.want {
				t.Errorf("unary principal %+v, want %+v", seen, tc.want)
			}
			seen = jobs.Principal{Tenant: "unset"}
			err = stream(nil, &fakeStream{ctx: ctx}, &grpc.StreamServerInfo{FullMethod: tc.method}, sh)
			if status.Code(err) != tc.code {
				t.Fatalf("stream: %v, want %v", err, tc.code)
			}
			if err == nil && seen != tc.want {
				t.Errorf("stream principal %+v, want %+v", seen, tc.want)
			}
		})
	}
}

type fakeStream struct {
	grpc.ServerStream
	ctx context.Context
}

func (s *fakeStream) Context() context.Context { return s.ctx }
