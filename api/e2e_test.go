package api_test

import (
	"bufio"
	"context"
	"encoding/json"
	"errors"
	"io"
	"log/slog"
	"math"
	"net"
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"
	"time"

	"github.com/beliefd/beliefd/api/convert"
	"github.com/beliefd/beliefd/api/grpcapi"
	"github.com/beliefd/beliefd/api/httpapi"
	"github.com/beliefd/beliefd/api/internal/apitest"
	"github.com/beliefd/beliefd/api/internal/leakcheck"
	"github.com/beliefd/beliefd/api/metrics"
	beliefv1 "github.com/beliefd/beliefd/proto/belief/v1"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/jobs/memstore"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
	"github.com/beliefd/beliefd/worker"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/testutil"
	"google.golang.org/genproto/googleapis/rpc/errdetails"
	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"
)

// The domain service is what both transports serve.
var (
	_ grpcapi.Service = (*jobs.Service)(nil)
	_ httpapi.Service = (*jobs.Service)(nil)
)

type stack struct {
	store  *memstore.Store
	svc    *jobs.Service
	reg    *prometheus.Registry
	http   *httptest.Server
	client *http.Client
	conn   *grpc.ClientConn
	jobs   beliefv1.JobServiceClient
	models beliefv1.ModelServiceClient
}

// newStack wires the memory store, the job service, metrics and both
// transports over loopback, as `beliefd serve` does.
func newStack(t *testing.T) *stack {
	t.Helper()
	log := slog.New(slog.DiscardHandler)
	s := &stack{store: memstore.New(memstore.Options{}), reg: prometheus.NewRegistry()}
	m, err := metrics.New(s.reg, metrics.Options{Unfinished: s.store.Unfinished, NoRuntime: true, Logger: log})
	if err != nil {
		t.Fatal(err)
	}
	// Every merge writes a partial result, so watchers see them.
	s.svc, err = jobs.NewService(s.store, jobs.Config{PartialEvery: time.Nanosecond, Logger: log}, m)
	if err != nil {
		t.Fatal(err)
	}
	s.http = httptest.NewServer(httpapi.New(s.svc, httpapi.Options{Logger: log, Metrics: m, MetricsHandler: metrics.Handler(s.reg)}))
	s.client = s.http.Client()

	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	opts := grpcapi.Options{Logger: log, Metrics: m}
	gs := grpc.NewServer(grpcapi.ServerOptions(opts)...)
	grpcapi.Register(gs, s.svc, opts)
	served := make(chan struct{})
	go func() { defer close(served); _ = gs.Serve(lis) }()
	s.conn, err = grpc.NewClient(lis.Addr().String(), grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	s.jobs = beliefv1.NewJobServiceClient(s.conn)
	s.models = beliefv1.NewModelServiceClient(s.conn)
	t.Cleanup(func() {
		s.conn.Close()
		gs.Stop()
		<-served
		s.client.CloseIdleConnections()
		s.http.Close()
		s.store.Close()
	})
	return s
}

func (s *stack) do(t *testing.T, method, path, body string, header ...string) (int, []byte) {
	t.Helper()
	req, err := http.NewRequest(method, s.http.URL+path, strings.NewReader(body))
	if err != nil {
		t.Fatal(err)
	}
	for i := 0; i+1 < len(header); i += 2 {
		req.Header.Set(header[i], header[i+1])
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
	return resp.StatusCode, b
}

// view is the part of a job view the test reads.
type view struct {
	ID string `json:"id"`
	infer.Result
	Job struct {
		MergedBlocks int64 `json:"merged_blocks"`
	} `json:"job"`
}

// comparable strips what depends on the clock (elapsed time) and on where
// the result was read (job state), leaving what the determinism contract
// fixes.
func comparable(t *testing.T, r *infer.Result) string {
	t.Helper()
	c := *r
	c.ElapsedSeconds, c.State = 0, ""
	b, err := json.Marshal(&c)
	if err != nil {
		t.Fatal(err)
	}
	return string(b)
}

// TestEndToEnd runs a sampling job through the real service, memory store
// and worker pool, over loopback HTTP and gRPC: the partial results show
// while it runs, and the final result equals what infer.Runner computes in
// one process with the same model, query and seed (the determinism contract).
func TestEndToEnd(t *testing.T) {
	leakcheck.Check(t)
	s := newStack(t)
	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
	defer cancel()

	// Create the model over HTTP; read it back over gRPC.
	if code, body := s.do(t, "POST", "/v1/models", apitest.ChestClinic); code != http.StatusCreated {
		t.Fatalf("create model: %d %s", code, body)
	}
	doc, err := model.DecodeBytes([]byte(apitest.ChestClinic))
	if err != nil {
		t.Fatal(err)
	}
	wantMsg, err := convert.ModelToProto(doc)
	if err != nil {
		t.Fatal(err)
	}
	got, err := s.models.GetModel(ctx, &beliefv1.GetModelRequest{Name: "chest-clinic"})
	if err != nil {
		t.Fatal(err)
	}
	if !proto.Equal(got.GetModel(), wantMsg) || got.GetInfo().GetVersion() != 1 {
		t.Fatalf("GetModel over gRPC: %v", got)
	}

	// Submit a likelihood-weighting job of six blocks over HTTP.
	const blocks = 6
	seed := uint64(42)
	q := infer.Query{Model: "chest-clinic", Evidence: map[string]string{"xray": "yes"}, SoftEvidence: map[string][]float64{"dysp": {0.3, 0.9}},
		Method: infer.MethodLikelihoodWeighting, Seed: &seed, Stop: infer.StopRule{MaxSamples: blocks * sampling.DefaultBlockSize}}
	qb, _ := json.Marshal(q)
	code, body := s.do(t, "POST", "/v1/jobs", string(qb), "Idempotency-Key", "e2e-1")
	if code != http.StatusAccepted {
		t.Fatalf("submit: %d %s", code, body)
	}
	var sub view
	if err := json.Unmarshal(body, &sub); err != nil {
		t.Fatal(err)
	}
	id := sub.ID

	// One unit of work by hand: the job shows a partial result.
	if worked, err := s.svc.RunOnce(ctx, "by-hand"); err != nil || !worked {
		t.Fatalf("RunOnce: %v %v", worked, err)
	}
	code, body = s.do(t, "GET", "/v1/jobs/"+id, "")
	var partial view
	if err := json.Unmarshal(body, &partial); err != nil || code != http.StatusOK {
		t.Fatalf("get job: %d %s", code, body)
	}
	if partial.State != "running" || partial.Samples != sampling.DefaultBlockSize || partial.Job.MergedBlocks != 1 || len(partial.Marginals) == 0 {
		t.Fatalf("after one block: state %s, samples %d, merged %d, %d marginals", partial.State, partial.Samples, partial.Job.MergedBlocks, len(partial.Marginals))
	}

	// Watch over gRPC and over SSE, then let a worker pool finish the job.
	stream, err := s.jobs.WatchJob(ctx, &beliefv1.WatchJobRequest{Id: id})
	if err != nil {
		t.Fatal(err)
	}
	first, err := stream.Recv()
	if err != nil {
		t.Fatal(err)
	}
	if first.GetMergedBlocks() < 1 || first.GetResult() == nil {
		t.Errorf("first watched state: merged %d", first.GetMergedBlocks())
	}
	req, _ := http.NewRequestWithContext(ctx, "GET", s.http.URL+"/v1/jobs/"+id+"/events", nil)
	resp, err := s.client.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()

	pool, err := worker.NewPool(s.svc, s.store, worker.Config{Workers: 2, Logger: slog.New(slog.DiscardHandler)})
	if err != nil {
		t.Fatal(err)
	}
	poolCtx, stopPool := context.WithCancel(ctx)
	poolDone := make(chan error, 1)
	go func() { poolDone <- pool.Run(poolCtx) }()

	var last *beliefv1.Job
	prevSamples := first.GetResult().GetSamples()
	for {
		m, err := stream.Recv()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			t.Fatal(err)
		}
		if s := m.GetResult().GetSamples(); s < prevSamples {
			t.Errorf("samples went back from %d to %d", prevSamples, s)
		}
		prevSamples = m.GetResult().GetSamples()
		last = m
	}
	if last.GetState() != beliefv1.JobState_JOB_STATE_SUCCEEDED || last.GetResult().GetState() != beliefv1.JobState_JOB_STATE_SUCCEEDED {
		t.Fatalf("last watched state: %v", last.GetState())
	}

	var sseFinal view
	sc := bufio.NewScanner(resp.Body)
	sc.Buffer(make([]byte, 1<<20), 1<<20)
	event := ""
	for sc.Scan() {
		line := sc.Text()
		if strings.HasPrefix(line, "event: ") {
			event = strings.TrimPrefix(line, "event: ")
		}
		if strings.HasPrefix(line, "data: ") && event == httpapi.EventFinal {
			if err := json.Unmarshal([]byte(strings.TrimPrefix(line, "data: ")), &sseFinal); err != nil {
				t.Fatal(err)
			}
		}
	}
	if sseFinal.State != "succeeded" {
		t.Fatalf("no final event on the stream (last event %q)", event)
	}

	// The determinism contract: the same answer as one process computes.
	net, err := model.Compile(doc, model.Limits{})
	if err != nil {
		t.Fatal(err)
	}
	want, err := infer.NewRunner(infer.Options{}).Run(ctx, net, &q, nil)
	if err != nil {
		t.Fatal(err)
	}
	if want.Samples != blocks*sampling.DefaultBlockSize {
		t.Fatalf("runner drew %d samples", want.Samples)
	}
	wantJSON := comparable(t, want)
	if g := comparable(t, convert.ResultFromProto(last.GetResult())); g != wantJSON {
		t.Errorf("gRPC final result differs from infer.Runner:\n got %s\nwant %s", g, wantJSON)
	}
	if g := comparable(t, &sseFinal.Result); g != wantJSON {
		t.Errorf("SSE final result differs from infer.Runner:\n got %s\nwant %s", g, wantJSON)
	}
	code, body = s.do(t, "GET", "/v1/jobs/"+id, "")
	var final view
	if err := json.Unmarshal(body, &final); err != nil || code != http.StatusOK {
		t.Fatalf("get job: %d %s", code, body)
	}
	if g := comparable(t, &final.Result); g != wantJSON {
		t.Errorf("GET final result differs from infer.Runner:\n got %s\nwant %s", g, wantJSON)
	}

	stopPool()
	if err := <-poolDone; err != nil && !errors.Is(err, context.Canceled) {
		t.Errorf("pool: %v", err)
	}

	// Cancel a queued job over gRPC (no workers run now); HTTP sees it.
	sj, err := s.jobs.SubmitJob(ctx, &beliefv1.SubmitJobRequest{Query: &beliefv1.Query{Model: "chest-clinic", Method: "forward"}})
	if err != nil {
		t.Fatal(err)
	}
	cj, err := s.jobs.CancelJob(ctx, &beliefv1.CancelJobRequest{Id: sj.GetJob().GetId()})
	if err != nil || cj.GetState() != beliefv1.JobState_JOB_STATE_CANCELLED {
		t.Fatalf("cancel: %v %v", cj.GetState(), err)
	}
	code, body = s.do(t, "GET", "/v1/jobs/"+sj.GetJob().GetId(), "")
	var cv view
	if err := json.Unmarshal(body, &cv); err != nil || code != http.StatusOK || cv.State != "cancelled" {
		t.Errorf("cancelled job over HTTP: %d %s", code, body)
	}

	// Bad requests get 4xx with messages that name the problem.
	code, body = s.do(t, "POST", "/v1/jobs", `{"model": "chest-clinic", "evidence": {"xrya": "yes"}}`)
	if code != http.StatusBadRequest || !strings.Contains(string(body), `unknown variable \"xrya\"`) {
		t.Errorf("unknown variable: %d %s", code, body)
	}
	code, body = s.do(t, "POST", "/v1/models", apitest.BadRows)
	if code != http.StatusBadRequest || !strings.Contains(string(body), `"field":"variables[ups].table"`) {
		t.Errorf("bad model: %d %s", code, body)
	}
	code, body = s.do(t, "GET", "/v1/jobs/no-such-job", "")
	if code != http.StatusNotFound {
		t.Errorf("unknown job: %d %s", code, body)
	}
	_, err = s.jobs.SubmitJob(ctx, &beliefv1.SubmitJobRequest{Query: &beliefv1.Query{Model: "chest-clinic", Stop: &beliefv1.StopRule{RelErr: -1}}})
	st, _ := status.FromError(err)
	if st.Code() != codes.InvalidArgument || !strings.Contains(st.Message(), "rel_err") {
		t.Errorf("bad stop rule over gRPC: %v", err)
	}
	for _, d := range st.Details() {
		if br, ok := d.(*errdetails.BadRequest); ok && br.GetFieldViolations()[0].GetField() != "query.stop" {
			t.Errorf("bad stop rule: violation on %s, want query.stop", br.GetFieldViolations()[0].GetField())
		}
	}

	// A synchronous exact query gives the published marginals
	// (Lauritzen & Spiegelhalter 1988, six decimals).
	code, body = s.do(t, "POST", "/v1/query", `{"model": "chest-clinic", "method": "exact"}`)
	var ex infer.Result
	if err := json.Unmarshal(body, &ex); err != nil || code != http.StatusOK {
		t.Fatalf("query: %d %s", code, body)
	}
	for v, want := range apitest.ChestClinicYes {
		if p := ex.Marginals[v]["yes"].P; math.Abs(p-want) > 5e-7 {
			t.Errorf("P(%s=yes) = %v, want %v (published)", v, p, want)
		}
	}

	// Metrics: the finished job by method and state, and an empty queue.
	if n := finished(t, s.reg, "likelihood-weighting", "succeeded"); n != 1 {
		t.Errorf("jobs finished{likelihood-weighting,succeeded} = %v, want 1", n)
	}
	err = testutil.GatherAndCompare(s.reg, strings.NewReader(`
# HELP beliefd_queue_depth Unfinished (queued and running) jobs, as the job store counts them.
# TYPE beliefd_queue_depth gauge
beliefd_queue_depth 0
`), "beliefd_queue_depth")
	if err != nil {
		t.Error(err)
	}
}

// finished reads one series of beliefd_jobs_finished_total (0 if absent).
func finished(t *testing.T, g prometheus.Gatherer, method, state string) float64 {
	t.Helper()
	mfs, err := g.Gather()
	if err != nil {
		t.Fatal(err)
	}
	for _, mf := range mfs {
		if mf.GetName() != "beliefd_jobs_finished_total" {
			continue
		}
		for _, m := range mf.GetMetric() {
			labels := map[string]string{}
			for _, l := range m.GetLabel() {
				labels[l.GetName()] = l.GetValue()
			}
			if labels["method"] == method && labels["state"] == state {
				return m.GetCounter().GetValue()
			}
		}
	}
	return 0
}
