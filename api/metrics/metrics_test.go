package metrics

import (
	"context"
	"errors"
	"log/slog"
	"math"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/beliefd/beliefd/service/jobs"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/testutil"
	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
)

// fakeClock is a settable clock.
type fakeClock struct {
	mu sync.Mutex
	t  time.Time
}

func (c *fakeClock) now() time.Time      { c.mu.Lock(); defer c.mu.Unlock(); return c.t }
func (c *fakeClock) set(t time.Time)     { c.mu.Lock(); c.t = t; c.mu.Unlock() }
func (c *fakeClock) add(d time.Duration) { c.mu.Lock(); c.t = c.t.Add(d); c.mu.Unlock() }
func unfinished(q, r int) func(context.Context) (int, int, error) {
	return func(context.Context) (int, int, error) { return q, r, nil }
}

func newTest(t *testing.T, opts Options) (*Metrics, *prometheus.Registry) {
	t.Helper()
	reg := prometheus.NewRegistry()
	m, err := New(reg, opts)
	if err != nil {
		t.Fatal(err)
	}
	return m, reg
}

// exercise touches every metric with every label dimension in use.
func exercise(m *Metrics) {
	m.SamplesDrawn("likelihood-weighting", 1000)
	m.BlockDone("forward", "committed", 20*time.Millisecond)
	m.JobSubmitted("gibbs")
	m.JobFinished("gibbs", jobs.StateSucceeded, 3*time.Second, 0.02, 0.4)
	m.HTTP("GET /v1/jobs/{id}", http.NotFoundHandler()).ServeHTTP(httptest.NewRecorder(), httptest.NewRequest("GET", "/v1/jobs/x", nil))
	_, _ = m.UnaryServerInterceptor()(context.Background(), nil, &grpc.UnaryServerInfo{FullMethod: "/belief.v1.JobService/GetJob"},
		func(context.Context, any) (any, error) { return nil, nil })
}

// TestLint runs the Prometheus linter (naming, units, help texts) on every
// collector, and on the whole registry with the runtime collectors.
func TestLint(t *testing.T) {
	m, reg := newTest(t, Options{Unfinished: unfinished(2, 1)})
	exercise(m)
	cs := map[string]prometheus.Collector{
		"samples": m.samples, "submitted": m.submitted, "finished": m.finished, "jobDuration": m.jobDuration,
		"block": m.block, "relHalfWidth": m.relHalfWidth, "essRatio": m.essRatio,
		"httpRequests": m.httpRequests, "httpDuration": m.httpDuration,
		"grpcRequests": m.grpcRequests, "grpcDuration": m.grpcDuration,
		"state": &stateCollector{m: m, unfinished: unfinished(2, 1), timeout: time.Second},
	}
	for name, c := range cs {
		problems, err := testutil.CollectAndLint(c)
		if err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		for _, p := range problems {
			t.Errorf("%s: %s: %s", name, p.Metric, p.Text)
		}
	}
	problems, err := testutil.GatherAndLint(reg)
	if err != nil {
		t.Fatal(err)
	}
	for _, p := range problems {
		t.Errorf("registry: %s: %s", p.Metric, p.Text)
	}
	// Every metric carries the product prefix, apart from the runtime ones.
	mfs, err := reg.Gather()
	if err != nil {
		t.Fatal(err)
	}
	var n int
	for _, mf := range mfs {
		name := mf.GetName()
		if strings.HasPrefix(name, "beliefd_") {
			n++
		} else if !strings.HasPrefix(name, "go_") && !strings.HasPrefix(name, "process_") {
			t.Errorf("metric %s has neither the beliefd_ prefix nor a runtime one", name)
		}
	}
	if n != 14 {
		t.Errorf("%d beliefd metrics gathered, want 14", n)
	}
}

func TestObserver(t *testing.T) {
	m, reg := newTest(t, Options{NoRuntime: true})
	m.SamplesDrawn("forward", 100)
	m.SamplesDrawn("forward", 23)
	m.SamplesDrawn("job-42", 5) // not a method: must not become a label value
	m.JobSubmitted("exact")
	m.JobFinished("exact", jobs.StateSucceeded, 1500*time.Millisecond, math.NaN(), math.NaN())
	m.JobFinished("rejection", jobs.StateCancelled, 2*time.Second, 0.05, 0.9)
	m.BlockDone("rejection", "lost_lease", 300*time.Millisecond)
	m.BlockDone("rejection", "exploded", time.Millisecond)

	if got := testutil.ToFloat64(m.samples.WithLabelValues("forward")); got != 123 {
		t.Errorf("samples{forward} = %v, want 123", got)
	}
	if got := testutil.ToFloat64(m.samples.WithLabelValues(Other)); got != 5 {
		t.Errorf("samples{other} = %v, want 5", got)
	}
	if got := testutil.ToFloat64(m.finished.WithLabelValues("rejection", "cancelled")); got != 1 {
		t.Errorf("finished{rejection,cancelled} = %v, want 1", got)
	}
	// NaN accuracy figures are not observed: exact has no histogram samples.
	if n := testutil.CollectAndCount(m.relHalfWidth); n != 1 {
		t.Errorf("relative half-width series = %d, want 1 (rejection only)", n)
	}
	if n := testutil.CollectAndCount(m.block); n != 2 {
		t.Errorf("block series = %d, want 2 (lost_lease and other)", n)
	}
	err := testutil.GatherAndCompare(reg, strings.NewReader(`
# HELP beliefd_job_duration_seconds Time from job creation to its terminal state.
# TYPE beliefd_job_duration_seconds histogram
beliefd_job_duration_seconds_bucket{method="exact",le="0.01"} 0
beliefd_job_duration_seconds_bucket{method="exact",le="0.04"} 0
beliefd_job_duration_seconds_bucket{method="exact",le="0.16"} 0
beliefd_job_duration_seconds_bucket{method="exact",le="0.64"} 0
beliefd_job_duration_seconds_bucket{method="exact",le="2.56"} 1
beliefd_job_duration_seconds_bucket{method="exact",le="10.24"} 1
beliefd_job_duration_seconds_bucket{method="exact",le="40.96"} 1
beliefd_job_duration_seconds_bucket{method="exact",le="163.84"} 1
beliefd_job_duration_seconds_bucket{method="exact",le="655.36"} 1
beliefd_job_duration_seconds_bucket{method="exact",le="2621.44"} 1
beliefd_job_duration_seconds_bucket{method="exact",le="+Inf"} 1
beliefd_job_duration_seconds_sum{method="exact"} 1.5
beliefd_job_duration_seconds_count{method="exact"} 1
beliefd_job_duration_seconds_bucket{method="rejection",le="0.01"} 0
beliefd_job_duration_seconds_bucket{method="rejection",le="0.04"} 0
beliefd_job_duration_seconds_bucket{method="rejection",le="0.16"} 0
beliefd_job_duration_seconds_bucket{method="rejection",le="0.64"} 0
beliefd_job_duration_seconds_bucket{method="rejection",le="2.56"} 1
beliefd_job_duration_seconds_bucket{method="rejection",le="10.24"} 1
beliefd_job_duration_seconds_bucket{method="rejection",le="40.96"} 1
beliefd_job_duration_seconds_bucket{method="rejection",le="163.84"} 1
beliefd_job_duration_seconds_bucket{method="rejection",le="655.36"} 1
beliefd_job_duration_seconds_bucket{method="rejection",le="2621.44"} 1
beliefd_job_duration_seconds_bucket{method="rejection",le="+Inf"} 1
beliefd_job_duration_seconds_sum{method="rejection"} 2
beliefd_job_duration_seconds_count{method="rejection"} 1
`), "beliefd_job_duration_seconds")
	if err != nil {
		t.Error(err)
	}
}

func TestJobsFromStore(t *testing.T) {
	m, reg := newTest(t, Options{NoRuntime: true, Unfinished: unfinished(7, 3)})
	_ = m
	err := testutil.GatherAndCompare(reg, strings.NewReader(`
# HELP beliefd_jobs Unfinished jobs by state, as the job store counts them.
# TYPE beliefd_jobs gauge
beliefd_jobs{state="queued"} 7
beliefd_jobs{state="running"} 3
# HELP beliefd_queue_depth Unfinished (queued and running) jobs, as the job store counts them.
# TYPE beliefd_queue_depth gauge
beliefd_queue_depth 10
`), "beliefd_jobs", "beliefd_queue_depth")
	if err != nil {
		t.Error(err)
	}

	// A store that cannot answer leaves the gauges out instead of reporting 0.
	_, reg = newTest(t, Options{NoRuntime: true, Logger: slog.New(slog.DiscardHandler), Unfinished: func(context.Context) (int, int, error) {
		return 0, 0, errors.New("store down")
	}})
	if n, err := testutil.GatherAndCount(reg, "beliefd_jobs", "beliefd_queue_depth"); err != nil || n != 0 {
		t.Errorf("with a failing store: %d series (err %v), want 0", n, err)
	}
}

// TestSampleRate checks the rolling window against hand-computed means.
func TestSampleRate(t *testing.T) {
	start := time.Unix(1_000_000, 0)
	clk := &fakeClock{t: start}
	m, _ := newTest(t, Options{NoRuntime: true, Clock: clk.now})
	rate := func() float64 { return m.rate.rate("forward", clk.now()) }

	if r := rate(); r != 0 {
		t.Fatalf("rate before a whole second = %v, want 0", r)
	}
	clk.add(500 * time.Millisecond)
	m.SamplesDrawn("forward", 400) // second 0
	clk.add(time.Second)           // t = 1.5 s: second 0 is complete
	m.SamplesDrawn("forward", 600) // second 1, not yet complete
	if r := rate(); r != 400 {
		t.Errorf("after 1 s: rate = %v, want 400 (400 samples in 1 s)", r)
	}
	clk.add(time.Second) // t = 2.5 s
	if r := rate(); r != 500 {
		t.Errorf("after 2 s: rate = %v, want 500 ((400+600)/2)", r)
	}
	// Twenty seconds later the window (10 s) holds only new samples.
	for i := 0; i < 20; i++ {
		clk.add(time.Second)
		m.SamplesDrawn("forward", 50)
	}
	clk.add(time.Second)
	if r := rate(); r != 50 {
		t.Errorf("steady state: rate = %v, want 50", r)
	}
	// Idle for longer than the window: back to 0.
	clk.set(clk.now().Add(time.Minute))
	if r := rate(); r != 0 {
		t.Errorf("after a quiet minute: rate = %v, want 0", r)
	}
	if r := m.rate.rate("gibbs", clk.now()); r != 0 {
		t.Errorf("unused method: rate = %v, want 0", r)
	}
}

func TestHTTPMiddleware(t *testing.T) {
	m, _ := newTest(t, Options{NoRuntime: true})
	route := "GET /v1/jobs/{id}"
	teapot := m.HTTP(route, http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) { w.WriteHeader(http.StatusTeapot) }))
	silent := m.HTTP(route, http.HandlerFunc(func(http.ResponseWriter, *http.Request) {}))
	for _, p := range []string{"/v1/jobs/a", "/v1/jobs/b"} {
		teapot.ServeHTTP(httptest.NewRecorder(), httptest.NewRequest("GET", p, nil))
	}
	silent.ServeHTTP(httptest.NewRecorder(), httptest.NewRequest("GET", "/v1/jobs/c", nil))
	if got := testutil.ToFloat64(m.httpRequests.WithLabelValues(route, "418")); got != 2 {
		t.Errorf("requests{418} = %v, want 2", got)
	}
	if got := testutil.ToFloat64(m.httpRequests.WithLabelValues(route, "200")); got != 1 {
		t.Errorf("requests{200} = %v, want 1", got)
	}
	if n := testutil.CollectAndCount(m.httpDuration); n != 1 {
		t.Errorf("duration series = %d, want 1: raw paths must not become labels", n)
	}

	panicky := m.HTTP("POST /v1/query", http.HandlerFunc(func(http.ResponseWriter, *http.Request) { panic("boom") }))
	func() {
		defer func() {
			if recover() == nil {
				t.Error("the panic was swallowed")
			}
		}()
		panicky.ServeHTTP(httptest.NewRecorder(), httptest.NewRequest("POST", "/v1/query", nil))
	}()
	if got := testutil.ToFloat64(m.httpRequests.WithLabelValues("POST /v1/query", "500")); got != 1 {
		t.Errorf("requests{500} after a panic = %v, want 1", got)
	}

	// The wrapper keeps Flush reachable through http.ResponseController.
	flushing := m.HTTP("GET /events", http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if err := http.NewResponseController(w).Flush(); err != nil {
			t.Errorf("flush through the wrapper: %v", err)
		}
	}))
	rec := httptest.NewRecorder()
	flushing.ServeHTTP(rec, httptest.NewRequest("GET", "/events", nil))
	if !rec.Flushed {
		t.Error("the recorder was not flushed")
	}
}

func TestGRPCInterceptors(t *testing.T) {
	m, _ := newTest(t, Options{NoRuntime: true})
	method := "/belief.v1.JobService/GetJob"
	_, _ = m.UnaryServerInterceptor()(context.Background(), nil, &grpc.UnaryServerInfo{FullMethod: method},
		func(context.Context, any) (any, error) { return nil, status.Error(codes.NotFound, "no job") })
	_, _ = m.UnaryServerInterceptor()(context.Background(), nil, &grpc.UnaryServerInfo{FullMethod: method},
		func(context.Context, any) (any, error) { return "ok", nil })
	_ = m.StreamServerInterceptor()(nil, nil, &grpc.StreamServerInfo{FullMethod: "/belief.v1.JobService/WatchJob"},
		func(any, grpc.ServerStream) error { return nil })
	for _, c := range []struct {
		method, code string
	}{{method, "NotFound"}, {method, "OK"}, {"/belief.v1.JobService/WatchJob", "OK"}} {
		if got := testutil.ToFloat64(m.grpcRequests.WithLabelValues(c.method, c.code)); got != 1 {
			t.Errorf("grpc requests{%s,%s} = %v, want 1", c.method, c.code, got)
		}
	}
}

func TestNewRejectsDoubleRegistration(t *testing.T) {
	reg := prometheus.NewRegistry()
	if _, err := New(reg, Options{}); err != nil {
		t.Fatal(err)
	}
	if _, err := New(reg, Options{}); err == nil {
		t.Error("registering twice on one registry succeeded")
	}
	if _, err := New(nil, Options{}); err == nil {
		t.Error("New(nil) succeeded")
	}
}
