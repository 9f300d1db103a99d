package httpapi_test

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"net/url"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/beliefd/beliefd/api/errmap"
	"github.com/beliefd/beliefd/api/httpapi"
	"github.com/beliefd/beliefd/api/internal/apitest"
	"github.com/beliefd/beliefd/api/internal/fakesvc"
	"github.com/beliefd/beliefd/api/metrics"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/jobs/memstore"
	"github.com/beliefd/beliefd/service/model"
	"github.com/prometheus/client_golang/prometheus"
)

// fuzzRoutes are the path templates the fuzzer picks from; %s takes the
// fuzzed parameter (path-escaped), and the last one is a raw path.
var fuzzRoutes = []string{
	"/v1/models", "/v1/models/%s", "/v1/jobs", "/v1/jobs/%s", "/v1/jobs/%s/events", "/v1/jobs/%s/cancel",
	"/v1/query", "/healthz", "/readyz", "/metrics", "/%s",
}

// Fuzzed requests choose their server with mode % 8: the real job service
// on the memory store for 0-3, and for 4-7 a fake whose every call fails
// with injectedErrs[mode-4].
var injectedErrs = []error{fakesvc.ErrInjected, jobs.ErrUnavailable, context.DeadlineExceeded, jobs.ErrQueueFull}

// hangTimeout bounds each fuzzed request. It detects hangs; it does not
// measure speed (the slowest legitimate request is a query under the
// server's MaxQueryTimeout of 1s).
const hangTimeout = 20 * time.Second

// streamRead is how long an event stream is read before the client leaves.
const streamRead = 200 * time.Millisecond

// fuzzErrorBody is the error shape of api/doc.go.
type fuzzErrorBody struct {
	Error struct {
		Status          int               `json:"status"`
		Code            string            `json:"code"`
		Reason          string            `json:"reason"`
		Message         string            `json:"message"`
		FieldViolations []json.RawMessage `json:"field_violations"`
	} `json:"error"`
}

// FuzzHTTPHandlers sends fuzzed requests (method, route, path parameter,
// query string, body) to the HTTP API over loopback. Served by the real
// service, no request may get a 5xx; served by a fake that injects an
// error, the only 5xx allowed is the one the injected error maps to,
// without its detail. Every error is the documented JSON shape, every JSON
// answer is valid JSON, every event on a stream is a JSON line, and no
// request hangs.
//
//	go test -run '^$' -fuzz '^FuzzHTTPHandlers$' -fuzztime 30s ./api/httpapi/
func FuzzHTTPHandlers(f *testing.F) {
	chest := []byte(apitest.ChestClinic)
	query := []byte(`{"model": "chest-clinic", "evidence": {"xray": "yes"}, "targets": ["tub"], "method": "likelihood-weighting", "seed": 3, "stop": {"max_samples": 20000}}`)
	seeds := []struct {
		route                uint8
		method, param, query string
		body                 []byte
		mode                 uint8
	}{
		{0, "POST", "", "", chest, 0},
		{0, "POST", "", "", []byte(apitest.BadRows), 0},
		{0, "POST", "", "", []byte(`{"name": "x", "variables": [{"name": "a", "states": ["ok", "failed"], "parents": ["a"], "gate": {"type": "any_of"}}]}`), 0},
		{0, "GET", "", "page_size=1&page_token=", nil, 0},
		{0, "PUT", "", "", chest, 0},
		{1, "GET", "chest-clinic", "version=1", nil, 0},
		{1, "GET", "chest-clinic@1", "", nil, 1},
		{1, "HEAD", "chest-clinic", "", nil, 0},
		{1, "DELETE", "no-such-model", "", nil, 0},
		{1, "DELETE", "chest-clinic@1", "", nil, 0},
		{2, "POST", "", "", query, 0},
		{2, "POST", "", "", []byte(`{"model": "chest-clinic", "stop": {"confidence": 1.5}}`), 2},
		{2, "GET", "", "page_size=-1", nil, 0},
		{2, "GET", "", "page_token=%%%", nil, 0},
		{3, "GET", "jnosuchjob", "", nil, 0},
		{4, "GET", "jnosuchjob", "", nil, 0},
		{5, "POST", "jnosuchjob", "", nil, 0},
		{6, "POST", "", "timeout=100ms", query, 0},
		{6, "POST", "", "timeout=-1s", []byte(`{"model": "chest-clinic", "method": "exact"}`), 0},
		{6, "POST", "", "", []byte(`{"model": "chest-clinic", "evidence": {"tub": "yes", "either": "no"}}`), 3},
		{7, "GET", "", "", nil, 0},
		{8, "GET", "", "", nil, 0},
		{9, "GET", "", "", nil, 0},
		{10, "GET", "v2/models", "", nil, 0},
		{10, "OPTIONS", "v1/models", "", nil, 0},
		{0, "POST", "", "", chest, 4},
		{2, "POST", "", "", query, 5},
		{4, "GET", "job-1", "", nil, 6},
		{2, "POST", "", "", query, 7},
		{8, "GET", "", "", nil, 5},
	}
	for _, s := range seeds {
		f.Add(s.route, s.method, s.param, s.query, s.body, s.mode)
	}

	realURL := fuzzRealServer(f)
	fakeURL, inject := fuzzFakeServer(f)
	client := &http.Client{CheckRedirect: func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }}
	f.Cleanup(client.CloseIdleConnections)

	f.Fuzz(func(t *testing.T, route uint8, method, param, rawQuery string, body []byte, mode uint8) {
		if !validMethod(method) {
			return
		}
		tpl := fuzzRoutes[int(route)%len(fuzzRoutes)]
		path := tpl
		if strings.Contains(tpl, "%s") {
			if tpl == "/%s" {
				path = "/" + param
			} else {
				path = fmt.Sprintf(tpl, url.PathEscape(param))
			}
		}
		base, injected := realURL, error(nil)
		if m := mode % 8; m >= 4 {
			base, injected = fakeURL, injectedErrs[m-4]
		}
		u, err := url.Parse(base)
		if err != nil {
			t.Fatal(err)
		}
		u.Path, u.RawQuery = path, escapeQuery(rawQuery)

		ctx, cancel := context.WithTimeout(context.Background(), hangTimeout)
		defer cancel()
		req, err := http.NewRequestWithContext(ctx, method, u.String(), bytes.NewReader(body))
		if err != nil {
			return // not a request a client can send
		}
		inject(injected)
		resp, err := client.Do(req)
		if err != nil {
			if errors.Is(err, context.DeadlineExceeded) {
				t.Fatalf("%s %s: no answer within %s", method, u.RequestURI(), hangTimeout)
			}
			t.Fatalf("%s %s: %v", method, u.RequestURI(), err)
		}
		defer resp.Body.Close()
		ct := resp.Header.Get("Content-Type")
		var data []byte
		if ct == "text/event-stream" && resp.StatusCode == http.StatusOK {
			// A stream of an unfinished job lasts as long as the job: read a
			// little of it, then leave.
			stop := time.AfterFunc(streamRead, cancel)
			defer stop.Stop()
			checkStream(t, resp.Body)
			return
		}
		if data, err = io.ReadAll(resp.Body); err != nil {
			t.Fatalf("%s %s: reading the body: %v", method, u.RequestURI(), err)
		}

		st := resp.StatusCode
		if st >= 500 {
			allowed := injected != nil && st == errmap.Map(injected).HTTPStatus ||
				injected != nil && path == "/readyz" && st == http.StatusServiceUnavailable
			if !allowed {
				t.Fatalf("%s %s (injected %v): status %d: %.500s", method, u.RequestURI(), injected, st, data)
			}
		}
		if method == http.MethodHead {
			if len(data) != 0 {
				t.Errorf("HEAD answered with a body of %d bytes", len(data))
			}
			return
		}
		if st >= 300 && st < 400 {
			return // the mux's redirect to a clean path
		}
		if st >= 400 {
			checkErrorBody(t, st, ct, data)
			return
		}
		if strings.HasPrefix(ct, "application/json") && !json.Valid(data) {
			t.Errorf("%s %s: status %d with invalid JSON: %.500s", method, u.RequestURI(), st, data)
		}
	})
}

// checkErrorBody checks the one error shape: a JSON object whose status
// repeats the HTTP status, with a code, a reason, a message (not leaking an
// injected failure's detail) and a field_violations list.
func checkErrorBody(t *testing.T, status int, ct string, data []byte) {
	t.Helper()
	if ct != "application/json" {
		t.Fatalf("status %d with Content-Type %q: %.500s", status, ct, data)
	}
	var e fuzzErrorBody
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&e); err != nil {
		t.Fatalf("status %d: not the error shape (%v): %.500s", status, err, data)
	}
	d := e.Error
	if d.Status != status || d.Code == "" || d.Code == "OK" || d.Reason == "" || d.Message == "" || d.FieldViolations == nil {
		t.Errorf("status %d: error %+v", status, d)
	}
	if strings.Contains(d.Message, "secret detail") {
		t.Errorf("status %d: the message leaks an internal error: %q", status, d.Message)
	}
}

// checkStream reads events until the stream ends or the client leaves:
// every data line is one JSON value.
func checkStream(t *testing.T, r io.Reader) {
	t.Helper()
	sc := bufio.NewScanner(r)
	sc.Buffer(make([]byte, 1<<20), 1<<20)
	for sc.Scan() {
		line := sc.Text()
		if d, ok := strings.CutPrefix(line, "data: "); ok && !json.Valid([]byte(d)) {
			t.Errorf("event data is not JSON: %.500s", d)
		}
	}
}

// validMethod accepts the methods a client can send: an HTTP token of
// reasonable length (CONNECT is a tunnel, not a request to a route).
func validMethod(m string) bool {
	if m == "" || len(m) > 16 || m == http.MethodConnect {
		return false
	}
	for _, c := range []byte(m) {
		if !(c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z' || c >= '0' && c <= '9' || strings.IndexByte("!#$%&'*+-.^_`|~", c) >= 0) {
			return false
		}
	}
	return true
}

// escapeQuery percent-escapes the bytes that cannot appear in a request
// line's query, keeping the rest as fuzzed.
func escapeQuery(q string) string {
	var b strings.Builder
	for _, c := range []byte(q) {
		if c <= ' ' || c >= 0x7f || c == '#' {
			fmt.Fprintf(&b, "%%%02X", c)
		} else {
			b.WriteByte(c)
		}
	}
	return b.String()
}

// fuzzRealServer serves the job service on the memory store (no workers:
// jobs stay queued) with small limits, so that a fuzzed model or query
// stays cheap: a request body of 64 KiB for models, 16 KiB for queries,
// 2^14 table entries, exact inference up to 2^16 entries, queries of at
// most 1s.
func fuzzRealServer(f *testing.F) string {
	log := slog.New(slog.DiscardHandler)
	store := memstore.New(memstore.Options{})
	svc, err := jobs.NewService(store, jobs.Config{
		Limits:          model.Limits{MaxVariables: 64, MaxStates: 16, MaxParents: 8, MaxTableEntries: 1 << 14},
		ExactMaxEntries: 1 << 16, MaxUnfinished: 200, MaxJobTime: time.Second, Logger: log,
	}, nil)
	if err != nil {
		f.Fatal(err)
	}
	if _, _, err := svc.PutModel(context.Background(), []byte(apitest.ChestClinic)); err != nil {
		f.Fatal(err)
	}
	reg := prometheus.NewRegistry()
	m, err := metrics.New(reg, metrics.Options{Unfinished: store.Unfinished, NoRuntime: true, Logger: log})
	if err != nil {
		f.Fatal(err)
	}
	srv := httptest.NewServer(httpapi.New(svc, httpapi.Options{
		Logger: log, Metrics: m, MetricsHandler: metrics.Handler(reg),
		MaxModelBytes: 64 << 10, MaxQueryBytes: 16 << 10,
		QueryTimeout: 300 * time.Millisecond, MaxQueryTimeout: time.Second, Heartbeat: 50 * time.Millisecond,
	}))
	f.Cleanup(func() {
		srv.Close()
		store.Close()
	})
	return srv.URL
}

// fuzzFakeServer serves the fake service; inject sets the error every call
// of the fake fails with (nil: none).
func fuzzFakeServer(f *testing.F) (string, func(error)) {
	fake := fakesvc.New()
	var (
		mu       sync.Mutex
		injected error
	)
	fake.Fail = func(context.Context, string) error {
		mu.Lock()
		defer mu.Unlock()
		return injected
	}
	srv := httptest.NewServer(httpapi.New(fake, httpapi.Options{Logger: slog.New(slog.DiscardHandler), Heartbeat: 50 * time.Millisecond}))
	f.Cleanup(srv.Close)
	return srv.URL, func(err error) {
		mu.Lock()
		defer mu.Unlock()
		injected = err
	}
}
