// Package metrics exposes beliefd's Prometheus metrics on a registry passed
// in (never the global one). *Metrics implements jobs.Observer for the
// service and worker events, instruments HTTP handlers and gRPC servers,
// and reports jobs by state and queue depth from the store at scrape time.
//
// Metrics (labels come from small fixed sets; never job or model IDs):
//
//	beliefd_samples_drawn_total{method}             counter
//	beliefd_sample_rate{method}                     gauge: samples per second over the last 10 full seconds
//	beliefd_jobs{state}                             gauge: queued and running jobs, asked from the store
//	beliefd_queue_depth                             gauge: unfinished (queued + running) jobs
//	beliefd_jobs_submitted_total{method}            counter
//	beliefd_jobs_finished_total{method,state}       counter
//	beliefd_job_duration_seconds{method}            histogram: creation to terminal state
//	beliefd_block_duration_seconds{method,outcome}  histogram
//	beliefd_final_relative_half_width{method}       histogram: widest half-width / estimate at the end
//	beliefd_effective_sample_ratio{method}          histogram: effective / drawn samples at the end
//	beliefd_http_requests_total{route,code}         counter; route is the ServeMux pattern
//	beliefd_http_request_duration_seconds{route}    histogram
//	beliefd_grpc_requests_total{method,code}        counter; method is the full gRPC method
//	beliefd_grpc_request_duration_seconds{method}   histogram
//
// plus the Go runtime and process collectors. NewStanding (standing.go)
// adds the gauges of standing queries, labelled by standing query: the
// one exception to fixed label sets, bounded by the cap on their number.
//
// Sample rate: beliefd_sample_rate is a gauge over a rolling window of the
// last 10 whole seconds of this process (fewer just after start), for a
// quick look without a query language. For dashboards and alerts prefer
// rate(beliefd_samples_drawn_total[1m]), which sums correctly across
// processes and survives missed scrapes.
package metrics

import (
	"context"
	"fmt"
	"log/slog"
	"math"
	"net/http"
	"slices"
	"strconv"
	"time"

	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"github.com/prometheus/client_golang/prometheus/promhttp"
)

// Other is the label value for a method, state or outcome outside the known set.
const Other = "other"

// Label value sets.
var (
	methods  = []string{infer.MethodExact, infer.MethodForward, infer.MethodRejection, infer.MethodLikelihoodWeighting, infer.MethodGibbs, infer.MethodAdaptive}
	states   = []string{string(jobs.StateQueued), string(jobs.StateRunning), string(jobs.StateSucceeded), string(jobs.StateFailed), string(jobs.StateCancelled)}
	outcomes = []string{"committed", "lost_lease", "cancelled", "error"}
)

func known(set []string, v string) string {
	if slices.Contains(set, v) {
		return v
	}
	return Other
}

// Options configure New. Zero values take the documented defaults.
type Options struct {
	// Unfinished reports the queued and running jobs (a Store's Unfinished
	// method); nil leaves out beliefd_jobs and beliefd_queue_depth.
	Unfinished func(ctx context.Context) (queued, running int, err error)
	// CollectTimeout bounds Unfinished during a scrape; default 2s.
	CollectTimeout time.Duration
	// Logger receives failures to collect; default slog.Default().
	Logger *slog.Logger
	// Clock is the clock of the sample-rate window; default time.Now.
	Clock func() time.Time
	// NoRuntime leaves out the Go and process collectors (when the
	// registry has them already).
	NoRuntime bool
}

// Metrics holds beliefd's metrics. It is safe for concurrent use.
type Metrics struct {
	samples      *prometheus.CounterVec
	submitted    *prometheus.CounterVec
	finished     *prometheus.CounterVec
	jobDuration  *prometheus.HistogramVec
	block        *prometheus.HistogramVec
	relHalfWidth *prometheus.HistogramVec
	essRatio     *prometheus.HistogramVec
	httpRequests *prometheus.CounterVec
	httpDuration *prometheus.HistogramVec
	grpcRequests *prometheus.CounterVec
	grpcDuration *prometheus.HistogramVec
	rate         *rateWindow
	clock        func() time.Time
}

var _ jobs.Observer = (*Metrics)(nil)

// New creates the metrics and registers them on reg.
func New(reg prometheus.Registerer, opts Options) (*Metrics, error) {
	if reg == nil {
		return nil, fmt.Errorf("metrics: no registerer")
	}
	if opts.CollectTimeout <= 0 {
		opts.CollectTimeout = 2 * time.Second
	}
	if opts.Logger == nil {
		opts.Logger = slog.Default()
	}
	if opts.Clock == nil {
		opts.Clock = time.Now
	}
	m := &Metrics{
		samples: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "beliefd_samples_drawn_total", Help: "Samples drawn by the samplers of this process.",
		}, []string{"method"}),
		submitted: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "beliefd_jobs_submitted_total", Help: "Jobs created through this process.",
		}, []string{"method"}),
		finished: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "beliefd_jobs_finished_total", Help: "Jobs that reached a terminal state in this process.",
		}, []string{"method", "state"}),
		jobDuration: prometheus.NewHistogramVec(prometheus.HistogramOpts{
			Name: "beliefd_job_duration_seconds", Help: "Time from job creation to its terminal state.",
			Buckets: prometheus.ExponentialBuckets(0.01, 4, 10),
		}, []string{"method"}),
		block: prometheus.NewHistogramVec(prometheus.HistogramOpts{
			Name: "beliefd_block_duration_seconds", Help: "Time to run one block of samples (or one single-unit job), by outcome.",
			Buckets: prometheus.ExponentialBuckets(0.001, 4, 10),
		}, []string{"method", "outcome"}),
		relHalfWidth: prometheus.NewHistogramVec(prometheus.HistogramOpts{
			Name: "beliefd_final_relative_half_width", Help: "Widest interval half-width relative to its estimate when a sampling job ends.",
			Buckets: prometheus.ExponentialBuckets(0.001, 2, 11),
		}, []string{"method"}),
		essRatio: prometheus.NewHistogramVec(prometheus.HistogramOpts{
			Name: "beliefd_effective_sample_ratio", Help: "Effective samples per sample drawn when a sampling job ends.",
			Buckets: prometheus.LinearBuckets(0.1, 0.1, 10),
		}, []string{"method"}),
		httpRequests: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "beliefd_http_requests_total", Help: "HTTP requests by route pattern and status code.",
		}, []string{"route", "code"}),
		httpDuration: prometheus.NewHistogramVec(prometheus.HistogramOpts{
			Name: "beliefd_http_request_duration_seconds", Help: "HTTP request duration by route pattern (event streams last as long as the job).",
			Buckets: prometheus.DefBuckets,
		}, []string{"route"}),
		grpcRequests: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "beliefd_grpc_requests_total", Help: "gRPC requests by full method and status code.",
		}, []string{"method", "code"}),
		grpcDuration: prometheus.NewHistogramVec(prometheus.HistogramOpts{
			Name: "beliefd_grpc_request_duration_seconds", Help: "gRPC request duration by full method (streams last as long as the job).",
			Buckets: prometheus.DefBuckets,
		}, []string{"method"}),
		rate:  newRateWindow(rateWindowSeconds, opts.Clock()),
		clock: opts.Clock,
	}
	cs := []prometheus.Collector{
		m.samples, m.submitted, m.finished, m.jobDuration, m.block, m.relHalfWidth, m.essRatio,
		m.httpRequests, m.httpDuration, m.grpcRequests, m.grpcDuration,
		&stateCollector{m: m, unfinished: opts.Unfinished, timeout: opts.CollectTimeout, log: opts.Logger},
	}
	if !opts.NoRuntime {
		cs = append(cs, collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}))
	}
	for _, c := range cs {
		if err := reg.Register(c); err != nil {
			return nil, fmt.Errorf("metrics: register: %w", err)
		}
	}
	return m, nil
}

// Handler serves the metrics of g in the Prometheus exposition format.
func Handler(g prometheus.Gatherer) http.Handler {
	return promhttp.HandlerFor(g, promhttp.HandlerOpts{ErrorHandling: promhttp.ContinueOnError})
}

// SamplesDrawn implements jobs.Observer.
func (m *Metrics) SamplesDrawn(method string, n int64) {
	if n <= 0 {
		return
	}
	method = known(methods, method)
	m.samples.WithLabelValues(method).Add(float64(n))
	m.rate.add(method, n, m.clock())
}

// BlockDone implements jobs.Observer.
func (m *Metrics) BlockDone(method, outcome string, d time.Duration) {
	m.block.WithLabelValues(known(methods, method), known(outcomes, outcome)).Observe(d.Seconds())
}

// JobSubmitted implements jobs.Observer.
func (m *Metrics) JobSubmitted(method string) {
	m.submitted.WithLabelValues(known(methods, method)).Inc()
}

// JobFinished implements jobs.Observer. NaN (or infinite) accuracy figures
// are not observed.
func (m *Metrics) JobFinished(method string, state jobs.State, d time.Duration, relHalfWidth, essRatio float64) {
	method = known(methods, method)
	m.finished.WithLabelValues(method, known(states, string(state))).Inc()
	m.jobDuration.WithLabelValues(method).Observe(d.Seconds())
	if !math.IsNaN(relHalfWidth) && !math.IsInf(relHalfWidth, 0) {
		m.relHalfWidth.WithLabelValues(method).Observe(relHalfWidth)
	}
	if !math.IsNaN(essRatio) && !math.IsInf(essRatio, 0) {
		m.essRatio.WithLabelValues(method).Observe(essRatio)
	}
}

// stateCollector asks the store for jobs by state at scrape time and
// reports the sample rate of the rolling window.
type stateCollector struct {
	m          *Metrics
	unfinished func(ctx context.Context) (int, int, error)
	timeout    time.Duration
	log        *slog.Logger
}

var (
	jobsDesc       = prometheus.NewDesc("beliefd_jobs", "Unfinished jobs by state, as the job store counts them.", []string{"state"}, nil)
	queueDepthDesc = prometheus.NewDesc("beliefd_queue_depth", "Unfinished (queued and running) jobs, as the job store counts them.", nil, nil)
	sampleRateDesc = prometheus.NewDesc("beliefd_sample_rate", "Samples drawn per second by this process over the last 10 whole seconds.", []string{"method"}, nil)
)

func (c *stateCollector) Describe(ch chan<- *prometheus.Desc) {
	if c.unfinished != nil {
		ch <- jobsDesc
		ch <- queueDepthDesc
	}
	ch <- sampleRateDesc
}

func (c *stateCollector) Collect(ch chan<- prometheus.Metric) {
	now := c.m.clock()
	for _, method := range methods {
		ch <- prometheus.MustNewConstMetric(sampleRateDesc, prometheus.GaugeValue, c.m.rate.rate(method, now), method)
	}
	if c.unfinished == nil {
		return
	}
	ctx, cancel := context.WithTimeout(context.Background(), c.timeout)
	defer cancel()
	queued, running, err := c.unfinished(ctx)
	if err != nil {
		// Leave the gauges out of this scrape rather than report a wrong 0.
		c.log.Warn("metrics: counting unfinished jobs", "err", err)
		return
	}
	ch <- prometheus.MustNewConstMetric(jobsDesc, prometheus.GaugeValue, float64(queued), string(jobs.StateQueued))
	ch <- prometheus.MustNewConstMetric(jobsDesc, prometheus.GaugeValue, float64(running), string(jobs.StateRunning))
	ch <- prometheus.MustNewConstMetric(queueDepthDesc, prometheus.GaugeValue, float64(queued+running))
}

func code(c int) string { return strconv.Itoa(c) }
