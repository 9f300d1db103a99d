package api_test

import (
	"bufio"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math"
	"net"
	"net/http"
	"os"
	"os/exec"
	"runtime"
	"slices"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/beliefd/beliefd/api/httpapi"
	"github.com/beliefd/beliefd/api/metrics"
	"github.com/beliefd/beliefd/service/examples"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/jobs/memstore"
	"github.com/beliefd/beliefd/service/sampling"
	"github.com/beliefd/beliefd/worker"
	"github.com/beliefd/beliefd/worker/redisstore"
	"github.com/beliefd/beliefd/worker/redisstore/redistest"
)

// Service benchmarks: a real beliefd server (jobs.Service, worker.Pool,
// the HTTP API with metrics, wired as `beliefd serve` wires them) on a
// loopback port, driven over HTTP by clients in the same process. The
// "embedded" variants use the in-memory store, the "redis" variants
// worker/redisstore against a private redis-server (append-only file on, as
// deploy/ runs it). Every benchmark is bounded in time and in requests.
//
//	go test -run '^$' -bench . ./api/
//
// DEVELOPERS.md ("Service benchmarks") has the measured numbers and the
// targets they are compared with.

const (
	// benchModel is the example model every benchmark queries.
	benchModel = "tarnwick-platform"
	// pollClients is the number of concurrent keep-alive clients of the
	// poll storm, pollStorm how long one phase of it lasts and
	// pollPacedRate the polls per second its paced phase offers.
	pollClients   = 32
	pollStorm     = 3 * time.Second
	pollPacedRate = 1000
	// pollMaxPerClient bounds the requests of one client in one storm.
	pollMaxPerClient = 200_000
	// throughputBlocks is the sample budget of the throughput benchmark in
	// blocks: about 3.1 million likelihood-weighting samples of the
	// example, about 1 s in infer.Runner and 2 s through the service on
	// 2 cores.
	throughputBlocks = 384
	// benchWait bounds the wait for one job or request.
	benchWait = 2 * time.Minute
)

// exactQuery is a small exact query: two alarms firing, four targets
// (the README's first query). The seed is fixed so that the job's result
// and the synchronous one can be compared whole.
const exactQuery = `{"model": "tarnwick-platform", "method": "exact", "seed": 1,
 "evidence": {"alarm_checkout_5xx": "firing", "alarm_synthetic_checkout": "firing"},
 "targets": ["checkout_api", "bad_deploy", "orders_db", "core_network"]}`

// benchServer is one running server and a client for it.
type benchServer struct {
	url    string
	client *http.Client
}

// benchBackends are the store variants of the service benchmarks.
var benchBackends = []string{"embedded", "redis"}

// startBenchServer starts a server on 127.0.0.1 over the named backend,
// with a worker pool of the given size (0: none), and stores the example
// model. Everything stops when the benchmark ends.
func startBenchServer(b *testing.B, backend string, workers int) *benchServer {
	b.Helper()
	log := slog.New(slog.DiscardHandler)
	ctx := context.Background()
	var store jobs.Store
	switch backend {
	case "embedded":
		store = memstore.New(memstore.Options{})
	case "redis":
		if !haveRedisServer() {
			b.Skip("redis variant skipped: no redis-server binary in PATH or /usr/bin, /usr/local/bin (install redis-server to measure it)")
		}
		srv := redistest.StartServer(b, redistest.Options{AppendOnly: true})
		st, err := redisstore.New(ctx, srv.URL(), redisstore.Options{Logger: log})
		if err != nil {
			b.Fatalf("open redis store: %v", err)
		}
		store = st
	default:
		b.Fatalf("unknown backend %q", backend)
	}
	b.Cleanup(func() { store.Close() })

	reg := prometheus.NewRegistry()
	m, err := metrics.New(reg, metrics.Options{Unfinished: store.Unfinished, Logger: log})
	if err != nil {
		b.Fatal(err)
	}
	svc, err := jobs.NewService(store, jobs.Config{Logger: log}, m)
	if err != nil {
		b.Fatal(err)
	}
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		b.Fatal(err)
	}
	hs := &http.Server{
		Handler:           httpapi.New(svc, httpapi.Options{Logger: log, Metrics: m, MetricsHandler: metrics.Handler(reg)}),
		ReadHeaderTimeout: 10 * time.Second,
		ReadTimeout:       time.Minute,
		IdleTimeout:       2 * time.Minute,
	}
	served := make(chan struct{})
	go func() { defer close(served); _ = hs.Serve(ln) }()
	s := &benchServer{
		url: "http://" + ln.Addr().String(),
		client: &http.Client{Transport: &http.Transport{
			Proxy:               nil, // loopback only
			MaxIdleConns:        4 * pollClients,
			MaxIdleConnsPerHost: 4 * pollClients,
			IdleConnTimeout:     time.Minute,
		}},
	}
	b.Cleanup(func() {
		s.client.CloseIdleConnections()
		_ = hs.Close()
		<-served
	})

	if workers > 0 {
		pool, err := worker.NewPool(svc, store, worker.Config{Workers: workers, Logger: log})
		if err != nil {
			b.Fatal(err)
		}
		poolCtx, stop := context.WithCancel(ctx)
		done := make(chan error, 1)
		go func() { done <- pool.Run(poolCtx) }()
		b.Cleanup(func() {
			stop()
			if err := <-done; err != nil && !errors.Is(err, context.Canceled) {
				b.Errorf("worker pool: %v", err)
			}
		})
	}

	raw, err := examples.Raw(benchModel)
	if err != nil {
		b.Fatal(err)
	}
	if code, body := s.do(b, "POST", "/v1/models", string(raw)); code != http.StatusCreated {
		b.Fatalf("store model: %d %s", code, body)
	}
	return s
}

// haveRedisServer reports whether a redis-server binary can be found where
// redistest looks for one.
func haveRedisServer() bool {
	if _, err := exec.LookPath("redis-server"); err == nil {
		return true
	}
	for _, p := range []string{"/usr/bin/redis-server", "/usr/local/bin/redis-server"} {
		if fi, err := os.Stat(p); err == nil && !fi.IsDir() {
			return true
		}
	}
	return false
}

// do sends one request and reads the whole response.
func (s *benchServer) do(tb testing.TB, method, path, body string) (int, []byte) {
	tb.Helper()
	code, b, err := s.send(method, path, body)
	if err != nil {
		tb.Fatal(err)
	}
	return code, b
}

// send is do without the testing.TB, for client goroutines.
func (s *benchServer) send(method, path, body string) (int, []byte, error) {
	ctx, cancel := context.WithTimeout(context.Background(), benchWait)
	defer cancel()
	var r io.Reader
	if body != "" {
		r = strings.NewReader(body)
	}
	req, err := http.NewRequestWithContext(ctx, method, s.url+path, r)
	if err != nil {
		return 0, nil, err
	}
	resp, err := s.client.Do(req)
	if err != nil {
		return 0, nil, fmt.Errorf("%s %s: %w", method, path, err)
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	if err != nil {
		return 0, nil, fmt.Errorf("%s %s: read body: %w", method, path, err)
	}
	return resp.StatusCode, b, nil
}

// benchView is the part of a job view the benchmarks read.
type benchView struct {
	ID string `json:"id"`
	infer.Result
}

// submit posts a query as a job and returns its ID.
func (s *benchServer) submit(b *testing.B, query string) string {
	b.Helper()
	code, body := s.do(b, "POST", "/v1/jobs", query)
	if code != http.StatusAccepted {
		b.Fatalf("submit: %d %s", code, body)
	}
	var v benchView
	if err := json.Unmarshal(body, &v); err != nil || v.ID == "" {
		b.Fatalf("submit: no job ID in %s (%v)", body, err)
	}
	return v.ID
}

// follow reads the job's event stream until its final event. It returns
// the final job view, when the first view with marginals arrived and when
// the final one did.
func (s *benchServer) follow(b *testing.B, id string) (final *benchView, firstResult, done time.Time) {
	b.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), benchWait)
	defer cancel()
	req, err := http.NewRequestWithContext(ctx, "GET", s.url+"/v1/jobs/"+id+"/events", nil)
	if err != nil {
		b.Fatal(err)
	}
	resp, err := s.client.Do(req)
	if err != nil {
		b.Fatalf("events of job %s: %v", id, err)
	}
	defer resp.Body.Close()
	if resp.StatusCode != http.StatusOK {
		body, _ := io.ReadAll(resp.Body)
		b.Fatalf("events of job %s: %d %s", id, resp.StatusCode, body)
	}
	sc := bufio.NewScanner(resp.Body)
	sc.Buffer(make([]byte, 1<<20), 1<<20)
	event := ""
	for sc.Scan() {
		line := sc.Text()
		if e, ok := strings.CutPrefix(line, "event: "); ok {
			event = e
			continue
		}
		data, ok := strings.CutPrefix(line, "data: ")
		if !ok {
			continue
		}
		now := time.Now()
		if event == httpapi.EventError {
			b.Fatalf("events of job %s: %s", id, data)
		}
		var v benchView
		if err := json.Unmarshal([]byte(data), &v); err != nil {
			b.Fatalf("events of job %s: %v in %s", id, err, data)
		}
		if firstResult.IsZero() && len(v.Marginals) > 0 {
			firstResult = now
		}
		if event == httpapi.EventFinal {
			if v.State != string(jobs.StateSucceeded) {
				b.Fatalf("job %s ended %s: %s", id, v.State, data)
			}
			return &v, firstResult, now
		}
	}
	b.Fatalf("events of job %s ended without a final event (last event %q, err %v)", id, event, sc.Err())
	return nil, time.Time{}, time.Time{}
}

// waitDone polls a job until it is finished, for set-up.
func (s *benchServer) waitDone(b *testing.B, id string) {
	b.Helper()
	deadline := time.Now().Add(benchWait)
	for time.Now().Before(deadline) {
		code, body := s.do(b, "GET", "/v1/jobs/"+id, "")
		var v benchView
		if err := json.Unmarshal(body, &v); err != nil || code != http.StatusOK {
			b.Fatalf("get job %s: %d %s", id, code, body)
		}
		switch jobs.State(v.State) {
		case jobs.StateSucceeded:
			return
		case jobs.StateFailed, jobs.StateCancelled:
			b.Fatalf("job %s ended %s: %s", id, v.State, body)
		}
		time.Sleep(10 * time.Millisecond)
	}
	b.Fatalf("job %s not done after %v", id, benchWait)
}

// deterministicJSON is the result without what depends on the clock
// (elapsed time) or on where it was read (job state): what the
// determinism contract fixes.
func deterministicJSON(tb testing.TB, r *infer.Result) string {
	tb.Helper()
	c := *r
	c.ElapsedSeconds, c.State = 0, ""
	out, err := json.Marshal(&c)
	if err != nil {
		tb.Fatal(err)
	}
	return string(out)
}

// percentile returns the p-quantile (0 < p <= 1) of ds by the
// nearest-rank method, in milliseconds. ds is sorted in place.
func percentile(ds []time.Duration, p float64) float64 {
	if len(ds) == 0 {
		return math.NaN()
	}
	slices.Sort(ds)
	i := int(math.Ceil(p*float64(len(ds)))) - 1
	i = min(max(i, 0), len(ds)-1)
	return float64(ds[i]) / float64(time.Millisecond)
}

// median returns the median of xs (the lower middle value of an even
// count).
func median(xs []float64) float64 {
	s := slices.Clone(xs)
	slices.Sort(s)
	return s[(len(s)-1)/2]
}

// reportLatency reports the 50th and 99th percentiles and the maximum of
// ds as NAME-p50-ms, NAME-p99-ms and NAME-max-ms.
func reportLatency(b *testing.B, name string, ds []time.Duration) {
	b.Helper()
	b.ReportMetric(percentile(ds, 0.50), name+"-p50-ms")
	b.ReportMetric(percentile(ds, 0.99), name+"-p99-ms")
	b.ReportMetric(percentile(ds, 1), name+"-max-ms")
}

// BenchmarkExactQueryEndToEnd measures, per iteration, one small exact
// job (POST /v1/jobs, then its event stream until the final event) and
// one synchronous POST /v1/query of the same query. It reports the
// percentiles of submit-to-first-result (the first job view with
// marginals; for an exact job that is the final answer), submit-to-done
// and of the synchronous query. Targets: job done p50 under 5 ms
// embedded, under 15 ms with Redis.
func BenchmarkExactQueryEndToEnd(b *testing.B) {
	for _, backend := range benchBackends {
		b.Run(backend, func(b *testing.B) {
			s := startBenchServer(b, backend, runtime.GOMAXPROCS(0))
			var first, done, query []time.Duration
			var lastJob *benchView
			var lastQuery []byte
			one := func() {
				t0 := time.Now()
				id := s.submit(b, exactQuery)
				v, firstAt, doneAt := s.follow(b, id)
				first = append(first, firstAt.Sub(t0))
				done = append(done, doneAt.Sub(t0))
				t1 := time.Now()
				code, body := s.do(b, "POST", "/v1/query", exactQuery)
				query = append(query, time.Since(t1))
				if code != http.StatusOK {
					b.Fatalf("query: %d %s", code, body)
				}
				lastJob, lastQuery = v, body
			}
			for range 10 { // warm-up: connections, caches of compiled models and engines
				one()
			}
			first, done, query = first[:0], done[:0], query[:0]
			for b.Loop() {
				one()
			}
			reportLatency(b, "first-result", first)
			reportLatency(b, "done", done)
			reportLatency(b, "query", query)

			// The job and the synchronous query answer the same.
			var qr infer.Result
			if err := json.Unmarshal(lastQuery, &qr); err != nil {
				b.Fatal(err)
			}
			if g, w := deterministicJSON(b, &lastJob.Result), deterministicJSON(b, &qr); g != w {
				b.Fatalf("exact job and POST /v1/query differ:\n job   %s\n query %s", g, w)
			}
		})
	}
}

// BenchmarkPollStorm measures GET /v1/jobs/{id} of a finished job from
// pollClients concurrent keep-alive clients, in two phases of pollStorm
// each per iteration:
//
//   - saturated: every client polls again as soon as it is answered; this
//     gives the most polls per second the server sustains (polls/s) and
//     the latency at that load (poll-p50-ms, poll-p99-ms), which by
//     Little's law is about pollClients / (polls/s).
//   - paced: the clients together offer pollPacedRate polls per second on
//     a fixed schedule; latency is counted from each poll's scheduled
//     time, so a slow answer also counts against the polls it delays
//     (paced-p50-ms, paced-p99-ms, paced-polls/s achieved).
//
// Target: 1000 polls/s with p99 under 20 ms, that is polls/s >= 1000 and
// paced-p99-ms < 20. bytes/poll is the size of the job view.
func BenchmarkPollStorm(b *testing.B) {
	for _, backend := range benchBackends {
		b.Run(backend, func(b *testing.B) {
			s := startBenchServer(b, backend, runtime.GOMAXPROCS(0))
			// A finished likelihood-weighting job: its view carries every
			// marginal with its interval, the evidence probability and the
			// job metadata.
			id := s.submit(b, `{"model": "tarnwick-platform", "method": "likelihood-weighting",
 "evidence": {"alarm_checkout_5xx": "firing"}, "seed": 7, "stop": {"max_samples": 32768}}`)
			s.waitDone(b, id)
			path := "/v1/jobs/" + id
			code, view := s.do(b, "GET", path, "")
			if code != http.StatusOK {
				b.Fatalf("get job: %d %s", code, view)
			}

			var saturated, paced pollRecord
			s.pollStorm(b, path, 300*time.Millisecond, 0, nil) // warm-up: open the keep-alive connections
			for b.Loop() {
				s.pollStorm(b, path, pollStorm, 0, &saturated)
				s.pollStorm(b, path, pollStorm, pollPacedRate, &paced)
			}
			b.ReportMetric(saturated.rate(), "polls/s")
			reportLatency(b, "poll", saturated.all())
			b.ReportMetric(paced.rate(), "paced-polls/s")
			reportLatency(b, "paced", paced.all())
			b.ReportMetric(float64(len(view)), "bytes/poll")
		})
	}
}

// pollRecord collects the latencies of poll storms, per client.
type pollRecord struct {
	lat     [pollClients][]time.Duration
	elapsed time.Duration
}

func (r *pollRecord) all() []time.Duration {
	var all []time.Duration
	for _, l := range r.lat {
		all = append(all, l...)
	}
	return all
}

func (r *pollRecord) rate() float64 {
	n := 0
	for _, l := range r.lat {
		n += len(l)
	}
	return float64(n) / r.elapsed.Seconds()
}

// pollStorm has pollClients goroutines GET path for d: as fast as they are
// answered when rate is 0, else together rate requests per second on a
// fixed schedule (client c sends its k-th request at start + (k*pollClients
// + c)/rate, or at once when it is behind), latency counted from the
// scheduled time. Clients stop at the end of d (a paced client that fell
// behind sends fewer polls: paced-polls/s below the rate shows it) or
// after pollMaxPerClient requests. rec may be nil (nothing recorded).
func (s *benchServer) pollStorm(b *testing.B, path string, d time.Duration, rate float64, rec *pollRecord) {
	b.Helper()
	var (
		wg       sync.WaitGroup
		firstErr atomic.Pointer[error]
	)
	start := time.Now()
	end := start.Add(d)
	for c := range pollClients {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for k := 0; k < pollMaxPerClient; k++ {
				t0 := time.Now()
				if rate > 0 {
					t0 = start.Add(time.Duration(float64(k*pollClients+c) / rate * float64(time.Second)))
					if wait := time.Until(t0); wait > 0 {
						time.Sleep(wait)
					}
				}
				if !t0.Before(end) || !time.Now().Before(end) {
					return // a paced client that fell behind drops the rest
				}
				code, body, err := s.send("GET", path, "")
				if err == nil && code != http.StatusOK {
					err = fmt.Errorf("get job: %d %s", code, body)
				}
				if err != nil {
					firstErr.CompareAndSwap(nil, &err)
					return
				}
				if rec != nil {
					rec.lat[c] = append(rec.lat[c], time.Since(t0))
				}
			}
		}()
	}
	wg.Wait()
	if p := firstErr.Load(); p != nil {
		b.Fatal(*p)
	}
	if rec != nil {
		rec.elapsed += time.Since(start)
	}
}

// BenchmarkSamplingThroughputInService compares, in the same run, the
// samples per second of a likelihood-weighting job through the service
// (submit over HTTP -> done on its event stream; embedded store, worker
// goroutines = GOMAXPROCS) with infer.Runner.Run of the same query and
// seed in this process, one of each per iteration. It reports the median
// rates, the median and the lowest of the per-iteration ratios (target:
// the service within 10% of the runner, ratio >= 0.9), and the median
// time from submit to the job's first partial result; it fails when the
// two results differ (the determinism contract). Run it several times
// (-benchtime=3x) on a quiet machine: one pair takes about 3 s.
func BenchmarkSamplingThroughputInService(b *testing.B) {
	s := startBenchServer(b, "embedded", runtime.GOMAXPROCS(0))
	seed := uint64(7)
	q := infer.Query{
		Model:    benchModel,
		Method:   infer.MethodLikelihoodWeighting,
		Evidence: map[string]string{"alarm_checkout_5xx": "firing", "alarm_canary": "quiet"},
		Seed:     &seed,
		Stop:     infer.StopRule{MaxSamples: throughputBlocks * sampling.DefaultBlockSize},
	}
	qb, err := json.Marshal(&q)
	if err != nil {
		b.Fatal(err)
	}
	_, net, err := examples.Load(benchModel)
	if err != nil {
		b.Fatal(err)
	}
	runner := infer.NewRunner(infer.Options{})
	ctx := context.Background()

	var (
		svcRates, runRates, ratios []float64
		firstPartial               []time.Duration
		svcRes, runRes             *infer.Result
	)
	runDirect := func() float64 {
		t0 := time.Now()
		r, err := runner.Run(ctx, net, &q, nil)
		if err != nil {
			b.Fatal(err)
		}
		runRes = r
		return float64(r.Samples) / time.Since(t0).Seconds()
	}
	runService := func() float64 {
		t0 := time.Now()
		v, firstAt, doneAt := s.follow(b, s.submit(b, string(qb)))
		firstPartial = append(firstPartial, firstAt.Sub(t0))
		svcRes = &v.Result
		return float64(v.Samples) / doneAt.Sub(t0).Seconds()
	}
	// Each iteration is one pair, in alternating order, so that a slow
	// spell of the machine shows in one ratio rather than biasing one side.
	for i := 0; b.Loop(); i++ {
		var sr, rr float64
		if i%2 == 0 {
			rr = runDirect()
			sr = runService()
		} else {
			sr = runService()
			rr = runDirect()
		}
		svcRates, runRates, ratios = append(svcRates, sr), append(runRates, rr), append(ratios, sr/rr)
		if runRes.Samples != q.Stop.MaxSamples {
			b.Fatalf("runner drew %d samples, want %d", runRes.Samples, q.Stop.MaxSamples)
		}
		if g, w := deterministicJSON(b, svcRes), deterministicJSON(b, runRes); g != w {
			b.Fatalf("service result differs from infer.Runner with the same query and seed:\n service %s\n runner  %s", g, w)
		}
	}
	b.ReportMetric(median(svcRates), "service-samples/s")
	b.ReportMetric(median(runRates), "runner-samples/s")
	b.ReportMetric(median(ratios), "service/runner")
	b.ReportMetric(slices.Min(ratios), "service/runner-min")
	b.ReportMetric(percentile(firstPartial, 0.5), "first-partial-p50-ms")
}
