package grpcapi

import (
	"context"
	"errors"
	"io"
	"log/slog"
	"math"
	"net"
	"strings"
	"testing"
	"time"

	"github.com/beliefd/beliefd/api/convert"
	"github.com/beliefd/beliefd/api/internal/apitest"
	"github.com/beliefd/beliefd/api/internal/fakesvc"
	"github.com/beliefd/beliefd/api/internal/leakcheck"
	"github.com/beliefd/beliefd/api/metrics"
	beliefv1 "github.com/beliefd/beliefd/proto/belief/v1"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/model"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/testutil"
	"google.golang.org/genproto/googleapis/rpc/errdetails"
	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"
	reflectionpb "google.golang.org/grpc/reflection/grpc_reflection_v1"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"
)

type env struct {
	svc    *fakesvc.Service
	srv    *Server
	conn   *grpc.ClientConn
	models beliefv1.ModelServiceClient
	jobs   beliefv1.JobServiceClient
	query  beliefv1.QueryServiceClient
	reg    *prometheus.Registry
}

// start serves a fake service over loopback TCP.
func start(t *testing.T, opts Options, dial ...grpc.DialOption) *env {
	t.Helper()
	e := &env{svc: fakesvc.New(), reg: prometheus.NewRegistry()}
	m, err := metrics.New(e.reg, metrics.Options{NoRuntime: true})
	if err != nil {
		t.Fatal(err)
	}
	opts.Metrics = m
	if opts.Logger == nil {
		opts.Logger = slog.New(slog.DiscardHandler)
	}
	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	gs := grpc.NewServer(ServerOptions(opts)...)
	e.srv = Register(gs, e.svc, opts)
	served := make(chan struct{})
	go func() { defer close(served); _ = gs.Serve(lis) }()
	dial = append(dial, grpc.WithTransportCredentials(insecure.NewCredentials()))
	e.conn, err = grpc.NewClient(lis.Addr().String(), dial...)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() {
		e.conn.Close()
		gs.Stop()
		<-served
	})
	e.models = beliefv1.NewModelServiceClient(e.conn)
	e.jobs = beliefv1.NewJobServiceClient(e.conn)
	e.query = beliefv1.NewQueryServiceClient(e.conn)
	return e
}

func ctxT(t *testing.T) context.Context {
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	t.Cleanup(cancel)
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

// wantStatus checks the code of err and that its message contains every part.
func wantStatus(t *testing.T, err error, code codes.Code, parts ...string) *status.Status {
	t.Helper()
	st, ok := status.FromError(err)
	if !ok || st.Code() != code {
		t.Fatalf("err = %v, want code %v", err, code)
	}
	for _, p := range parts {
		if !strings.Contains(st.Message(), p) {
			t.Errorf("message %q does not mention %q", st.Message(), p)
		}
	}
	return st
}

func details(st *status.Status) (*errdetails.ErrorInfo, *errdetails.BadRequest) {
	var info *errdetails.ErrorInfo
	var br *errdetails.BadRequest
	for _, d := range st.Details() {
		switch d := d.(type) {
		case *errdetails.ErrorInfo:
			info = d
		case *errdetails.BadRequest:
			br = d
		}
	}
	return info, br
}

func TestModels(t *testing.T) {
	leakcheck.Check(t)
	e := start(t, Options{})
	ctx := ctxT(t)
	msg := modelMsg(t, apitest.ChestClinic)

	r1, err := e.models.CreateModel(ctx, &beliefv1.CreateModelRequest{Model: msg})
	if err != nil {
		t.Fatal(err)
	}
	if !r1.GetCreated() || r1.GetInfo().GetVersion() != 1 || r1.GetInfo().GetVariables() != 8 {
		t.Errorf("first create: %v", r1)
	}
	r2, err := e.models.CreateModel(ctx, &beliefv1.CreateModelRequest{Model: msg})
	if err != nil {
		t.Fatal(err)
	}
	if r2.GetCreated() || r2.GetInfo().GetVersion() != 1 {
		t.Errorf("same content again: created %v version %d, want false 1", r2.GetCreated(), r2.GetInfo().GetVersion())
	}

	got, err := e.models.GetModel(ctx, &beliefv1.GetModelRequest{Name: "chest-clinic", Version: 1})
	if err != nil {
		t.Fatal(err)
	}
	if !proto.Equal(got.GetModel(), msg) {
		t.Errorf("GetModel returned another model:\n got %v\nwant %v", got.GetModel(), msg)
	}
	if _, err := e.models.GetModel(ctx, &beliefv1.GetModelRequest{Name: "chest-clinic@1"}); err != nil {
		t.Errorf("name@version: %v", err)
	}
	_, err = e.models.GetModel(ctx, &beliefv1.GetModelRequest{Name: "chest-clinic@1", Version: 1})
	st := wantStatus(t, err, codes.InvalidArgument, "not both")
	if _, br := details(st); br == nil || br.GetFieldViolations()[0].GetField() != "version" {
		t.Errorf("field violations %v, want one on version", br)
	}
	_, err = e.models.GetModel(ctx, &beliefv1.GetModelRequest{Name: "chest-clinic", Version: 2})
	wantStatus(t, err, codes.NotFound)

	// Pagination: the fake pages by two.
	for _, name := range []string{"b-model", "c-model"} {
		msg := proto.Clone(msg).(*beliefv1.Model)
		msg.Name = name
		if _, err := e.models.CreateModel(ctx, &beliefv1.CreateModelRequest{Model: msg}); err != nil {
			t.Fatal(err)
		}
	}
	var names []string
	token := ""
	for page := 0; ; page++ {
		resp, err := e.models.ListModels(ctx, &beliefv1.ListModelsRequest{PageToken: token})
		if err != nil {
			t.Fatal(err)
		}
		for _, m := range resp.GetModels() {
			names = append(names, m.GetName())
		}
		if token = resp.GetNextPageToken(); token == "" {
			break
		}
		if page > 3 {
			t.Fatal("pagination does not end")
		}
	}
	if strings.Join(names, ",") != "b-model,c-model,chest-clinic" {
		t.Errorf("listed %v", names)
	}
	_, err = e.models.ListModels(ctx, &beliefv1.ListModelsRequest{PageSize: -1})
	wantStatus(t, err, codes.InvalidArgument, "page size")

	_, err = e.models.DeleteModel(ctx, &beliefv1.DeleteModelRequest{Name: "b-model@1"})
	wantStatus(t, err, codes.InvalidArgument, "every version")
	if _, err := e.models.DeleteModel(ctx, &beliefv1.DeleteModelRequest{Name: "b-model"}); err != nil {
		t.Fatal(err)
	}
	_, err = e.models.DeleteModel(ctx, &beliefv1.DeleteModelRequest{Name: "b-model"})
	wantStatus(t, err, codes.NotFound)

	_, err = e.models.CreateModel(ctx, &beliefv1.CreateModelRequest{})
	wantStatus(t, err, codes.InvalidArgument, "no model")
}

// TestMalformedModel: validation problems come back as BadRequest field
// violations whose fields are paths in the request.
func TestMalformedModel(t *testing.T) {
	leakcheck.Check(t)
	e := start(t, Options{})
	ctx := ctxT(t)
	_, err := e.models.CreateModel(ctx, &beliefv1.CreateModelRequest{Model: modelMsg(t, apitest.BadRows)})
	st := wantStatus(t, err, codes.InvalidArgument, `"ups"`, "rows given", `"alarm"`, "sums to 1.1")
	info, br := details(st)
	if info.GetReason() != "INVALID_MODEL" || info.GetDomain() != "beliefd" {
		t.Errorf("error info %v, want INVALID_MODEL in beliefd", info)
	}
	var fields []string
	for _, v := range br.GetFieldViolations() {
		fields = append(fields, v.GetField())
	}
	if strings.Join(fields, " ") != "model.variables[ups].table model.variables[alarm].table" {
		t.Errorf("violations on %v", fields)
	}

	// A NaN probability cannot be written as JSON: rejected as malformed.
	m := modelMsg(t, apitest.ChestClinic)
	m.GetVariables()[0].GetTable().GetRows()[0].P[0] = math.NaN()
	_, err = e.models.CreateModel(ctx, &beliefv1.CreateModelRequest{Model: m})
	wantStatus(t, err, codes.InvalidArgument, "NaN")
}

func TestJobs(t *testing.T) {
	leakcheck.Check(t)
	e := start(t, Options{})
	ctx := ctxT(t)
	if _, err := e.models.CreateModel(ctx, &beliefv1.CreateModelRequest{Model: modelMsg(t, apitest.ChestClinic)}); err != nil {
		t.Fatal(err)
	}
	seed := uint64(3)
	q := &beliefv1.Query{Model: "chest-clinic", Evidence: map[string]string{"xray": "yes"}, Method: "likelihood-weighting",
		Seed: &seed, Priority: "high", IdempotencyKey: "k1"}
	sub, err := e.jobs.SubmitJob(ctx, &beliefv1.SubmitJobRequest{Query: q})
	if err != nil {
		t.Fatal(err)
	}
	job := sub.GetJob()
	if !sub.GetCreated() || job.GetState() != beliefv1.JobState_JOB_STATE_QUEUED || job.GetPriority() != beliefv1.Priority_PRIORITY_HIGH ||
		job.GetQuery().GetEvidence()["xray"] != "yes" || job.GetModel().GetName() != "chest-clinic" {
		t.Errorf("submitted job: %v", sub)
	}
	again, err := e.jobs.SubmitJob(ctx, &beliefv1.SubmitJobRequest{Query: q})
	if err != nil {
		t.Fatal(err)
	}
	if again.GetCreated() || again.GetJob().GetId() != job.GetId() {
		t.Errorf("same idempotency key: created %v id %s, want false %s", again.GetCreated(), again.GetJob().GetId(), job.GetId())
	}
	got, err := e.jobs.GetJob(ctx, &beliefv1.GetJobRequest{Id: job.GetId()})
	if err != nil {
		t.Fatal(err)
	}
	if !proto.Equal(got, job) {
		t.Errorf("GetJob = %v, want %v", got, job)
	}
	list, err := e.jobs.ListJobs(ctx, &beliefv1.ListJobsRequest{})
	if err != nil {
		t.Fatal(err)
	}
	if len(list.GetJobs()) != 1 || list.GetJobs()[0].GetId() != job.GetId() || list.GetNextPageToken() != "" {
		t.Errorf("ListJobs = %v", list)
	}
	c, err := e.jobs.CancelJob(ctx, &beliefv1.CancelJobRequest{Id: job.GetId()})
	if err != nil {
		t.Fatal(err)
	}
	if c.GetState() != beliefv1.JobState_JOB_STATE_CANCELLED || c.GetFinishedAt() == nil {
		t.Errorf("cancelled job: %v", c)
	}

	for _, tc := range []struct {
		name   string
		q      *beliefv1.Query
		code   codes.Code
		parts  []string
		field  string
		reason string
	}{
		{"unknown variable", &beliefv1.Query{Model: "chest-clinic", Evidence: map[string]string{"Xray": "yes"}},
			codes.InvalidArgument, []string{`unknown variable "Xray"`, `did you mean "xray"`}, "", "BAD_EVIDENCE"},
		{"unknown state", &beliefv1.Query{Model: "chest-clinic", Evidence: map[string]string{"xray": "maybe"}},
			codes.InvalidArgument, []string{`no state "maybe"`}, "", "BAD_EVIDENCE"},
		{"bad stop rule", &beliefv1.Query{Model: "chest-clinic", Stop: &beliefv1.StopRule{AbsErr: 2}},
			codes.InvalidArgument, []string{"abs_err"}, "query.stop", "BAD_STOP_RULE"},
		{"bad method", &beliefv1.Query{Model: "chest-clinic", Method: "guess"},
			codes.InvalidArgument, []string{`unknown method "guess"`}, "", "BAD_QUERY"},
		{"unknown model", &beliefv1.Query{Model: "nope"}, codes.NotFound, []string{`"nope"`}, "", "NOT_FOUND"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			_, err := e.jobs.SubmitJob(ctx, &beliefv1.SubmitJobRequest{Query: tc.q})
			st := wantStatus(t, err, tc.code, tc.parts...)
			info, br := details(st)
			if info.GetReason() != tc.reason {
				t.Errorf("reason %q, want %q", info.GetReason(), tc.reason)
			}
			if tc.field != "" && (br == nil || br.GetFieldViolations()[0].GetField() != tc.field) {
				t.Errorf("violations %v, want one on %s", br, tc.field)
			}
		})
	}

	_, err = e.jobs.GetJob(ctx, &beliefv1.GetJobRequest{Id: "job-999"})
	wantStatus(t, err, codes.NotFound, "job-999")
	_, err = e.jobs.GetJob(ctx, &beliefv1.GetJobRequest{})
	wantStatus(t, err, codes.InvalidArgument, "no job id")
	_, err = e.jobs.CancelJob(ctx, &beliefv1.CancelJobRequest{Id: "job-999"})
	wantStatus(t, err, codes.NotFound)
	_, err = e.jobs.SubmitJob(ctx, &beliefv1.SubmitJobRequest{})
	wantStatus(t, err, codes.InvalidArgument, "no query")

	e.svc.MaxUnfinished = 1
	if _, err := e.jobs.SubmitJob(ctx, &beliefv1.SubmitJobRequest{Query: &beliefv1.Query{Model: "chest-clinic"}}); err != nil {
		t.Fatal(err)
	}
	_, err = e.jobs.SubmitJob(ctx, &beliefv1.SubmitJobRequest{Query: &beliefv1.Query{Model: "chest-clinic"}})
	wantStatus(t, err, codes.ResourceExhausted, "queue is full")
}

func TestServerErrors(t *testing.T) {
	leakcheck.Check(t)
	e := start(t, Options{})
	ctx := ctxT(t)
	e.svc.Fail = func(_ context.Context, method string) error {
		switch method {
		case "Get":
			return jobs.ErrUnavailable
		case "List":
			return fakesvc.ErrInjected
		case "Cancel":
			panic("cancel exploded")
		}
		return nil
	}
	_, err := e.jobs.GetJob(ctx, &beliefv1.GetJobRequest{Id: "x"})
	wantStatus(t, err, codes.Unavailable, "try again later")
	_, err = e.jobs.ListJobs(ctx, &beliefv1.ListJobsRequest{})
	st := wantStatus(t, err, codes.Internal)
	if strings.Contains(st.Message(), "secret") {
		t.Errorf("internal detail leaked: %q", st.Message())
	}
	_, err = e.jobs.CancelJob(ctx, &beliefv1.CancelJobRequest{Id: "x"})
	wantStatus(t, err, codes.Internal)

	// The metrics interceptor saw all three, by method and code (a panic
	// counts as the Internal the recovery turned it into).
	err = testutil.GatherAndCompare(e.reg, strings.NewReader(`
# HELP beliefd_grpc_requests_total gRPC requests by full method and status code.
# TYPE beliefd_grpc_requests_total counter
beliefd_grpc_requests_total{code="Internal",method="/belief.v1.JobService/CancelJob"} 1
beliefd_grpc_requests_total{code="Internal",method="/belief.v1.JobService/ListJobs"} 1
beliefd_grpc_requests_total{code="Unavailable",method="/belief.v1.JobService/GetJob"} 1
`), "beliefd_grpc_requests_total")
	if err != nil {
		t.Error(err)
	}
}

// TestQuery: a synchronous exact query on the chest-clinic network gives
// the published marginals (Lauritzen & Spiegelhalter 1988, to the six
// decimals they print).
func TestQuery(t *testing.T) {
	leakcheck.Check(t)
	e := start(t, Options{})
	ctx := ctxT(t)
	if _, err := e.models.CreateModel(ctx, &beliefv1.CreateModelRequest{Model: modelMsg(t, apitest.ChestClinic)}); err != nil {
		t.Fatal(err)
	}
	res, err := e.query.Query(ctx, &beliefv1.QueryRequest{Query: &beliefv1.Query{Model: "chest-clinic", Method: "exact"}})
	if err != nil {
		t.Fatal(err)
	}
	for v, want := range apitest.ChestClinicYes {
		iv := res.GetMarginals()[v].GetStates()["yes"]
		if math.Abs(iv.GetP()-want) > 5e-7 || iv.GetLo() != iv.GetP() || iv.GetHi() != iv.GetP() {
			t.Errorf("P(%s=yes) = %v [%v, %v], want %v (published, 6 decimals) with a zero-width interval", v, iv.GetP(), iv.GetLo(), iv.GetHi(), want)
		}
	}
	if res.GetMethod() != "exact" || res.GetCaution() == "" {
		t.Errorf("method %q caution %q", res.GetMethod(), res.GetCaution())
	}
	_, err = e.query.Query(ctx, &beliefv1.QueryRequest{Query: &beliefv1.Query{Model: "chest-clinic", Targets: []string{"nope"}}})
	wantStatus(t, err, codes.InvalidArgument, `"nope"`)
}

// TestQueryDeadline: the query runs under the call's deadline, or under
// Options.QueryTimeout when the call has none.
func TestQueryDeadline(t *testing.T) {
	leakcheck.Check(t)
	const timeout = time.Hour
	e := start(t, Options{QueryTimeout: timeout})
	deadlines := make(chan time.Time, 1)
	e.svc.Fail = func(ctx context.Context, method string) error {
		if method == "Query" {
			d, ok := ctx.Deadline()
			if !ok {
				t.Error("Query ran without a deadline")
			}
			deadlines <- d
		}
		return nil
	}
	ctx := ctxT(t)
	if _, err := e.models.CreateModel(ctx, &beliefv1.CreateModelRequest{Model: modelMsg(t, apitest.ChestClinic)}); err != nil {
		t.Fatal(err)
	}
	q := &beliefv1.QueryRequest{Query: &beliefv1.Query{Model: "chest-clinic", Method: "exact"}}

	before := time.Now()
	if _, err := e.query.Query(context.Background(), q); err != nil {
		t.Fatal(err)
	}
	// No call deadline: the server's, one QueryTimeout after the call (the
	// hour dwarfs any scheduling delay, so the window is not a timing bet).
	if d := <-deadlines; d.Before(before.Add(timeout)) || d.After(time.Now().Add(timeout)) {
		t.Errorf("deadline %v, want %v after the call", d.Sub(before), timeout)
	}

	// A call deadline of two hours is kept, not cut to QueryTimeout. gRPC
	// sends the time left, so the server's deadline is the call's give or
	// take the transit time; a minute either way separates it from one hour.
	cctx, cancel := context.WithTimeout(context.Background(), 2*timeout)
	defer cancel()
	want, _ := cctx.Deadline()
	if _, err := e.query.Query(cctx, q); err != nil {
		t.Fatal(err)
	}
	if d := <-deadlines; d.Sub(want).Abs() > time.Minute {
		t.Errorf("deadline %v, want the call's %v", d, want)
	}
}

func TestHealthAndReflection(t *testing.T) {
	leakcheck.Check(t)
	e := start(t, Options{HealthInterval: 10 * time.Millisecond})
	ready := make(chan error, 1)
	ready <- nil
	var readyErr error
	e.svc.Fail = func(_ context.Context, method string) error {
		if method != "Ready" {
			return nil
		}
		select {
		case err := <-ready:
			readyErr = err
		default:
		}
		return readyErr
	}
	hc := healthpb.NewHealthClient(e.conn)
	ctx := ctxT(t)
	check := func(service string) healthpb.HealthCheckResponse_ServingStatus {
		r, err := hc.Check(ctx, &healthpb.HealthCheckRequest{Service: service})
		if err != nil {
			t.Fatal(err)
		}
		return r.GetStatus()
	}
	if st := check(""); st != healthpb.HealthCheckResponse_NOT_SERVING {
		t.Errorf("before RunHealth: %v, want NOT_SERVING", st)
	}
	hctx, stop := context.WithCancel(context.Background())
	done := make(chan struct{})
	go func() { defer close(done); e.srv.RunHealth(hctx) }()

	// Watch follows the status: SERVING, then NOT_SERVING when Ready fails.
	w, err := hc.Watch(ctx, &healthpb.HealthCheckRequest{Service: beliefv1.JobService_ServiceDesc.ServiceName})
	if err != nil {
		t.Fatal(err)
	}
	next := func() healthpb.HealthCheckResponse_ServingStatus {
		r, err := w.Recv()
		if err != nil {
			t.Fatal(err)
		}
		return r.GetStatus()
	}
	for next() != healthpb.HealthCheckResponse_SERVING {
	}
	ready <- jobs.ErrUnavailable
	for next() != healthpb.HealthCheckResponse_NOT_SERVING {
	}
	stop()
	<-done
	if st := check(""); st != healthpb.HealthCheckResponse_NOT_SERVING {
		t.Errorf("after RunHealth ended: %v, want NOT_SERVING", st)
	}

	rc, err := reflectionpb.NewServerReflectionClient(e.conn).ServerReflectionInfo(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if err := rc.Send(&reflectionpb.ServerReflectionRequest{MessageRequest: &reflectionpb.ServerReflectionRequest_ListServices{}}); err != nil {
		t.Fatal(err)
	}
	resp, err := rc.Recv()
	if err != nil {
		t.Fatal(err)
	}
	_ = rc.CloseSend()
	var listed []string
	for _, s := range resp.GetListServicesResponse().GetService() {
		listed = append(listed, s.GetName())
	}
	for _, want := range []string{"belief.v1.ModelService", "belief.v1.JobService", "belief.v1.QueryService", "grpc.health.v1.Health"} {
		if !strings.Contains(strings.Join(listed, " "), want) {
			t.Errorf("reflection lists %v, missing %s", listed, want)
		}
	}
}

// bigJob is a running job whose result carries padding of about size
// bytes, so few of its messages fit in a flow-control window.
func bigJob(n int, state jobs.State, size int) *jobs.Job {
	return &jobs.Job{ID: "job-1", State: state, Priority: jobs.PriorityNormal, Blocks: 1000, MergedBlocks: int64(n),
		Result: &infer.Result{Method: "forward", Samples: int64(n), State: string(state), Warnings: []string{strings.Repeat("x", size)}}}
}

// TestWatchSlowReader: while a reader does not read, the server keeps
// taking updates from the service and keeps only the newest. Once the
// reader reads again it gets at most the messages already in flight (the
// HTTP/2 stream window and the server's per-stream write quota, both
// 64 KiB with a fixed window, are the only buffers) and then the final
// state; not the hundreds of updates produced meanwhile.
func TestWatchSlowReader(t *testing.T) {
	leakcheck.Check(t)
	const window = 1 << 16 // grpc-go's default window and write quota, 64 KiB
	e := start(t, Options{}, grpc.WithInitialWindowSize(window), grpc.WithInitialConnWindowSize(window))
	updates := make(chan *jobs.Job)
	e.svc.WatchFunc = func(ctx context.Context, id string) (<-chan *jobs.Job, error) {
		if id != "job-1" {
			return nil, jobs.ErrNotFound
		}
		return updates, nil
	}
	const size = 16 << 10
	m, _ := convert.JobToProto(bigJob(0, jobs.StateRunning, size))
	msgBytes := proto.Size(m)

	ctx := ctxT(t)
	stream, err := e.jobs.WatchJob(ctx, &beliefv1.WatchJobRequest{Id: "job-1"})
	if err != nil {
		t.Fatal(err)
	}
	push := func(j *jobs.Job) {
		select {
		case updates <- j:
		case <-time.After(20 * time.Second):
			t.Fatalf("the server stopped taking updates from the service while the reader was slow (update %d)", j.MergedBlocks)
		}
	}
	push(bigJob(1, jobs.StateRunning, size))
	first, err := stream.Recv()
	if err != nil {
		t.Fatal(err)
	}
	if first.GetMergedBlocks() != 1 {
		t.Fatalf("first message: merged %d, want 1", first.GetMergedBlocks())
	}
	// The reader pauses while 500 updates and the final state are produced.
	const produced = 500
	for n := 2; n <= produced; n++ {
		push(bigJob(n, jobs.StateRunning, size))
	}
	push(bigJob(produced+1, jobs.StateSucceeded, size))
	close(updates)

	var seen []int64
	for {
		j, err := stream.Recv()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			t.Fatal(err)
		}
		seen = append(seen, j.GetMergedBlocks())
	}
	// In flight at most: the stream window plus the window the first read
	// gave back (one message), the write quota plus the one message it
	// admits beyond it, and a partial message at each of the two limits.
	bound := (2*window+2*msgBytes)/msgBytes + 2
	if len(seen) == 0 || seen[len(seen)-1] != produced+1 {
		t.Fatalf("after the pause the reader saw %v, want it to end with the final state %d", seen, produced+1)
	}
	if len(seen) > bound {
		t.Errorf("after the pause the reader saw %d messages (a backlog), want at most %d: %v", len(seen), bound, seen)
	}
	for i := 1; i < len(seen); i++ {
		if seen[i] <= seen[i-1] {
			t.Errorf("updates out of order: %v", seen)
		}
	}
}

// TestWatchEndsOnTerminal: with the fake's own watch, the stream delivers
// the current state, the updates, and ends after the terminal state.
func TestWatchEndsOnTerminal(t *testing.T) {
	leakcheck.Check(t)
	e := start(t, Options{})
	ctx := ctxT(t)
	if _, err := e.models.CreateModel(ctx, &beliefv1.CreateModelRequest{Model: modelMsg(t, apitest.ChestClinic)}); err != nil {
		t.Fatal(err)
	}
	sub, err := e.jobs.SubmitJob(ctx, &beliefv1.SubmitJobRequest{Query: &beliefv1.Query{Model: "chest-clinic"}})
	if err != nil {
		t.Fatal(err)
	}
	id := sub.GetJob().GetId()
	stream, err := e.jobs.WatchJob(ctx, &beliefv1.WatchJobRequest{Id: id})
	if err != nil {
		t.Fatal(err)
	}
	first, err := stream.Recv()
	if err != nil || first.GetState() != beliefv1.JobState_JOB_STATE_QUEUED {
		t.Fatalf("first: %v %v", first, err)
	}
	if _, err := e.svc.Update(id, func(j *jobs.Job) {
		j.State = jobs.StateSucceeded
		j.Result = &infer.Result{Method: "exact", Caution: infer.Caution}
	}); err != nil {
		t.Fatal(err)
	}
	last, err := stream.Recv()
	if err != nil || last.GetState() != beliefv1.JobState_JOB_STATE_SUCCEEDED || last.GetResult().GetState() != beliefv1.JobState_JOB_STATE_SUCCEEDED {
		t.Fatalf("last: %v %v", last, err)
	}
	if _, err := stream.Recv(); !errors.Is(err, io.EOF) {
		t.Errorf("after the terminal state: %v, want EOF", err)
	}
	_, err = e.jobs.WatchJob(ctx, &beliefv1.WatchJobRequest{Id: "job-404"})
	if err == nil {
		s, _ := e.jobs.WatchJob(ctx, &beliefv1.WatchJobRequest{Id: "job-404"})
		_, err = s.Recv()
	}
	wantStatus(t, err, codes.NotFound)
}
