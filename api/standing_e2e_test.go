package api_test

import (
	"bufio"
	"context"
	"encoding/json"
	"log/slog"
	"math"
	"net"
	"net/http"
	"net/http/httptest"
	"regexp"
	"strconv"
	"strings"
	"testing"

	"github.com/beliefd/beliefd/api/grpcapi"
	"github.com/beliefd/beliefd/api/httpapi"
	"github.com/beliefd/beliefd/api/internal/leakcheck"
	"github.com/beliefd/beliefd/api/metrics"
	beliefv1 "github.com/beliefd/beliefd/proto/belief/v1"
	"github.com/beliefd/beliefd/service/examples"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/jobs/memstore"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/standing"
	"github.com/beliefd/beliefd/service/standing/standingtest"
	"github.com/prometheus/client_golang/prometheus"
	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/metadata"
	"google.golang.org/grpc/status"
)

// tenantHeader lets the tests of this file act as a tenant: their Auth
// middleware and interceptor attach the principal it names (the real ones
// come from api/auth and read tokens).
const tenantHeader = "X-Test-Tenant"

// example is the embedded example model the standing-query tests use.
const example = "tarnwick-platform"

func testAuth(next http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if t := r.Header.Get(tenantHeader); t != "" {
			r = r.WithContext(jobs.WithPrincipal(r.Context(), jobs.Principal{Tenant: t}))
		}
		next.ServeHTTP(w, r)
	})
}

type testAuthn struct{}

func (testAuthn) UnaryInterceptor() grpc.UnaryServerInterceptor {
	return func(ctx context.Context, req any, _ *grpc.UnaryServerInfo, h grpc.UnaryHandler) (any, error) {
		if md, ok := metadata.FromIncomingContext(ctx); ok && len(md.Get(tenantHeader)) > 0 {
			ctx = jobs.WithPrincipal(ctx, jobs.Principal{Tenant: md.Get(tenantHeader)[0]})
		}
		return h(ctx, req)
	}
}

func (testAuthn) StreamInterceptor() grpc.StreamServerInterceptor {
	return func(srv any, ss grpc.ServerStream, _ *grpc.StreamServerInfo, h grpc.StreamHandler) error {
		return h(srv, ss)
	}
}

type standingStack struct {
	*stack
	net      *model.Network
	standing beliefv1.StandingQueryServiceClient
}

// newStandingStack wires the job service, the standing service with its
// loop, the metrics and both transports over loopback, as `beliefd serve`
// does (cmd/beliefd/cmd_standing.go), with the example model stored for
// the open tenant and tenant "teal".
func newStandingStack(t *testing.T, maxQueries int) *standingStack {
	t.Helper()
	log := slog.New(slog.DiscardHandler)
	s := &stack{store: memstore.New(memstore.Options{}), reg: prometheus.NewRegistry()}
	m, err := metrics.New(s.reg, metrics.Options{Unfinished: s.store.Unfinished, NoRuntime: true, Logger: log})
	if err != nil {
		t.Fatal(err)
	}
	if s.svc, err = jobs.NewService(s.store, jobs.Config{Logger: log}, m); err != nil {
		t.Fatal(err)
	}
	raw, _ := examples.Raw(example)
	for _, tenant := range []string{"", "teal"} {
		if _, _, err := s.svc.PutModel(jobs.WithPrincipal(context.Background(), jobs.Principal{Tenant: tenant}), raw); err != nil {
			t.Fatal(err)
		}
	}
	sm, err := metrics.NewStanding(s.reg, metrics.StandingOptions{})
	if err != nil {
		t.Fatal(err)
	}
	ssvc, err := standing.New(standing.NewMemoryStore(), s.svc, standing.Config{MaxQueries: maxQueries, Logger: log, Observer: sm})
	if err != nil {
		t.Fatal(err)
	}
	sm.Export(ssvc.Snapshot)
	runCtx, stopRun := context.WithCancel(context.Background())
	ran := make(chan struct{})
	go func() { defer close(ran); _ = ssvc.Run(runCtx) }()

	s.http = httptest.NewServer(httpapi.New(s.svc, httpapi.Options{Logger: log, Metrics: m, MetricsHandler: metrics.Handler(s.reg),
		Auth: testAuth, Standing: ssvc}))
	s.client = s.http.Client()
	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	opts := grpcapi.Options{Logger: log, Metrics: m, Auth: testAuthn{}}
	gs := grpc.NewServer(grpcapi.ServerOptions(opts)...)
	grpcapi.Register(gs, s.svc, opts)
	grpcapi.RegisterStanding(gs, ssvc, opts)
	served := make(chan struct{})
	go func() { defer close(served); _ = gs.Serve(lis) }()
	if s.conn, err = grpc.NewClient(lis.Addr().String(), grpc.WithTransportCredentials(insecure.NewCredentials())); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() {
		s.conn.Close()
		gs.Stop()
		<-served
		s.client.CloseIdleConnections()
		s.http.Close()
		stopRun()
		<-ran
		s.store.Close()
	})
	_, net, err := examples.Load(example)
	if err != nil {
		t.Fatal(err)
	}
	return &standingStack{stack: s, net: net, standing: beliefv1.NewStandingQueryServiceClient(s.conn)}
}

// sample is one line of the Prometheus text format.
type sample struct {
	labels map[string]string
	value  float64
}

var sampleLine = regexp.MustCompile(`^([a-zA-Z_:][a-zA-Z0-9_:]*)(\{(.*)\})? (\S+)$`)
var labelPair = regexp.MustCompile(`([a-zA-Z_][a-zA-Z0-9_]*)="((?:[^"\\]|\\.)*)"`)

// scrape reads GET /metrics and returns the samples of the metrics named
// beliefd_standing_*, by metric name.
func (s *standingStack) scrape(t *testing.T) map[string][]sample {
	t.Helper()
	resp, err := s.client.Get(s.http.URL + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	if resp.StatusCode != http.StatusOK {
		t.Fatalf("GET /metrics: %d", resp.StatusCode)
	}
	out := map[string][]sample{}
	sc := bufio.NewScanner(resp.Body)
	for sc.Scan() {
		line := sc.Text()
		if !strings.HasPrefix(line, "beliefd_standing_") {
			continue
		}
		m := sampleLine.FindStringSubmatch(line)
		if m == nil {
			t.Fatalf("cannot read the metrics line %q", line)
		}
		v, err := strconv.ParseFloat(m[4], 64)
		if err != nil {
			t.Fatalf("metrics line %q: %v", line, err)
		}
		labels := map[string]string{}
		for _, p := range labelPair.FindAllStringSubmatch(m[3], -1) {
			labels[p[1]] = p[2]
		}
		out[m[1]] = append(out[m[1]], sample{labels: labels, value: v})
	}
	return out
}

// gauge finds one sample by its labels; ok is false when there is none.
func gauge(samples map[string][]sample, name string, labels ...string) (float64, bool) {
	for _, s := range samples[name] {
		match := true
		for i := 0; i+1 < len(labels); i += 2 {
			match = match && s.labels[labels[i]] == labels[i+1]
		}
		if match {
			return s.value, true
		}
	}
	return 0, false
}

// checkGauges compares the posterior gauges of one standing query with
// brute-force enumeration of the example model's joint on the evidence
// (standingtest.Enumerate): exact inference, so lower == estimate == upper.
func (s *standingStack) checkGauges(t *testing.T, id string, evidence map[string]string, targets []string) {
	t.Helper()
	got := s.scrape(t)
	for _, target := range targets {
		want, err := standingtest.Enumerate(s.net, evidence, target)
		if err != nil {
			t.Fatal(err)
		}
		for state, p := range want {
			est, ok := gauge(got, "beliefd_standing_posterior", "standing_query", id, "variable", target, "state", state)
			lo, _ := gauge(got, "beliefd_standing_posterior_lower", "standing_query", id, "variable", target, "state", state)
			hi, _ := gauge(got, "beliefd_standing_posterior_upper", "standing_query", id, "variable", target, "state", state)
			// The junction tree and the enumeration add the same products
			// in another order: they agree to rounding.
			if !ok || math.Abs(est-p) > 1e-12 || lo != est || hi != est {
				t.Errorf("gauge P(%s=%s | %v) = %v [%v, %v] (present %v), brute force %v", target, state, evidence, est, lo, hi, ok, p)
			}
		}
	}
}

// errorBody is the API's error shape.
type errorBody struct {
	Error struct {
		Status  int    `json:"status"`
		Code    string `json:"code"`
		Reason  string `json:"reason"`
		Message string `json:"message"`
	} `json:"error"`
}

func (s *standingStack) expectError(t *testing.T, method, path, body string, status int, reason, says string) {
	t.Helper()
	code, b := s.do(t, method, path, body)
	var e errorBody
	_ = json.Unmarshal(b, &e)
	if code != status || e.Error.Reason != reason || !strings.Contains(e.Error.Message, says) {
		t.Errorf("%s %s %s: %d %s, want %d %s naming %q", method, path, body, code, b, status, reason, says)
	}
}

func TestStandingQueryEndToEnd(t *testing.T) {
	leakcheck.Check(t)
	s := newStandingStack(t, 3)
	targets := []string{"site_power", "utility_feed", "core_network", "switch_a"}
	const id = "power-root-cause"

	code, b := s.do(t, "POST", "/v1/standing-queries?wait=10s", `{"id": "power-root-cause", "model": "tarnwick-platform",
		"targets": ["site_power", "utility_feed", "core_network", "switch_a"], "evidence": {"alarm_power_bus": "firing"}, "interval": "1m"}`)
	if code != http.StatusCreated {
		t.Fatalf("create: %d %s", code, b)
	}
	var v standing.View
	if err := json.Unmarshal(b, &v); err != nil {
		t.Fatal(err)
	}
	if v.ID != id || v.Revision != 1 || v.Status != standing.StatusCurrent || v.Result == nil {
		t.Fatalf("created: %s", b)
	}
	s.checkGauges(t, id, map[string]string{"alarm_power_bus": "firing"}, targets)

	// Alarms fire: two items set in one update.
	ev := map[string]string{"alarm_power_bus": "firing", "alarm_switch_ping": "firing", "alarm_ups_on_battery": "firing"}
	code, b = s.do(t, "PATCH", "/v1/standing-queries/"+id+"/evidence?wait=10s", `{"set": {"alarm_switch_ping": "firing", "alarm_ups_on_battery": "firing"}}`)
	if code != http.StatusOK {
		t.Fatalf("update: %d %s", code, b)
	}
	if err := json.Unmarshal(b, &v); err != nil || v.Revision != 2 || v.ResultRevision != 2 {
		t.Fatalf("after the update: %s", b)
	}
	s.checkGauges(t, id, ev, targets)
	before, _ := gauge(s.scrape(t), "beliefd_standing_posterior", "standing_query", id, "variable", "utility_feed", "state", "lost")
	got := s.scrape(t)
	if r, _ := gauge(got, "beliefd_standing_evidence_revision", "standing_query", id); r != 2 {
		t.Errorf("evidence revision gauge %v, want 2", r)
	}
	if r, _ := gauge(got, "beliefd_standing_result_revision", "standing_query", id); r != 2 {
		t.Errorf("result revision gauge %v, want 2", r)
	}
	if age, ok := gauge(got, "beliefd_standing_result_age_seconds", "standing_query", id); !ok || age < 0 || age > 60 {
		t.Errorf("result age gauge %v (present %v)", age, ok)
	}

	// Alarms clear (POST works as PATCH does): the posterior moves back.
	code, b = s.do(t, "POST", "/v1/standing-queries/"+id+"/evidence?wait=10s", `{"clear": ["alarm_power_bus", "alarm_ups_on_battery"]}`)
	if code != http.StatusOK {
		t.Fatalf("clear: %d %s", code, b)
	}
	ev = map[string]string{"alarm_switch_ping": "firing"}
	s.checkGauges(t, id, ev, targets)
	after, _ := gauge(s.scrape(t), "beliefd_standing_posterior", "standing_query", id, "variable", "utility_feed", "state", "lost")
	if !(after < before) {
		t.Errorf("P(utility_feed=lost) did not fall when its alarms cleared: %v then %v", before, after)
	}

	// The list the web page reads.
	code, b = s.do(t, "GET", "/v1/standing-queries", "")
	if code != http.StatusOK {
		t.Fatalf("list: %d %s", code, b)
	}
	var list struct {
		StandingQueries []map[string]json.RawMessage `json:"standing_queries"`
	}
	if err := json.Unmarshal(b, &list); err != nil || len(list.StandingQueries) != 1 {
		t.Fatalf("list: %s", b)
	}
	for _, field := range []string{"id", "model", "targets", "evidence", "revision", "result", "status", "updated_at"} {
		if _, ok := list.StandingQueries[0][field]; !ok {
			t.Errorf("list item has no %q: %s", field, b)
		}
	}
	var res struct {
		Method    string                                            `json:"method"`
		Marginals map[string]map[string]struct{ P, Lo, Hi float64 } `json:"marginals"`
		Samples   *int64                                            `json:"samples"`
		Caution   string                                            `json:"caution"`
	}
	if err := json.Unmarshal(list.StandingQueries[0]["result"], &res); err != nil || res.Method != "exact" || len(res.Marginals) != 4 ||
		res.Samples == nil || res.Caution == "" {
		t.Fatalf("the list's result is not a result document: %s", list.StandingQueries[0]["result"])
	}

	// Bad input, each named.
	s.expectError(t, "PATCH", "/v1/standing-queries/"+id+"/evidence", `{"set": {"alarm_nope": "firing"}}`, 400, "BAD_EVIDENCE", `"alarm_nope"`)
	s.expectError(t, "PATCH", "/v1/standing-queries/"+id+"/evidence", `{"set": {"alarm_canary": "loud"}}`, 400, "BAD_EVIDENCE", `"loud"`)
	s.expectError(t, "PATCH", "/v1/standing-queries/"+id+"/evidence", `{"set": {"site_power": "lost", "utility_feed": "ok"}}`, 400, "ZERO_PROBABILITY_EVIDENCE", "site_power=lost")
	s.expectError(t, "PATCH", "/v1/standing-queries/"+id+"/evidence", `{"set": {}, "expect_revision": 1}`, 409, "REVISION_MISMATCH", "revision 3, not 1")
	s.expectError(t, "PATCH", "/v1/standing-queries/"+id+"/evidence", `{"sett": {}}`, 400, "BAD_QUERY", `"sett"`)
	s.expectError(t, "PATCH", "/v1/standing-queries/nope/evidence", `{}`, 404, "NOT_FOUND", `"nope"`)
	s.expectError(t, "POST", "/v1/standing-queries", `{"id": "x", "model": "tarnwick-platform", "targets": ["bad_deploi"]}`, 400, "BAD_EVIDENCE", `"bad_deploi"`)
	s.expectError(t, "POST", "/v1/standing-queries", `{"id": "power-root-cause", "model": "tarnwick-platform", "targets": ["bad_deploy"]}`, 409, "ALREADY_EXISTS", "power-root-cause")
	s.expectError(t, "POST", "/v1/standing-queries?wait=2h", `{}`, 400, "INVALID_ARGUMENT", "wait")
	s.expectError(t, "PUT", "/v1/standing-queries/"+id, ``, 405, "METHOD_NOT_ALLOWED", "DELETE")
	for _, extra := range []string{"two", "three"} {
		if code, b := s.do(t, "POST", "/v1/standing-queries", `{"id": "`+extra+`", "model": "tarnwick-platform", "targets": ["bad_deploy"]}`); code != http.StatusCreated {
			t.Fatalf("create %s: %d %s", extra, code, b)
		}
	}
	s.expectError(t, "POST", "/v1/standing-queries", `{"id": "four", "model": "tarnwick-platform", "targets": ["bad_deploy"]}`, 429, "STANDING_QUERY_LIMIT", "3 of 3")

	// Another tenant sees none of them.
	code, b = s.do(t, "GET", "/v1/standing-queries", "", tenantHeader, "teal")
	if code != http.StatusOK || !strings.Contains(string(b), `"standing_queries":[]`) {
		t.Errorf("teal's list: %d %s", code, b)
	}
	code, _ = s.do(t, "GET", "/v1/standing-queries/"+id, "", tenantHeader, "teal")
	if code != http.StatusNotFound {
		t.Errorf("teal reads the open tenant's standing query: %d", code)
	}

	// Delete: the standing query and its series go.
	if code, b := s.do(t, "DELETE", "/v1/standing-queries/"+id, ""); code != http.StatusNoContent {
		t.Fatalf("delete: %d %s", code, b)
	}
	got = s.scrape(t)
	for name, samples := range got {
		for _, smp := range samples {
			if smp.labels["standing_query"] == id {
				t.Errorf("%s still has a series of the deleted standing query: %v", name, smp.labels)
			}
		}
	}
	if n, _ := gauge(got, "beliefd_standing_queries"); n != 2 {
		t.Errorf("beliefd_standing_queries = %v after the delete, want 2", n)
	}
}

// The same over gRPC, as tenant teal, with a sampled method: the gauges
// carry the interval, samples and effective samples of the result.
func TestStandingQueryGRPC(t *testing.T) {
	leakcheck.Check(t)
	s := newStandingStack(t, 10)
	ctx := metadata.AppendToOutgoingContext(context.Background(), tenantHeader, "teal")
	seed := uint64(11)
	m, err := s.standing.CreateStandingQuery(ctx, &beliefv1.CreateStandingQueryRequest{Wait: "10s", Spec: &beliefv1.StandingQuerySpec{
		Id: "checkout-root-cause", Model: "tarnwick-platform", Targets: []string{"bad_deploy", "orders_db"},
		Method: "likelihood-weighting", Stop: &beliefv1.StopRule{MaxSamples: 40_000}, Seed: &seed,
		Evidence: map[string]string{"alarm_checkout_5xx": "firing"},
	}})
	if err != nil {
		t.Fatal(err)
	}
	if m.GetTenant() != "teal" || m.GetStatus() != standing.StatusCurrent || m.GetResult().GetSamples() != 40_000 {
		t.Fatalf("created: %v", m)
	}
	m, err = s.standing.UpdateStandingEvidence(ctx, &beliefv1.UpdateStandingEvidenceRequest{Id: "checkout-root-cause",
		Set: map[string]string{"alarm_canary": "firing"}, Wait: "10s"})
	if err != nil {
		t.Fatal(err)
	}
	if m.GetRevision() != 2 || m.GetResultRevision() != 2 || m.GetResultEvidence()["alarm_canary"] != "firing" {
		t.Fatalf("after the update: %v", m)
	}
	got := s.scrape(t)
	est, _ := gauge(got, "beliefd_standing_posterior", "tenant", "teal", "standing_query", "checkout-root-cause", "variable", "bad_deploy", "state", "yes")
	lo, _ := gauge(got, "beliefd_standing_posterior_lower", "tenant", "teal", "standing_query", "checkout-root-cause", "variable", "bad_deploy", "state", "yes")
	hi, _ := gauge(got, "beliefd_standing_posterior_upper", "tenant", "teal", "standing_query", "checkout-root-cause", "variable", "bad_deploy", "state", "yes")
	iv := m.GetResult().GetMarginals()["bad_deploy"].GetStates()["yes"]
	if est != iv.GetP() || lo != iv.GetLo() || hi != iv.GetHi() || !(lo < est && est < hi) {
		t.Errorf("gauges %v [%v, %v], result %v", est, lo, hi, iv)
	}
	if n, _ := gauge(got, "beliefd_standing_result_samples", "standing_query", "checkout-root-cause"); n != 40_000 {
		t.Errorf("samples gauge %v", n)
	}
	if ess, _ := gauge(got, "beliefd_standing_result_effective_samples", "standing_query", "checkout-root-cause"); ess <= 0 || ess > 40_000 {
		t.Errorf("effective samples gauge %v", ess)
	}
	// The open tenant does not see teal's.
	if _, err := s.standing.GetStandingQuery(context.Background(), &beliefv1.GetStandingQueryRequest{Id: "checkout-root-cause"}); status.Code(err) != codes.NotFound {
		t.Errorf("the open tenant reads teal's: %v", err)
	}
	_, err = s.standing.UpdateStandingEvidence(ctx, &beliefv1.UpdateStandingEvidenceRequest{Id: "checkout-root-cause", Set: map[string]string{"alarm_nope": "firing"}})
	if status.Code(err) != codes.InvalidArgument || !strings.Contains(status.Convert(err).Message(), `"alarm_nope"`) {
		t.Errorf("unknown variable over gRPC: %v", err)
	}
	list, err := s.standing.ListStandingQueries(ctx, &beliefv1.ListStandingQueriesRequest{})
	if err != nil || len(list.GetStandingQueries()) != 1 {
		t.Fatalf("list: %v, %v", list, err)
	}
	if _, err := s.standing.DeleteStandingQuery(ctx, &beliefv1.DeleteStandingQueryRequest{Id: "checkout-root-cause"}); err != nil {
		t.Fatal(err)
	}
	if _, ok := gauge(s.scrape(t), "beliefd_standing_posterior", "standing_query", "checkout-root-cause"); ok {
		t.Error("series of a deleted standing query are still exported")
	}
}
