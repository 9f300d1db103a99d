package metrics

import (
	"fmt"
	"sync"
	"time"

	"github.com/beliefd/beliefd/service/standing"
	"github.com/prometheus/client_golang/prometheus"
)

// Standing exports the latest answers of the registered standing queries
// (service/standing) as gauges, and counts recomputes. Its series are
// bounded: one set per registered standing query (their number is capped
// by the standing service), and one posterior series per state of each
// target it names. A deleted standing query's series go at the next
// scrape. Every process reads the same store, so every process exports
// the same series: alert rules take max() of them, never sum().
//
//	beliefd_standing_queries                                          gauge: standing queries registered
//	beliefd_standing_posterior{tenant,standing_query,variable,state}  gauge: latest estimate
//	beliefd_standing_posterior_lower{...}                             gauge: its interval's lower end (= estimate when exact)
//	beliefd_standing_posterior_upper{...}                             gauge: its interval's upper end (= estimate when exact)
//	beliefd_standing_evidence_revision{tenant,standing_query}         gauge: current evidence revision
//	beliefd_standing_result_revision{tenant,standing_query}           gauge: evidence revision the latest result answers
//	beliefd_standing_result_age_seconds{tenant,standing_query}        gauge: time since the latest result was computed
//	beliefd_standing_result_samples{tenant,standing_query}            gauge: samples behind it (0 when exact)
//	beliefd_standing_result_effective_samples{tenant,standing_query}  gauge: its effective sample size (0 when exact)
//	beliefd_standing_failing{tenant,standing_query}                   gauge: 1 while the current revision's recompute has failed
//	beliefd_standing_recomputes_total{outcome}                        counter: recomputes of this process (kept, superseded, failed)
//	beliefd_standing_recompute_duration_seconds                       histogram
//
// The posterior and result gauges appear once a standing query has a result.
type Standing struct {
	mu       sync.Mutex
	snapshot func() []*standing.View
	clock    func() time.Time

	recomputes *prometheus.CounterVec
	duration   prometheus.Histogram
}

var _ standing.Observer = (*Standing)(nil)

// StandingOptions configure NewStanding.
type StandingOptions struct {
	// Clock is the time source of the result age; default time.Now.
	Clock func() time.Time
}

var (
	standingQueriesDesc = prometheus.NewDesc("beliefd_standing_queries",
		"Standing queries registered (all tenants), as this process last read them.", nil, nil)
	posteriorLabels   = []string{"tenant", "standing_query", "variable", "state"}
	standingLabels    = []string{"tenant", "standing_query"}
	standingPosterior = prometheus.NewDesc("beliefd_standing_posterior",
		"Latest posterior probability of a target state of a standing query, given its evidence.", posteriorLabels, nil)
	standingLower = prometheus.NewDesc("beliefd_standing_posterior_lower",
		"Lower end of the confidence interval of beliefd_standing_posterior (equal to it for exact results).", posteriorLabels, nil)
	standingUpper = prometheus.NewDesc("beliefd_standing_posterior_upper",
		"Upper end of the confidence interval of beliefd_standing_posterior (equal to it for exact results).", posteriorLabels, nil)
	standingEvidenceRev = prometheus.NewDesc("beliefd_standing_evidence_revision",
		"Current evidence revision of a standing query; it goes up by one with every change.", standingLabels, nil)
	standingResultRev = prometheus.NewDesc("beliefd_standing_result_revision",
		"Evidence revision that the latest result of a standing query answers.", standingLabels, nil)
	standingAge = prometheus.NewDesc("beliefd_standing_result_age_seconds",
		"Seconds since the latest result of a standing query was computed.", standingLabels, nil)
	standingSamples = prometheus.NewDesc("beliefd_standing_result_samples",
		"Samples behind the latest result of a standing query (0 for exact inference).", standingLabels, nil)
	standingESS = prometheus.NewDesc("beliefd_standing_result_effective_samples",
		"Effective sample size of the latest result of a standing query (0 for exact inference).", standingLabels, nil)
	standingFailing = prometheus.NewDesc("beliefd_standing_failing",
		"1 while the recompute of a standing query's current evidence revision has failed, else 0.", standingLabels, nil)
)

// NewStanding creates the standing-query metrics and registers them on
// reg. Call Export with the standing service's Snapshot before the first
// scrape; until then only the recompute metrics are exported.
func NewStanding(reg prometheus.Registerer, opts StandingOptions) (*Standing, error) {
	if reg == nil {
		return nil, fmt.Errorf("metrics: no registerer")
	}
	if opts.Clock == nil {
		opts.Clock = time.Now
	}
	s := &Standing{
		clock: opts.Clock,
		recomputes: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "beliefd_standing_recomputes_total", Help: "Standing-query recomputes done by this process, by outcome.",
		}, []string{"outcome"}),
		duration: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name: "beliefd_standing_recompute_duration_seconds", Help: "Time a standing-query recompute of this process took.",
			Buckets: prometheus.ExponentialBuckets(0.0005, 4, 10),
		}),
	}
	for _, o := range []string{standing.OutcomeKept, standing.OutcomeSuperseded, standing.OutcomeFailed} {
		s.recomputes.WithLabelValues(o)
	}
	for _, c := range []prometheus.Collector{s.recomputes, s.duration, s} {
		if err := reg.Register(c); err != nil {
			return nil, fmt.Errorf("metrics: register standing-query metrics: %w", err)
		}
	}
	return s, nil
}

// Export sets where the gauges come from: the standing service's Snapshot.
func (s *Standing) Export(snapshot func() []*standing.View) {
	s.mu.Lock()
	s.snapshot = snapshot
	s.mu.Unlock()
}

// Recomputed implements standing.Observer.
func (s *Standing) Recomputed(outcome string, d time.Duration) {
	s.recomputes.WithLabelValues(known([]string{standing.OutcomeKept, standing.OutcomeSuperseded, standing.OutcomeFailed}, outcome)).Inc()
	s.duration.Observe(d.Seconds())
}

// Describe implements prometheus.Collector.
func (s *Standing) Describe(ch chan<- *prometheus.Desc) {
	for _, d := range []*prometheus.Desc{standingQueriesDesc, standingPosterior, standingLower, standingUpper, standingEvidenceRev,
		standingResultRev, standingAge, standingSamples, standingESS, standingFailing} {
		ch <- d
	}
}

// Collect implements prometheus.Collector.
func (s *Standing) Collect(ch chan<- prometheus.Metric) {
	s.mu.Lock()
	snapshot := s.snapshot
	s.mu.Unlock()
	if snapshot == nil {
		return
	}
	views := snapshot()
	now := s.clock()
	gauge := func(d *prometheus.Desc, v float64, labels ...string) {
		ch <- prometheus.MustNewConstMetric(d, prometheus.GaugeValue, v, labels...)
	}
	gauge(standingQueriesDesc, float64(len(views)))
	for _, v := range views {
		failing := 0.0
		if v.Status == standing.StatusFailed {
			failing = 1
		}
		gauge(standingEvidenceRev, float64(v.Revision), v.Tenant, v.ID)
		gauge(standingFailing, failing, v.Tenant, v.ID)
		r := v.Result
		if r == nil {
			continue
		}
		gauge(standingResultRev, float64(v.ResultRevision), v.Tenant, v.ID)
		gauge(standingAge, max(now.Sub(v.ResultAt).Seconds(), 0), v.Tenant, v.ID)
		gauge(standingSamples, float64(r.Samples), v.Tenant, v.ID)
		gauge(standingESS, r.EffectiveSamples, v.Tenant, v.ID)
		// Only the targets the standing query names, and their states.
		for _, target := range v.Targets {
			for state, iv := range r.Marginals[target] {
				gauge(standingPosterior, iv.P, v.Tenant, v.ID, target, state)
				gauge(standingLower, iv.Lo, v.Tenant, v.ID, target, state)
				gauge(standingUpper, iv.Hi, v.Tenant, v.ID, target, state)
			}
		}
	}
}
