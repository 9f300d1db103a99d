package api_test

import (
	"bytes"
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/tls"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/json"
	"io"
	"log/slog"
	"math/big"
	"net"
	"net/http"
	"net/http/httptest"
	"net/url"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/beliefd/beliefd/api/auth"
	"github.com/beliefd/beliefd/api/convert"
	"github.com/beliefd/beliefd/api/grpcapi"
	"github.com/beliefd/beliefd/api/httpapi"
	beliefv1 "github.com/beliefd/beliefd/proto/belief/v1"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/jobs/memstore"
	"github.com/beliefd/beliefd/service/model"
	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/metadata"
	"google.golang.org/grpc/status"
)

// Two tenants' documents of the same name: the dock conveyor of a
// Tarnwick Freight depot (invented), as tenant alpha and tenant beta
// describe it.
const (
	conveyorAlpha = `{"name": "dock-conveyor", "variables": [
  {"name": "quenchwater_valve", "states": ["shut", "weeping"], "table": [[0.97, 0.03]]},
  {"name": "belt_slurry", "states": ["dry", "slick"], "parents": ["quenchwater_valve"], "table": [[0.99, 0.01], [0.4, 0.6]]},
  {"name": "slip_klaxon", "states": ["silent", "blaring"], "parents": ["belt_slurry"], "table": [[0.98, 0.02], [0.1, 0.9]]}
]}`
	conveyorBeta = `{"name": "dock-conveyor", "variables": [
  {"name": "roller_bearing", "states": ["ok", "seized"], "table": [[0.9, 0.1]]}
]}`
)

// tenantStack is the service with tenants: memory store, job service with
// the registry's quotas, both transports behind the authenticator, and
// the admin endpoints. No workers run, so jobs stay queued.
type tenantStack struct {
	svc                *jobs.Service
	httpURL            string
	client             *http.Client
	conn               *grpc.ClientConn
	alpha, beta, admin string
}

// tenantDoc: alpha may draw 50,000 samples per job, beta store models of
// at most 600 bytes; ops holds the admin token.
func tenantDoc(t *testing.T) (doc []byte, alpha, beta, admin string) {
	t.Helper()
	toks := make([]string, 3)
	for i := range toks {
		var err error
		if toks[i], err = auth.NewToken(); err != nil {
			t.Fatal(err)
		}
	}
	d := auth.Document{
		Tenants: map[string]jobs.TenantPolicy{"alpha": {MaxSamplesPerJob: 50000}, "beta": {MaxModelBytes: 600}, "ops": {}},
		Tokens: []auth.TokenEntry{
			{Label: "alpha-ci", Tenant: "alpha", Role: auth.RoleMember, SHA256: auth.HashToken(toks[0])},
			{Label: "beta-ci", Tenant: "beta", Role: auth.RoleMember, SHA256: auth.HashToken(toks[1])},
			{Label: "oncall", Tenant: "ops", Role: auth.RoleAdmin, SHA256: auth.HashToken(toks[2])},
		},
	}
	doc, err := json.Marshal(d)
	if err != nil {
		t.Fatal(err)
	}
	return doc, toks[0], toks[1], toks[2]
}

// newTenantStack serves over loopback, with TLS when serverTLS is set
// (clientTLS then verifies the server).
func newTenantStack(t *testing.T, log *slog.Logger, serverTLS, clientTLS *tls.Config) *tenantStack {
	t.Helper()
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	doc, alpha, beta, admin := tenantDoc(t)
	reg, err := auth.NewRegistry(doc)
	if err != nil {
		t.Fatal(err)
	}
	store := memstore.New(memstore.Options{})
	svc, err := jobs.NewService(store, jobs.Config{TenantPolicy: reg.Policy, Logger: log}, nil)
	if err != nil {
		t.Fatal(err)
	}
	a := auth.New(reg, log)
	adm := auth.NewAdmin(svc, a, log)
	hs := httptest.NewUnstartedServer(httpapi.New(svc, httpapi.Options{Logger: log, Auth: a.HTTP, Admin: adm}))
	hs.Config.ErrorLog = slog.NewLogLogger(log.Handler(), slog.LevelError)
	if serverTLS != nil {
		hs.TLS = serverTLS
		hs.StartTLS()
	} else {
		hs.Start()
	}
	client := hs.Client()
	if clientTLS != nil {
		client = &http.Client{Transport: &http.Transport{TLSClientConfig: clientTLS}}
	}
	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	gopts := grpcapi.Options{Logger: log, Auth: a, Admin: adm}
	sopts := grpcapi.ServerOptions(gopts)
	creds := insecure.NewCredentials()
	if serverTLS != nil {
		sopts = append(sopts, grpc.Creds(credentials.NewTLS(serverTLS)))
		creds = credentials.NewTLS(clientTLS)
	}
	gs := grpc.NewServer(sopts...)
	grpcapi.Register(gs, svc, gopts)
	served := make(chan struct{})
	go func() { defer close(served); _ = gs.Serve(lis) }()
	conn, err := grpc.NewClient(lis.Addr().String(), grpc.WithTransportCredentials(creds))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() {
		conn.Close()
		gs.Stop()
		<-served
		client.CloseIdleConnections()
		hs.Close()
		store.Close()
	})
	return &tenantStack{svc: svc, httpURL: hs.URL, client: client, conn: conn, alpha: alpha, beta: beta, admin: admin}
}

// do sends an HTTP request with token (none when "").
func (s *tenantStack) do(t *testing.T, token, method, path, body string) (int, http.Header, string) {
	t.Helper()
	req, err := http.NewRequest(method, s.httpURL+path, strings.NewReader(body))
	if err != nil {
		t.Fatal(err)
	}
	if token != "" {
		req.Header.Set("Authorization", "Bearer "+token)
	}
	resp, err := s.client.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	if err != nil {
		t.Fatal(err)
	}
	return resp.StatusCode, resp.Header, string(b)
}

func (s *tenantStack) mustDo(t *testing.T, token, method, path, body string, want int) string {
	t.Helper()
	code, _, b := s.do(t, token, method, path, body)
	if code != want {
		t.Fatalf("%s %s: %d %s, want %d", method, path, code, b, want)
	}
	return b
}

// as is a gRPC context carrying token.
func as(token string) context.Context {
	ctx := context.Background()
	if token != "" {
		ctx = metadata.AppendToOutgoingContext(ctx, "authorization", "Bearer "+token)
	}
	return ctx
}

func modelMsg(t *testing.T, doc string) *beliefv1.Model {
	t.Helper()
	d, err := model.DecodeBytes([]byte(doc))
	if err != nil {
		t.Fatal(err)
	}
	m, err := convert.ModelToProto(d)
	if err != nil {
		t.Fatal(err)
	}
	return m
}

func jobID(t *testing.T, body string) string {
	t.Helper()
	var v struct {
		ID string `json:"id"`
	}
	if err := json.Unmarshal([]byte(body), &v); err != nil || v.ID == "" {
		t.Fatalf("no job id in %s (%v)", body, err)
	}
	return v.ID
}

const conveyorQuery = `{"model": "dock-conveyor", "evidence": {"slip_klaxon": "blaring"}, "targets": ["quenchwater_valve"],
  "method": "likelihood-weighting", "stop": {"max_samples": 20000}, "seed": 3}`

func TestTenantIsolationHTTP(t *testing.T) {
	s := newTenantStack(t, nil, nil, nil)
	s.mustDo(t, s.alpha, "POST", "/v1/models", conveyorAlpha, 201)
	id := jobID(t, s.mustDo(t, s.alpha, "POST", "/v1/jobs", conveyorQuery, 202))
	s.mustDo(t, s.alpha, "GET", "/v1/jobs/"+id, "", 200)

	// Beta gets for alpha's objects exactly what it gets for objects that
	// do not exist: 404 with the same body, the ID aside.
	const ghost = "j000000000000000000000000"
	for _, c := range []struct{ method, path string }{
		{"GET", "/v1/jobs/%s"}, {"POST", "/v1/jobs/%s/cancel"}, {"GET", "/v1/jobs/%s/events"},
	} {
		code, _, theirs := s.do(t, s.beta, c.method, strings.Replace(c.path, "%s", id, 1), "")
		_, _, none := s.do(t, s.beta, c.method, strings.Replace(c.path, "%s", ghost, 1), "")
		if code != 404 || strings.ReplaceAll(theirs, id, ghost) != none {
			t.Errorf("beta %s %s: %d %s; a job that does not exist: %s", c.method, c.path, code, theirs, none)
		}
	}
	code, _, b := s.do(t, s.beta, "GET", "/v1/models/dock-conveyor", "")
	if code != 404 || !strings.Contains(b, `"code":"NOT_FOUND"`) {
		t.Errorf("beta GET alpha's model: %d %s", code, b)
	}
	if code, _, b := s.do(t, s.beta, "DELETE", "/v1/models/dock-conveyor", ""); code != 404 {
		t.Errorf("beta DELETE alpha's model: %d %s", code, b)
	}
	// A member cannot reach across with a qualified name either.
	if code, _, b := s.do(t, s.beta, "GET", "/v1/models/"+url.PathEscape("alpha/dock-conveyor"), ""); code != 404 {
		t.Errorf("beta GET alpha/dock-conveyor: %d %s", code, b)
	}
	if b := s.mustDo(t, s.beta, "GET", "/v1/models", "", 200); strings.Contains(b, "dock-conveyor") {
		t.Errorf("beta's model list shows alpha's model: %s", b)
	}
	if b := s.mustDo(t, s.beta, "GET", "/v1/jobs", "", 200); strings.Contains(b, id) {
		t.Errorf("beta's job list shows alpha's job: %s", b)
	}
	if code, _, b := s.do(t, s.beta, "POST", "/v1/query", conveyorQuery); code != 404 {
		t.Errorf("beta queries alpha's model: %d %s", code, b)
	}

	// Beta's model of the same name is its own first version; alpha's is untouched.
	b = s.mustDo(t, s.beta, "POST", "/v1/models", conveyorBeta, 201)
	if !strings.Contains(b, `"name":"dock-conveyor","version":1`) {
		t.Errorf("beta's upload: %s", b)
	}
	if b := s.mustDo(t, s.alpha, "GET", "/v1/models/dock-conveyor", "", 200); !strings.Contains(b, "quenchwater_valve") {
		t.Errorf("alpha's model changed: %s", b)
	}
	if b := s.mustDo(t, s.alpha, "GET", "/v1/jobs", "", 200); !strings.Contains(b, id) {
		t.Errorf("alpha's job list lacks its job: %s", b)
	}

	// The admin sees every tenant's objects: alpha's job, and alpha's model
	// as "alpha/NAME".
	s.mustDo(t, s.admin, "GET", "/v1/jobs/"+id, "", 200)
	b = s.mustDo(t, s.admin, "GET", "/v1/models", "", 200)
	if !strings.Contains(b, `"alpha/dock-conveyor"`) || !strings.Contains(b, `"beta/dock-conveyor"`) {
		t.Errorf("admin's model list: %s", b)
	}
	if b := s.mustDo(t, s.admin, "GET", "/v1/models/"+url.PathEscape("alpha/dock-conveyor"), "", 200); !strings.Contains(b, "quenchwater_valve") {
		t.Errorf("admin GET alpha/dock-conveyor: %s", b)
	}

	// Alpha may cancel its own job; then beta still cannot see it.
	s.mustDo(t, s.alpha, "POST", "/v1/jobs/"+id+"/cancel", "", 200)
	if code, _, _ := s.do(t, s.beta, "GET", "/v1/jobs/"+id, ""); code != 404 {
		t.Errorf("beta GET the cancelled job: %d", code)
	}
}

func TestTenantIsolationGRPC(t *testing.T) {
	s := newTenantStack(t, nil, nil, nil)
	models := beliefv1.NewModelServiceClient(s.conn)
	jobsc := beliefv1.NewJobServiceClient(s.conn)
	if _, err := models.CreateModel(as(s.alpha), &beliefv1.CreateModelRequest{Model: modelMsg(t, conveyorAlpha)}); err != nil {
		t.Fatal(err)
	}
	var max int64 = 20000
	q := &beliefv1.Query{Model: "dock-conveyor", Evidence: map[string]string{"slip_klaxon": "blaring"}, Targets: []string{"quenchwater_valve"},
		Method: "likelihood-weighting", Stop: &beliefv1.StopRule{MaxSamples: max}}
	sub, err := jobsc.SubmitJob(as(s.alpha), &beliefv1.SubmitJobRequest{Query: q})
	if err != nil {
		t.Fatal(err)
	}
	id := sub.GetJob().GetId()

	notFound := func(what string, err error) {
		t.Helper()
		if status.Code(err) != codes.NotFound {
			t.Errorf("beta %s: %v, want NOT_FOUND", what, err)
		}
	}
	_, err = jobsc.GetJob(as(s.beta), &beliefv1.GetJobRequest{Id: id})
	notFound("GetJob", err)
	_, ghostErr := jobsc.GetJob(as(s.beta), &beliefv1.GetJobRequest{Id: "j000000000000000000000000"})
	if got, want := strings.ReplaceAll(status.Convert(err).Message(), id, "X"), strings.ReplaceAll(status.Convert(ghostErr).Message(), "j000000000000000000000000", "X"); got != want {
		t.Errorf("beta GetJob of alpha's job says %q, of no job %q", got, want)
	}
	_, err = jobsc.CancelJob(as(s.beta), &beliefv1.CancelJobRequest{Id: id})
	notFound("CancelJob", err)
	stream, err := jobsc.WatchJob(as(s.beta), &beliefv1.WatchJobRequest{Id: id})
	if err == nil {
		_, err = stream.Recv()
	}
	notFound("WatchJob", err)
	_, err = models.GetModel(as(s.beta), &beliefv1.GetModelRequest{Name: "dock-conveyor"})
	notFound("GetModel", err)
	_, err = models.DeleteModel(as(s.beta), &beliefv1.DeleteModelRequest{Name: "dock-conveyor"})
	notFound("DeleteModel", err)
	_, err = beliefv1.NewQueryServiceClient(s.conn).Query(as(s.beta), &beliefv1.QueryRequest{Query: q})
	notFound("Query", err)
	ml, err := models.ListModels(as(s.beta), &beliefv1.ListModelsRequest{})
	if err != nil || len(ml.GetModels()) != 0 {
		t.Errorf("beta ListModels: %v %v", ml.GetModels(), err)
	}
	jl, err := jobsc.ListJobs(as(s.beta), &beliefv1.ListJobsRequest{})
	if err != nil {
		t.Fatal(err)
	}
	for _, j := range jl.GetJobs() {
		if j.GetId() == id {
			t.Errorf("beta ListJobs shows alpha's job %s", id)
		}
	}
	// Alpha sees and watches its job; the admin gets it too.
	if _, err := jobsc.GetJob(as(s.alpha), &beliefv1.GetJobRequest{Id: id}); err != nil {
		t.Errorf("alpha GetJob: %v", err)
	}
	ctx, cancel := context.WithTimeout(as(s.alpha), 10*time.Second)
	defer cancel()
	ws, err := jobsc.WatchJob(ctx, &beliefv1.WatchJobRequest{Id: id})
	if err == nil {
		var m *beliefv1.Job
		if m, err = ws.Recv(); err == nil && m.GetId() != id {
			t.Errorf("alpha's watch sent job %s", m.GetId())
		}
	}
	if err != nil {
		t.Errorf("alpha WatchJob: %v", err)
	}
	if _, err := jobsc.GetJob(as(s.admin), &beliefv1.GetJobRequest{Id: id}); err != nil {
		t.Errorf("admin GetJob: %v", err)
	}
	if _, err := models.GetModel(as(s.admin), &beliefv1.GetModelRequest{Name: "alpha/dock-conveyor"}); err != nil {
		t.Errorf("admin GetModel alpha/dock-conveyor: %v", err)
	}
}

func TestAuthenticationAndRoles(t *testing.T) {
	s := newTenantStack(t, nil, nil, nil)
	// HTTP: 401 with a challenge without a token or with a bad one.
	for _, tok := range []string{"", "bfd1_" + strings.Repeat("A", 43), s.alpha[:len(s.alpha)-1]} {
		code, h, b := s.do(t, tok, "GET", "/v1/jobs", "")
		if code != 401 || !strings.HasPrefix(h.Get("WWW-Authenticate"), "Bearer") || !strings.Contains(b, `"code":"UNAUTHENTICATED"`) {
			t.Errorf("token %q: %d %q %s", tok, code, h.Get("WWW-Authenticate"), b)
		}
	}
	s.mustDo(t, "", "GET", "/healthz", "", 200)
	s.mustDo(t, "", "GET", "/readyz", "", 200)
	// 403 for the admin endpoint as a member; the admin gets the usage.
	if code, _, b := s.do(t, s.alpha, "GET", "/v1/admin/tenants", ""); code != 403 || !strings.Contains(b, `"code":"PERMISSION_DENIED"`) {
		t.Errorf("member GET /v1/admin/tenants: %d %s", code, b)
	}
	s.mustDo(t, s.alpha, "POST", "/v1/models", conveyorAlpha, 201)
	s.mustDo(t, s.alpha, "POST", "/v1/jobs", conveyorQuery, 202)
	s.mustDo(t, s.alpha, "POST", "/v1/jobs", conveyorQuery, 202)
	var usage struct {
		Tenants []jobs.TenantUsage `json:"tenants"`
	}
	if err := json.Unmarshal([]byte(s.mustDo(t, s.admin, "GET", "/v1/admin/tenants", "", 200)), &usage); err != nil {
		t.Fatal(err)
	}
	want := []jobs.TenantUsage{
		{Tenant: "alpha", Queued: 2, Quotas: jobs.TenantPolicy{MaxSamplesPerJob: 50000}},
		{Tenant: "beta", Quotas: jobs.TenantPolicy{MaxModelBytes: 600}},
		{Tenant: "ops"},
	}
	if got, _ := json.Marshal(usage.Tenants); !bytes.Equal(got, mustJSON(t, want)) {
		t.Errorf("usage %s, want %s", got, mustJSON(t, want))
	}

	// gRPC: UNAUTHENTICATED and PERMISSION_DENIED; health stays open.
	jobsc := beliefv1.NewJobServiceClient(s.conn)
	if _, err := jobsc.ListJobs(as(""), &beliefv1.ListJobsRequest{}); status.Code(err) != codes.Unauthenticated {
		t.Errorf("ListJobs without a token: %v", err)
	}
	if _, err := jobsc.ListJobs(as("bfd1_wrong"), &beliefv1.ListJobsRequest{}); status.Code(err) != codes.Unauthenticated {
		t.Errorf("ListJobs with a bad token: %v", err)
	}
	admin := beliefv1.NewAdminServiceClient(s.conn)
	if _, err := admin.ListTenantUsage(as(s.beta), &beliefv1.ListTenantUsageRequest{}); status.Code(err) != codes.PermissionDenied {
		t.Errorf("member ListTenantUsage: %v", err)
	}
	u, err := admin.ListTenantUsage(as(s.admin), &beliefv1.ListTenantUsageRequest{})
	if err != nil {
		t.Fatal(err)
	}
	if ts := u.GetTenants(); len(ts) != 3 || ts[0].GetTenant() != "alpha" || ts[0].GetQueued() != 2 || ts[0].GetMaxSamplesPerJob() != 50000 ||
		ts[1].GetMaxModelBytes() != 600 || ts[2].GetShare() != 1 {
		t.Errorf("ListTenantUsage: %v", ts)
	}
}

func mustJSON(t *testing.T, v any) []byte {
	t.Helper()
	b, err := json.Marshal(v)
	if err != nil {
		t.Fatal(err)
	}
	return b
}

func TestQuotasNameTheQuota(t *testing.T) {
	s := newTenantStack(t, nil, nil, nil)
	s.mustDo(t, s.alpha, "POST", "/v1/models", conveyorAlpha, 201)
	over := strings.Replace(conveyorQuery, `"max_samples": 20000`, `"max_samples": 50001`, 1)
	for _, path := range []string{"/v1/jobs", "/v1/query"} {
		code, _, b := s.do(t, s.alpha, "POST", path, over)
		if code != 429 || !strings.Contains(b, `"reason":"QUOTA_EXCEEDED"`) || !strings.Contains(b, "max_samples_per_job") ||
			!strings.Contains(b, "50000") || !strings.Contains(b, "50001") {
			t.Errorf("POST %s over the samples quota: %d %s", path, code, b)
		}
	}
	// A query with no sample bound gets the quota as its bound.
	unbounded := strings.Replace(conveyorQuery, `"stop": {"max_samples": 20000}`, `"stop": {"abs_err": 0.0001}`, 1)
	b := s.mustDo(t, s.alpha, "POST", "/v1/jobs", unbounded, 202)
	if !strings.Contains(b, `"max_samples":50000`) {
		t.Errorf("a job with no sample bound: %s", b)
	}
	// Beta's models may have 600 bytes.
	big := strings.Replace(conveyorBeta, `"table"`, strings.Repeat(" ", 600)+`"table"`, 1)
	code, _, b := s.do(t, s.beta, "POST", "/v1/models", big)
	if code != 429 || !strings.Contains(b, "max_model_bytes") || !strings.Contains(b, "600") {
		t.Errorf("beta's large model: %d %s", code, b)
	}
	s.mustDo(t, s.beta, "POST", "/v1/models", conveyorBeta, 201)

	// The same over gRPC: RESOURCE_EXHAUSTED naming the quota.
	q := &beliefv1.Query{Model: "dock-conveyor", Method: "likelihood-weighting", Stop: &beliefv1.StopRule{MaxSamples: 1 << 20}}
	_, err := beliefv1.NewJobServiceClient(s.conn).SubmitJob(as(s.alpha), &beliefv1.SubmitJobRequest{Query: q})
	if st := status.Convert(err); st.Code() != codes.ResourceExhausted || !strings.Contains(st.Message(), "max_samples_per_job of tenant \"alpha\" is 50000") {
		t.Errorf("gRPC submit over the samples quota: %v", err)
	}
	doc, _ := model.DecodeBytes([]byte(conveyorBeta))
	doc.Variables[0].States = []string{"ok", "seized", strings.Repeat("s", 700)}
	doc.Variables[0].Table = [][]float64{{0.8, 0.1, 0.1}}
	m, err := convert.ModelToProto(doc)
	if err != nil {
		t.Fatal(err)
	}
	_, err = beliefv1.NewModelServiceClient(s.conn).CreateModel(as(s.beta), &beliefv1.CreateModelRequest{Model: m})
	if st := status.Convert(err); st.Code() != codes.ResourceExhausted || !strings.Contains(st.Message(), "max_model_bytes of tenant \"beta\" is 600") {
		t.Errorf("gRPC model over the size quota: %v", err)
	}
}

// testTLS makes a CA and a server certificate for 127.0.0.1 and localhost.
func testTLS(t *testing.T) (server, client *tls.Config) {
	t.Helper()
	caKey, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	now := time.Now()
	caTmpl := &x509.Certificate{SerialNumber: big.NewInt(1), Subject: pkix.Name{CommonName: "beliefd test CA"},
		NotBefore: now.Add(-time.Hour), NotAfter: now.Add(time.Hour), IsCA: true, BasicConstraintsValid: true,
		KeyUsage: x509.KeyUsageCertSign}
	caDER, err := x509.CreateCertificate(rand.Reader, caTmpl, caTmpl, &caKey.PublicKey, caKey)
	if err != nil {
		t.Fatal(err)
	}
	ca, err := x509.ParseCertificate(caDER)
	if err != nil {
		t.Fatal(err)
	}
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	leaf := &x509.Certificate{SerialNumber: big.NewInt(2), Subject: pkix.Name{CommonName: "beliefd"},
		NotBefore: now.Add(-time.Hour), NotAfter: now.Add(time.Hour), DNSNames: []string{"localhost"},
		IPAddresses: []net.IP{net.IPv4(127, 0, 0, 1)}, KeyUsage: x509.KeyUsageDigitalSignature,
		ExtKeyUsage: []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth}}
	der, err := x509.CreateCertificate(rand.Reader, leaf, ca, &key.PublicKey, caKey)
	if err != nil {
		t.Fatal(err)
	}
	pool := x509.NewCertPool()
	pool.AddCert(ca)
	return &tls.Config{Certificates: []tls.Certificate{{Certificate: [][]byte{der}, PrivateKey: key}}, MinVersion: tls.VersionTLS12},
		&tls.Config{RootCAs: pool, MinVersion: tls.VersionTLS12}
}

func TestTLSRoundTrip(t *testing.T) {
	server, client := testTLS(t)
	s := newTenantStack(t, nil, server, client)
	if !strings.HasPrefix(s.httpURL, "https://") {
		t.Fatalf("server at %s", s.httpURL)
	}
	// Store over HTTPS, read back over gRPC with TLS, both authenticated.
	s.mustDo(t, s.alpha, "POST", "/v1/models", conveyorAlpha, 201)
	resp, err := beliefv1.NewModelServiceClient(s.conn).GetModel(as(s.alpha), &beliefv1.GetModelRequest{Name: "dock-conveyor"})
	if err != nil {
		t.Fatal(err)
	}
	if got := resp.GetInfo().GetName(); got != "dock-conveyor" || len(resp.GetModel().GetVariables()) != 3 {
		t.Errorf("GetModel over TLS: %s with %d variables", got, len(resp.GetModel().GetVariables()))
	}
	res, err := beliefv1.NewQueryServiceClient(s.conn).Query(as(s.alpha), &beliefv1.QueryRequest{Query: &beliefv1.Query{
		Model: "dock-conveyor", Method: "exact", Evidence: map[string]string{"slip_klaxon": "blaring"}, Targets: []string{"quenchwater_valve"}}})
	if err != nil {
		t.Fatal(err)
	}
	if res.GetMethod() != "exact" {
		t.Errorf("query over TLS: method %s", res.GetMethod())
	}
	// A client that does not trust the CA is refused by both servers.
	if _, err := http.Get(s.httpURL + "/healthz"); err == nil {
		t.Error("HTTPS without the CA succeeded")
	}
	addr := s.conn.Target()
	bad, err := grpc.NewClient(addr, grpc.WithTransportCredentials(credentials.NewTLS(&tls.Config{MinVersion: tls.VersionTLS12})))
	if err != nil {
		t.Fatal(err)
	}
	defer bad.Close()
	ctx, cancel := context.WithTimeout(as(s.alpha), 5*time.Second)
	defer cancel()
	if _, err := beliefv1.NewModelServiceClient(bad).ListModels(ctx, &beliefv1.ListModelsRequest{}); status.Code(err) != codes.Unavailable {
		t.Errorf("gRPC without the CA: %v, want UNAVAILABLE", err)
	}
}

// TestLogsHoldNoTokensOrModelContent captures every log line, at debug
// level, of authentication failures and successes and model uploads over
// both transports, and looks for the tokens, their hashes and the text of
// the model documents.
func TestLogsHoldNoTokensOrModelContent(t *testing.T) {
	var buf bytes.Buffer
	w := &lockedWriter{w: &buf}
	log := slog.New(slog.NewTextHandler(w, &slog.HandlerOptions{Level: slog.LevelDebug}))
	s := newTenantStack(t, log, nil, nil)
	wrong := "bfd1_" + strings.Repeat("Zq", 21) + "Z"

	s.do(t, "", "GET", "/v1/models", "")
	s.do(t, wrong, "GET", "/v1/models", "")
	s.do(t, s.alpha, "GET", "/v1/admin/tenants", "")
	s.mustDo(t, s.alpha, "POST", "/v1/models", conveyorAlpha, 201)
	s.mustDo(t, s.admin, "GET", "/v1/admin/tenants", "", 200)
	s.do(t, s.beta, "POST", "/v1/models", strings.Replace(conveyorBeta, `"table"`, strings.Repeat(" ", 600)+`"table"`, 1))
	s.do(t, s.beta, "POST", "/v1/models", strings.Replace(conveyorBeta, "0.9, 0.1", "0.9, 0.2", 1)) // invalid
	models := beliefv1.NewModelServiceClient(s.conn)
	if _, err := models.CreateModel(as(s.beta), &beliefv1.CreateModelRequest{Model: modelMsg(t, conveyorBeta)}); err != nil {
		t.Fatal(err)
	}
	_, _ = models.ListModels(as(wrong), &beliefv1.ListModelsRequest{})
	_, _ = models.ListModels(as(""), &beliefv1.ListModelsRequest{})
	s.mustDo(t, s.alpha, "POST", "/v1/jobs", conveyorQuery, 202)

	logs := w.String()
	// The capture works: these lines are there.
	for _, want := range []string{"auth: refused", "reason=\"unknown token\"", "auth: accepted", "token_label=alpha-ci", "model stored", "job submitted"} {
		if !strings.Contains(logs, want) {
			t.Errorf("the logs lack %q", want)
		}
	}
	secrets := []string{s.alpha, s.beta, s.admin, wrong, auth.HashToken(s.alpha), auth.HashToken(s.beta), auth.HashToken(s.admin),
		// the tokens without their prefix, in case one is cut
		strings.TrimPrefix(s.alpha, auth.TokenPrefix)[:20], strings.TrimPrefix(s.beta, auth.TokenPrefix)[:20], strings.TrimPrefix(wrong, auth.TokenPrefix)[:20],
		// model content: variable and state names, numbers, the documents
		"quenchwater_valve", "weeping", "belt_slurry", "slip_klaxon", "blaring", "roller_bearing", "seized", "0.97", conveyorAlpha[:40]}
	for _, sec := range secrets {
		if strings.Contains(logs, sec) {
			t.Errorf("the logs hold %q:\n%s", sec, logs)
		}
	}
}

type lockedWriter struct {
	mu sync.Mutex
	w  *bytes.Buffer
}

func (l *lockedWriter) Write(b []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.w.Write(b)
}

func (l *lockedWriter) String() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.w.String()
}
