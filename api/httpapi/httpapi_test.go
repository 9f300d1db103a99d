package httpapi

import (
	"bufio"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"math"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/beliefd/beliefd/api/internal/apitest"
	"github.com/beliefd/beliefd/api/internal/fakesvc"
	"github.com/beliefd/beliefd/api/internal/leakcheck"
	"github.com/beliefd/beliefd/api/metrics"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/sampling"
	"github.com/prometheus/client_golang/prometheus"
)

type env struct {
	svc    *fakesvc.Service
	srv    *httptest.Server
	client *http.Client
}

// start serves a fake service over loopback HTTP.
func start(t *testing.T, opts Options) *env {
	t.Helper()
	e := &env{svc: fakesvc.New()}
	reg := prometheus.NewRegistry()
	m, err := metrics.New(reg, metrics.Options{NoRuntime: true})
	if err != nil {
		t.Fatal(err)
	}
	opts.Metrics = m
	opts.MetricsHandler = metrics.Handler(reg)
	if opts.Logger == nil {
		opts.Logger = slog.New(slog.DiscardHandler)
	}
	e.srv = httptest.NewServer(New(e.svc, opts))
	e.client = e.srv.Client()
	t.Cleanup(func() {
		e.client.CloseIdleConnections()
		e.srv.Close()
	})
	return e
}

type response struct {
	status int
	header http.Header
	body   []byte
}

func (e *env) do(t *testing.T, method, path, body string, header ...string) response {
	t.Helper()
	req, err := http.NewRequest(method, e.srv.URL+path, strings.NewReader(body))
	if err != nil {
		t.Fatal(err)
	}
	for i := 0; i+1 < len(header); i += 2 {
		req.Header.Set(header[i], header[i+1])
	}
	resp, err := e.client.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	if err != nil {
		t.Fatal(err)
	}
	return response{status: resp.StatusCode, header: resp.Header, body: b}
}

func decode[T any](t *testing.T, r response) T {
	t.Helper()
	var v T
	if err := json.Unmarshal(r.body, &v); err != nil {
		t.Fatalf("decode %s: %v", r.body, err)
	}
	return v
}

// wantError checks the status and the error shape, and that the message
// contains every part.
func wantError(t *testing.T, r response, status int, code string, parts ...string) errorDetail {
	t.Helper()
	if r.status != status {
		t.Fatalf("status %d, want %d: %s", r.status, status, r.body)
	}
	if ct := r.header.Get("Content-Type"); ct != "application/json" {
		t.Errorf("error Content-Type %q", ct)
	}
	dec := json.NewDecoder(strings.NewReader(string(r.body)))
	dec.DisallowUnknownFields()
	var b errorBody
	if err := dec.Decode(&b); err != nil {
		t.Fatalf("error body %s is not the error shape: %v", r.body, err)
	}
	if b.Error.Status != status || b.Error.Code != code || b.Error.FieldViolations == nil {
		t.Errorf("error %+v, want status %d code %s and a field_violations list", b.Error, status, code)
	}
	for _, p := range parts {
		if !strings.Contains(b.Error.Message, p) {
			t.Errorf("message %q does not mention %q", b.Error.Message, p)
		}
	}
	return b.Error
}

func fields(d errorDetail) string {
	var fs []string
	for _, v := range d.FieldViolations {
		fs = append(fs, v.Field)
	}
	return strings.Join(fs, " ")
}

func (e *env) putChestClinic(t *testing.T) {
	t.Helper()
	if r := e.do(t, "POST", "/v1/models", apitest.ChestClinic); r.status != http.StatusCreated {
		t.Fatalf("create: %d %s", r.status, r.body)
	}
}

func TestModels(t *testing.T) {
	leakcheck.Check(t)
	e := start(t, Options{})
	r := e.do(t, "POST", "/v1/models", apitest.ChestClinic)
	if r.status != http.StatusCreated || r.header.Get("Location") != "/v1/models/chest-clinic@1" {
		t.Fatalf("create: %d %v %s", r.status, r.header, r.body)
	}
	info := decode[jobs.ModelInfo](t, r)
	if info.Name != "chest-clinic" || info.Version != 1 || info.Variables != 8 || info.Hash == "" {
		t.Errorf("created %+v", info)
	}
	r = e.do(t, "POST", "/v1/models", apitest.ChestClinic)
	if r.status != http.StatusOK || decode[jobs.ModelInfo](t, r).Version != 1 {
		t.Errorf("same content again: %d %s, want 200 and version 1", r.status, r.body)
	}

	for _, path := range []string{"/v1/models/chest-clinic", "/v1/models/chest-clinic?version=1", "/v1/models/chest-clinic@1"} {
		r = e.do(t, "GET", path, "")
		if r.status != http.StatusOK || string(r.body) != apitest.ChestClinic {
			t.Errorf("GET %s: %d, body is not the stored document", path, r.status)
		}
		if r.header.Get(HeaderModelVersion) != "1" || r.header.Get(HeaderModelHash) != info.Hash || r.header.Get("ETag") != `"`+info.Hash+`"` {
			t.Errorf("GET %s: headers %v", path, r.header)
		}
	}
	d := wantError(t, e.do(t, "GET", "/v1/models/chest-clinic@1?version=1", ""), 400, "INVALID_ARGUMENT", "not both")
	if fields(d) != "version" {
		t.Errorf("violations on %q, want version", fields(d))
	}
	wantError(t, e.do(t, "GET", "/v1/models/chest-clinic?version=x", ""), 400, "INVALID_ARGUMENT", `"x" is not a version`)
	wantError(t, e.do(t, "GET", "/v1/models/chest-clinic?version=2", ""), 404, "NOT_FOUND", "chest-clinic@2")
	wantError(t, e.do(t, "GET", "/v1/models/nope", ""), 404, "NOT_FOUND", `"nope"`)

	// Pagination: three models, pages of two.
	for _, name := range []string{"a-model", "b-model"} {
		doc := strings.Replace(apitest.ChestClinic, `"chest-clinic"`, `"`+name+`"`, 1)
		if r := e.do(t, "POST", "/v1/models", doc); r.status != http.StatusCreated {
			t.Fatalf("create %s: %d %s", name, r.status, r.body)
		}
	}
	var names []string
	token := ""
	for page := 0; page < 5; page++ {
		l := decode[modelList](t, e.do(t, "GET", "/v1/models?page_size=2&page_token="+token, ""))
		for _, m := range l.Models {
			names = append(names, m.Name)
		}
		if token = l.NextPageToken; token == "" {
			break
		}
	}
	if strings.Join(names, ",") != "a-model,b-model,chest-clinic" {
		t.Errorf("listed %v", names)
	}
	d = wantError(t, e.do(t, "GET", "/v1/models?page_size=-3", ""), 400, "INVALID_ARGUMENT", "page size")
	if fields(d) != "page_size" {
		t.Errorf("violations on %q, want page_size", fields(d))
	}

	wantError(t, e.do(t, "DELETE", "/v1/models/a-model@1", ""), 400, "INVALID_ARGUMENT", "every version")
	if r := e.do(t, "DELETE", "/v1/models/a-model", ""); r.status != http.StatusNoContent {
		t.Errorf("delete: %d %s", r.status, r.body)
	}
	wantError(t, e.do(t, "DELETE", "/v1/models/a-model", ""), 404, "NOT_FOUND")
}

// TestBadModels: a malformed or invalid model gets a 400 naming each
// problem, with field violations; an oversized body gets a 413.
func TestBadModels(t *testing.T) {
	leakcheck.Check(t)
	e := start(t, Options{MaxModelBytes: 2048})
	d := wantError(t, e.do(t, "POST", "/v1/models", apitest.BadRows), 400, "INVALID_ARGUMENT",
		`"ups"`, "1 rows given, want 2", `"alarm"`, "sums to 1.1")
	if d.Reason != "INVALID_MODEL" || fields(d) != "variables[ups].table variables[alarm].table" {
		t.Errorf("reason %s, violations on %q", d.Reason, fields(d))
	}
	d = wantError(t, e.do(t, "POST", "/v1/models", `{"name": "x", "variables": [], "colour": "red"}`), 400, "INVALID_ARGUMENT", `unknown field "colour"`)
	if d.Reason != "MALFORMED_MODEL" {
		t.Errorf("reason %s, want MALFORMED_MODEL", d.Reason)
	}
	wantError(t, e.do(t, "POST", "/v1/models", `{"name": "x", "variables": [`), 400, "INVALID_ARGUMENT", "ends early")
	big := `{"name": "x", "description": "` + strings.Repeat("y", 4096) + `", "variables": []}`
	d = wantError(t, e.do(t, "POST", "/v1/models", big), 413, "INVALID_ARGUMENT", "larger than the limit of 2048 bytes")
	if d.Reason != "BODY_TOO_LARGE" {
		t.Errorf("reason %s, want BODY_TOO_LARGE", d.Reason)
	}
}

func TestJobs(t *testing.T) {
	leakcheck.Check(t)
	e := start(t, Options{MaxQueryBytes: 4096})
	e.putChestClinic(t)
	q := `{"model": "chest-clinic", "evidence": {"xray": "yes"}, "method": "likelihood-weighting", "seed": 5, "priority": "high"}`
	r := e.do(t, "POST", "/v1/jobs", q, HeaderIdempotencyKey, "key-1")
	if r.status != http.StatusAccepted {
		t.Fatalf("submit: %d %s", r.status, r.body)
	}
	v := decode[map[string]any](t, r)
	id, _ := v["id"].(string)
	if id == "" || r.header.Get("Location") != "/v1/jobs/"+id {
		t.Fatalf("submit: id %q Location %q", id, r.header.Get("Location"))
	}
	job, _ := v["job"].(map[string]any)
	if v["state"] != "queued" || v["method"] != "likelihood-weighting" || job["priority"] != "high" || job["idempotency_key"] != "key-1" ||
		v["caution"] != infer.Caution {
		t.Errorf("submitted view: %s", r.body)
	}
	if m, ok := v["marginals"].(map[string]any); !ok || len(m) != 0 {
		t.Errorf("queued job: marginals %v, want {}", v["marginals"])
	}
	// The same key returns the same job, with 200.
	r = e.do(t, "POST", "/v1/jobs", q, HeaderIdempotencyKey, "key-1")
	if r.status != http.StatusOK || decode[map[string]any](t, r)["id"] != id {
		t.Errorf("resubmit: %d %s", r.status, r.body)
	}
	// The key may be in the body; a header that disagrees is an error.
	d := wantError(t, e.do(t, "POST", "/v1/jobs", `{"model": "chest-clinic", "idempotency_key": "a"}`, HeaderIdempotencyKey, "b"),
		400, "INVALID_ARGUMENT", "differs")
	if fields(d) != "idempotency_key" {
		t.Errorf("violations on %q", fields(d))
	}

	// A partial result shows through GET with the job's state.
	half := sampling.Interval{P: 0.5, Lo: 0.4, Hi: 0.6}
	if _, err := e.svc.Update(id, func(j *jobs.Job) {
		j.State = jobs.StateRunning
		j.MergedBlocks = 3
		j.Result = &infer.Result{Method: "likelihood-weighting", Seed: 5, Samples: 3000, Caution: infer.Caution,
			Marginals: map[string]map[string]sampling.Interval{"lung": {"no": half, "yes": half}}}
	}); err != nil {
		t.Fatal(err)
	}
	r = e.do(t, "GET", "/v1/jobs/"+id, "")
	var got struct {
		ID string `json:"id"`
		infer.Result
		Job jobInfo `json:"job"`
	}
	if err := json.Unmarshal(r.body, &got); err != nil {
		t.Fatal(err)
	}
	if got.ID != id || got.State != "running" || got.Samples != 3000 || got.Marginals["lung"]["yes"] != half || got.Job.MergedBlocks != 3 {
		t.Errorf("running job view: %s", r.body)
	}

	l := decode[jobList](t, e.do(t, "GET", "/v1/jobs", ""))
	if len(l.Jobs) != 1 || l.Jobs[0].ID != id || l.Jobs[0].State != jobs.StateRunning || l.NextPageToken != "" {
		t.Errorf("list: %+v", l)
	}
	wantError(t, e.do(t, "GET", "/v1/jobs?page_size=x", ""), 400, "INVALID_ARGUMENT", "page size")
	wantError(t, e.do(t, "GET", "/v1/jobs?page_token=bogus", ""), 400, "INVALID_ARGUMENT", "page token")

	r = e.do(t, "POST", "/v1/jobs/"+id+"/cancel", "")
	if c := decode[map[string]any](t, r); r.status != http.StatusOK || c["state"] != "cancelled" || c["stop_reason"] != "cancelled" {
		t.Errorf("cancel: %d %s", r.status, r.body)
	}
	wantError(t, e.do(t, "GET", "/v1/jobs/job-404", ""), 404, "NOT_FOUND", "job-404")
	wantError(t, e.do(t, "POST", "/v1/jobs/job-404/cancel", ""), 404, "NOT_FOUND")

	for _, tc := range []struct {
		name, body string
		status     int
		code       string
		parts      []string
		field      string
	}{
		{"unknown variable", `{"model": "chest-clinic", "evidence": {"Xray": "yes"}}`, 400, "INVALID_ARGUMENT",
			[]string{`unknown variable "Xray"`, `did you mean "xray"`}, ""},
		{"soft evidence length", `{"model": "chest-clinic", "soft_evidence": {"dysp": [0.2]}}`, 400, "INVALID_ARGUMENT",
			[]string{"1 likelihoods", "want one per state"}, ""},
		{"bad stop rule", `{"model": "chest-clinic", "stop": {"abs_err": 2}}`, 400, "INVALID_ARGUMENT", []string{"abs_err"}, "stop"},
		{"bad timeout", `{"model": "chest-clinic", "stop": {"timeout": "soon"}}`, 400, "INVALID_ARGUMENT", []string{`"soon"`}, ""},
		{"unknown field", `{"model": "chest-clinic", "evidense": {}}`, 400, "INVALID_ARGUMENT", []string{`unknown field "evidense"`}, ""},
		{"not json", `model=chest-clinic`, 400, "INVALID_ARGUMENT", []string{"invalid character"}, ""},
		{"unknown model", `{"model": "nope"}`, 404, "NOT_FOUND", []string{`"nope"`}, ""},
		{"too large", `{"model": "chest-clinic", "targets": ["` + strings.Repeat("x", 5000) + `"]}`, 413, "INVALID_ARGUMENT",
			[]string{"larger than the limit of 4096 bytes"}, ""},
	} {
		t.Run(tc.name, func(t *testing.T) {
			d := wantError(t, e.do(t, "POST", "/v1/jobs", tc.body), tc.status, tc.code, tc.parts...)
			if fields(d) != tc.field {
				t.Errorf("violations on %q, want %q", fields(d), tc.field)
			}
		})
	}

	e.svc.MaxUnfinished = 1
	if r := e.do(t, "POST", "/v1/jobs", `{"model": "chest-clinic"}`); r.status != http.StatusAccepted {
		t.Fatalf("submit: %d %s", r.status, r.body)
	}
	d = wantError(t, e.do(t, "POST", "/v1/jobs", `{"model": "chest-clinic"}`), 429, "RESOURCE_EXHAUSTED", "queue is full")
	if d.Reason != "QUEUE_FULL" {
		t.Errorf("reason %s", d.Reason)
	}
}

// TestQuery: POST /v1/query answers synchronously; the exact marginals of
// the chest-clinic network are the published ones (Lauritzen &
// Spiegelhalter 1988, six decimals).
func TestQuery(t *testing.T) {
	leakcheck.Check(t)
	e := start(t, Options{QueryTimeout: time.Hour, MaxQueryTimeout: 2 * time.Hour})
	e.putChestClinic(t)
	r := e.do(t, "POST", "/v1/query", `{"model": "chest-clinic", "method": "exact"}`)
	if r.status != http.StatusOK {
		t.Fatalf("query: %d %s", r.status, r.body)
	}
	res := decode[infer.Result](t, r)
	for v, want := range apitest.ChestClinicYes {
		iv := res.Marginals[v]["yes"]
		if math.Abs(iv.P-want) > 5e-7 || iv.Lo != iv.P || iv.Hi != iv.P {
			t.Errorf("P(%s=yes) = %+v, want %v (published) with lo = hi = p", v, iv, want)
		}
	}

	deadlines := make(chan time.Time, 1)
	e.svc.Fail = func(ctx context.Context, method string) error {
		if method == "Query" {
			d, _ := ctx.Deadline()
			deadlines <- d
		}
		return nil
	}
	// Default deadline, then ?timeout=. The hour dwarfs scheduling delays.
	for _, c := range []struct {
		query string
		want  time.Duration
	}{{"", time.Hour}, {"?timeout=90m", 90 * time.Minute}} {
		before := time.Now()
		if r := e.do(t, "POST", "/v1/query"+c.query, `{"model": "chest-clinic", "method": "exact"}`); r.status != http.StatusOK {
			t.Fatalf("query%s: %d %s", c.query, r.status, r.body)
		}
		if d := <-deadlines; d.Before(before.Add(c.want)) || d.After(time.Now().Add(c.want)) {
			t.Errorf("query%s: deadline %v after the call, want %v", c.query, d.Sub(before), c.want)
		}
	}
	e.svc.Fail = nil
	for _, c := range []struct{ query, part string }{
		{"?timeout=soon", `"soon" is not a duration`},
		{"?timeout=-1s", "must be positive"},
		{"?timeout=3h", "exceeds the limit of 2h0m0s"},
	} {
		d := wantError(t, e.do(t, "POST", "/v1/query"+c.query, `{"model": "chest-clinic"}`), 400, "INVALID_ARGUMENT", c.part)
		if fields(d) != "timeout" {
			t.Errorf("%s: violations on %q", c.query, fields(d))
		}
	}
	wantError(t, e.do(t, "POST", "/v1/query", `{"model": "chest-clinic", "targets": ["nope"]}`), 400, "INVALID_ARGUMENT", `"nope"`)
}

func TestServerErrors(t *testing.T) {
	leakcheck.Check(t)
	e := start(t, Options{})
	e.svc.Fail = func(_ context.Context, method string) error {
		switch method {
		case "Get":
			return fmt.Errorf("get job: %w", jobs.ErrUnavailable)
		case "List":
			return fakesvc.ErrInjected
		case "Cancel":
			panic("cancel exploded")
		case "ListModels":
			return fmt.Errorf("list: %w", context.DeadlineExceeded)
		}
		return nil
	}
	wantError(t, e.do(t, "GET", "/v1/jobs/x", ""), 503, "UNAVAILABLE", "try again later")
	d := wantError(t, e.do(t, "GET", "/v1/jobs", ""), 500, "INTERNAL", "internal error")
	if strings.Contains(d.Message, "secret") {
		t.Errorf("internal detail leaked: %q", d.Message)
	}
	wantError(t, e.do(t, "POST", "/v1/jobs/x/cancel", ""), 500, "INTERNAL")
	wantError(t, e.do(t, "GET", "/v1/models", ""), 504, "DEADLINE_EXCEEDED")

	// A panic after the response started aborts the connection instead of
	// passing a cut response off as whole.
	e.svc.Fail = nil
	e.putChestClinic(t)
	id := decode[map[string]any](t, e.do(t, "POST", "/v1/jobs", `{"model": "chest-clinic"}`))["id"].(string)
	e.svc.WatchFunc = func(context.Context, string) (<-chan *jobs.Job, error) {
		ch := make(chan *jobs.Job, 1)
		ch <- nil // a nil job: the handler panics while streaming
		close(ch)
		return ch, nil
	}
	resp, err := e.client.Get(e.srv.URL + "/v1/jobs/" + id + "/events")
	if err == nil {
		_, err = io.ReadAll(resp.Body)
		resp.Body.Close()
	}
	if err == nil {
		t.Error("a stream whose handler panicked ended as if complete")
	}
}

func TestRouting(t *testing.T) {
	leakcheck.Check(t)
	e := start(t, Options{})
	r := e.do(t, "PUT", "/v1/models", "")
	wantError(t, r, 405, "UNIMPLEMENTED", "PUT is not allowed")
	if r.header.Get("Allow") != "POST, GET, HEAD" {
		t.Errorf("Allow %q", r.header.Get("Allow"))
	}
	r = e.do(t, "GET", "/v1/jobs/x/cancel", "")
	wantError(t, r, 405, "UNIMPLEMENTED")
	if r.header.Get("Allow") != "POST" {
		t.Errorf("Allow %q", r.header.Get("Allow"))
	}
	wantError(t, e.do(t, "GET", "/v2/models", ""), 404, "NOT_FOUND", "no such endpoint")
	wantError(t, e.do(t, "GET", "/v1/models/", ""), 404, "NOT_FOUND")
}

func TestHealth(t *testing.T) {
	leakcheck.Check(t)
	e := start(t, Options{})
	if r := e.do(t, "GET", "/healthz", ""); r.status != 200 {
		t.Errorf("healthz: %d", r.status)
	}
	if r := e.do(t, "GET", "/readyz", ""); r.status != 200 {
		t.Errorf("readyz: %d %s", r.status, r.body)
	}
	e.svc.Fail = func(_ context.Context, method string) error {
		if method == "Ready" {
			return fmt.Errorf("ping: %w", jobs.ErrUnavailable)
		}
		return nil
	}
	wantError(t, e.do(t, "GET", "/readyz", ""), 503, "UNAVAILABLE", "not ready")
	if r := e.do(t, "GET", "/healthz", ""); r.status != 200 {
		t.Errorf("healthz while not ready: %d, want 200 (alive)", r.status)
	}
}

// TestMetricsEndpoint: /metrics serves the registry, with route labels
// that are patterns, not raw paths.
func TestMetricsEndpoint(t *testing.T) {
	leakcheck.Check(t)
	e := start(t, Options{})
	e.do(t, "GET", "/v1/jobs/job-12345", "")
	e.do(t, "GET", "/v1/nothing-here", "")
	r := e.do(t, "GET", "/metrics", "")
	if r.status != 200 {
		t.Fatalf("metrics: %d", r.status)
	}
	body := string(r.body)
	for _, want := range []string{
		`beliefd_http_requests_total{code="404",route="GET /v1/jobs/{id}"} 1`,
		`beliefd_http_requests_total{code="404",route="unmatched"} 1`,
	} {
		if !strings.Contains(body, want) {
			t.Errorf("metrics lack %s", want)
		}
	}
	if strings.Contains(body, "job-12345") || strings.Contains(body, "nothing-here") {
		t.Error("a raw path became a label value")
	}
}

// sseEvent is one event of a stream.
type sseEvent struct {
	name string
	data string
}

// readEvents parses an event stream, sending events and comments (as
// events named ":") until EOF.
func readEvents(body io.Reader, out chan<- sseEvent) {
	defer close(out)
	sc := bufio.NewScanner(body)
	sc.Buffer(make([]byte, 1<<20), 1<<20)
	var ev sseEvent
	for sc.Scan() {
		line := sc.Text()
		switch {
		case line == "":
			if ev.name != "" {
				out <- ev
			}
			ev = sseEvent{}
		case strings.HasPrefix(line, ":"):
			out <- sseEvent{name: ":", data: line}
		case strings.HasPrefix(line, "event: "):
			ev.name = strings.TrimPrefix(line, "event: ")
		case strings.HasPrefix(line, "data: "):
			ev.data += strings.TrimPrefix(line, "data: ")
		}
	}
}

func TestEvents(t *testing.T) {
	leakcheck.Check(t)
	e := start(t, Options{Heartbeat: 5 * time.Millisecond})
	e.putChestClinic(t)
	id := decode[map[string]any](t, e.do(t, "POST", "/v1/jobs", `{"model": "chest-clinic"}`))["id"].(string)

	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	req, _ := http.NewRequestWithContext(ctx, "GET", e.srv.URL+"/v1/jobs/"+id+"/events", nil)
	resp, err := e.client.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	if resp.StatusCode != 200 || resp.Header.Get("Content-Type") != "text/event-stream" {
		t.Fatalf("events: %d %v", resp.StatusCode, resp.Header)
	}
	events := make(chan sseEvent)
	go readEvents(resp.Body, events)
	next := func(skipHeartbeats bool) sseEvent {
		for ev := range events {
			if ev.name == ":" && skipHeartbeats {
				continue
			}
			return ev
		}
		t.Fatal("the stream ended early")
		return sseEvent{}
	}
	state := func(ev sseEvent) string {
		var v map[string]any
		if err := json.Unmarshal([]byte(ev.data), &v); err != nil {
			t.Fatalf("event data %q: %v", ev.data, err)
		}
		if v["id"] != id {
			t.Errorf("event for job %v, want %s", v["id"], id)
		}
		return v["state"].(string)
	}
	if ev := next(true); ev.name != EventUpdate || state(ev) != "queued" {
		t.Fatalf("first event %+v", ev)
	}
	// Nothing changes: heartbeats keep the stream alive.
	if ev := next(false); ev.name != ":" || ev.data != ": heartbeat" {
		t.Fatalf("idle stream sent %+v, want a heartbeat comment", ev)
	}
	if _, err := e.svc.Update(id, func(j *jobs.Job) {
		j.State = jobs.StateRunning
		j.Result = &infer.Result{Method: "exact", Caution: infer.Caution}
	}); err != nil {
		t.Fatal(err)
	}
	if ev := next(true); ev.name != EventUpdate || state(ev) != "running" {
		t.Fatalf("second event %+v", ev)
	}
	if _, err := e.svc.Update(id, func(j *jobs.Job) { j.State = jobs.StateSucceeded }); err != nil {
		t.Fatal(err)
	}
	if ev := next(true); ev.name != EventFinal || state(ev) != "succeeded" {
		t.Fatalf("last event %+v", ev)
	}
	for ev := range events {
		if ev.name != ":" {
			t.Errorf("event after the final one: %+v", ev)
		}
	}
	if n := e.svc.Watchers(id); n != 0 {
		t.Errorf("%d watches still open after the stream ended", n)
	}
	wantError(t, e.do(t, "GET", "/v1/jobs/job-404/events", ""), 404, "NOT_FOUND")

	// HEAD answers the headers of a stream without waiting for the job.
	id2 := decode[map[string]any](t, e.do(t, "POST", "/v1/jobs", `{"model": "chest-clinic"}`))["id"].(string)
	if r := e.do(t, "HEAD", "/v1/jobs/"+id2+"/events", ""); r.status != 200 || r.header.Get("Content-Type") != "text/event-stream" {
		t.Errorf("HEAD events: %d %v", r.status, r.header)
	}
}

// TestEventsClientLeaves: a client that goes away ends the stream and the
// service's watch.
func TestEventsClientLeaves(t *testing.T) {
	leakcheck.Check(t)
	e := start(t, Options{})
	e.putChestClinic(t)
	id := decode[map[string]any](t, e.do(t, "POST", "/v1/jobs", `{"model": "chest-clinic"}`))["id"].(string)
	ctx, cancel := context.WithCancel(context.Background())
	req, _ := http.NewRequestWithContext(ctx, "GET", e.srv.URL+"/v1/jobs/"+id+"/events", nil)
	resp, err := e.client.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	events := make(chan sseEvent)
	go readEvents(resp.Body, events)
	<-events
	cancel()
	resp.Body.Close()
	for range events {
	}
	// The fake closes a watch when its context ends; the leak check above
	// fails the test if the handler's goroutines stay.
}

// slowWriter is a ResponseWriter whose Write blocks while the gate is
// closed, like a client that stopped reading.
type slowWriter struct {
	header  http.Header
	gate    chan struct{} // receives one token per allowed write
	entered chan struct{} // signalled when a Write starts
	mu      sync.Mutex
	events  []string
}

func (w *slowWriter) Header() http.Header { return w.header }
func (w *slowWriter) WriteHeader(int)     {}
func (w *slowWriter) Flush()              {}
func (w *slowWriter) Write(b []byte) (int, error) {
	select {
	case w.entered <- struct{}{}:
	default:
	}
	<-w.gate
	w.mu.Lock()
	w.events = append(w.events, string(b))
	w.mu.Unlock()
	return len(b), nil
}

// TestEventsSlowReader: while the client does not read, the handler keeps
// taking updates and keeps only the newest; afterwards the client gets the
// event that was being written, at most one more, and the final one —
// not the 500 produced meanwhile.
func TestEventsSlowReader(t *testing.T) {
	leakcheck.Check(t)
	svc := fakesvc.New()
	updates := make(chan *jobs.Job)
	svc.WatchFunc = func(context.Context, string) (<-chan *jobs.Job, error) { return updates, nil }
	h := New(svc, Options{Logger: slog.New(slog.DiscardHandler), Heartbeat: time.Hour})
	w := &slowWriter{header: http.Header{}, gate: make(chan struct{}), entered: make(chan struct{}, 1)}
	done := make(chan struct{})
	go func() {
		defer close(done)
		h.ServeHTTP(w, httptest.NewRequest("GET", "/v1/jobs/job-1/events", nil))
	}()
	job := func(n int, st jobs.State) *jobs.Job {
		return &jobs.Job{ID: "job-1", State: st, MergedBlocks: int64(n)}
	}
	push := func(j *jobs.Job) {
		select {
		case updates <- j:
		case <-time.After(20 * time.Second):
			t.Fatalf("the handler stopped taking updates while the client was slow (update %d)", j.MergedBlocks)
		}
	}
	push(job(1, jobs.StateRunning))
	<-w.entered // the handler is blocked writing update 1
	const produced = 500
	for n := 2; n <= produced; n++ {
		push(job(n, jobs.StateRunning))
	}
	push(job(produced+1, jobs.StateSucceeded))
	close(updates)
	for {
		select {
		case w.gate <- struct{}{}:
			continue
		case <-done:
		}
		break
	}
	var merged []int
	for _, ev := range w.events {
		var v struct {
			Job jobInfo `json:"job"`
		}
		data := strings.TrimSpace(ev[strings.Index(ev, "data: ")+len("data: "):])
		if err := json.Unmarshal([]byte(data), &v); err != nil {
			t.Fatalf("event %q: %v", ev, err)
		}
		merged = append(merged, int(v.Job.MergedBlocks))
	}
	if len(merged) < 2 || len(merged) > 3 || merged[0] != 1 || merged[len(merged)-1] != produced+1 {
		t.Fatalf("the client saw %v, want 1, at most one intermediate, then %d", merged, produced+1)
	}
}
