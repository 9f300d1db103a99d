package metrics_test

import (
	"context"
	"log/slog"
	"strings"
	"testing"
	"time"

	"github.com/beliefd/beliefd/api/metrics"
	"github.com/beliefd/beliefd/service/examples"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/jobs/memstore"
	"github.com/beliefd/beliefd/service/sampling"
	"github.com/beliefd/beliefd/service/standing"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/testutil"
	dto "github.com/prometheus/client_model/go"
)

// sampled is a view with a sampled result whose marginals also hold a
// variable that is not a target (it must not be exported).
func sampled(now time.Time) *standing.View {
	return &standing.View{
		ID: "checkout-root-cause", Tenant: "teal", Targets: []string{"bad_deploy"}, Revision: 4, Status: standing.StatusUpdating,
		ResultRevision: 3, ResultAt: now.Add(-90 * time.Second),
		Result: &infer.Result{Method: infer.MethodLikelihoodWeighting, Samples: 200_000, EffectiveSamples: 150_000.5,
			Marginals: map[string]map[string]sampling.Interval{
				"bad_deploy":   {"no": {P: 0.2, Lo: 0.19, Hi: 0.21}, "yes": {P: 0.8, Lo: 0.79, Hi: 0.81}},
				"checkout_api": {"ok": {P: 0.1, Lo: 0.09, Hi: 0.11}, "degraded": {P: 0.4, Lo: 0.39, Hi: 0.41}, "down": {P: 0.5, Lo: 0.49, Hi: 0.51}},
			}},
	}
}

func TestStandingGauges(t *testing.T) {
	reg := prometheus.NewRegistry()
	now := time.Date(2026, 3, 1, 12, 0, 0, 0, time.UTC)
	s, err := metrics.NewStanding(reg, metrics.StandingOptions{Clock: func() time.Time { return now }})
	if err != nil {
		t.Fatal(err)
	}
	pending := &standing.View{ID: "power", Targets: []string{"site_power"}, Revision: 1, Status: standing.StatusPending}
	failed := &standing.View{ID: "broken", Targets: []string{"site_power"}, Revision: 2, Status: standing.StatusFailed}
	s.Export(func() []*standing.View { return []*standing.View{sampled(now), pending, failed} })
	s.Recomputed(standing.OutcomeKept, 3*time.Millisecond)
	s.Recomputed("odd", time.Millisecond)
	err = testutil.GatherAndCompare(reg, strings.NewReader(`
# HELP beliefd_standing_queries Standing queries registered (all tenants), as this process last read them.
# TYPE beliefd_standing_queries gauge
beliefd_standing_queries 3
# HELP beliefd_standing_posterior Latest posterior probability of a target state of a standing query, given its evidence.
# TYPE beliefd_standing_posterior gauge
beliefd_standing_posterior{standing_query="checkout-root-cause",state="no",tenant="teal",variable="bad_deploy"} 0.2
beliefd_standing_posterior{standing_query="checkout-root-cause",state="yes",tenant="teal",variable="bad_deploy"} 0.8
# HELP beliefd_standing_posterior_lower Lower end of the confidence interval of beliefd_standing_posterior (equal to it for exact results).
# TYPE beliefd_standing_posterior_lower gauge
beliefd_standing_posterior_lower{standing_query="checkout-root-cause",state="no",tenant="teal",variable="bad_deploy"} 0.19
beliefd_standing_posterior_lower{standing_query="checkout-root-cause",state="yes",tenant="teal",variable="bad_deploy"} 0.79
# HELP beliefd_standing_posterior_upper Upper end of the confidence interval of beliefd_standing_posterior (equal to it for exact results).
# TYPE beliefd_standing_posterior_upper gauge
beliefd_standing_posterior_upper{standing_query="checkout-root-cause",state="no",tenant="teal",variable="bad_deploy"} 0.21
beliefd_standing_posterior_upper{standing_query="checkout-root-cause",state="yes",tenant="teal",variable="bad_deploy"} 0.81
# HELP beliefd_standing_evidence_revision Current evidence revision of a standing query; it goes up by one with every change.
# TYPE beliefd_standing_evidence_revision gauge
beliefd_standing_evidence_revision{standing_query="broken",tenant=""} 2
beliefd_standing_evidence_revision{standing_query="checkout-root-cause",tenant="teal"} 4
beliefd_standing_evidence_revision{standing_query="power",tenant=""} 1
# HELP beliefd_standing_result_revision Evidence revision that the latest result of a standing query answers.
# TYPE beliefd_standing_result_revision gauge
beliefd_standing_result_revision{standing_query="checkout-root-cause",tenant="teal"} 3
# HELP beliefd_standing_result_age_seconds Seconds since the latest result of a standing query was computed.
# TYPE beliefd_standing_result_age_seconds gauge
beliefd_standing_result_age_seconds{standing_query="checkout-root-cause",tenant="teal"} 90
# HELP beliefd_standing_result_samples Samples behind the latest result of a standing query (0 for exact inference).
# TYPE beliefd_standing_result_samples gauge
beliefd_standing_result_samples{standing_query="checkout-root-cause",tenant="teal"} 200000
# HELP beliefd_standing_result_effective_samples Effective sample size of the latest result of a standing query (0 for exact inference).
# TYPE beliefd_standing_result_effective_samples gauge
beliefd_standing_result_effective_samples{standing_query="checkout-root-cause",tenant="teal"} 150000.5
# HELP beliefd_standing_failing 1 while the recompute of a standing query's current evidence revision has failed, else 0.
# TYPE beliefd_standing_failing gauge
beliefd_standing_failing{standing_query="broken",tenant=""} 1
beliefd_standing_failing{standing_query="checkout-root-cause",tenant="teal"} 0
beliefd_standing_failing{standing_query="power",tenant=""} 0
# HELP beliefd_standing_recomputes_total Standing-query recomputes done by this process, by outcome.
# TYPE beliefd_standing_recomputes_total counter
beliefd_standing_recomputes_total{outcome="failed"} 0
beliefd_standing_recomputes_total{outcome="kept"} 1
beliefd_standing_recomputes_total{outcome="other"} 1
beliefd_standing_recomputes_total{outcome="superseded"} 0
`), "beliefd_standing_queries", "beliefd_standing_posterior", "beliefd_standing_posterior_lower", "beliefd_standing_posterior_upper",
		"beliefd_standing_evidence_revision", "beliefd_standing_result_revision", "beliefd_standing_result_age_seconds",
		"beliefd_standing_result_samples", "beliefd_standing_result_effective_samples", "beliefd_standing_failing", "beliefd_standing_recomputes_total")
	if err != nil {
		t.Fatal(err)
	}
	problems, err := testutil.GatherAndLint(reg)
	if err != nil {
		t.Fatal(err)
	}
	for _, p := range problems {
		t.Errorf("%s: %s", p.Metric, p.Text)
	}
}

// seriesOf counts the series of a metric per standing query.
func seriesOf(t *testing.T, reg *prometheus.Registry, name string) map[string]int {
	t.Helper()
	mfs, err := reg.Gather()
	if err != nil {
		t.Fatal(err)
	}
	out := map[string]int{}
	for _, mf := range mfs {
		if mf.GetName() != name {
			continue
		}
		for _, m := range mf.GetMetric() {
			out[label(m, "standing_query")]++
		}
	}
	return out
}

func label(m *dto.Metric, name string) string {
	for _, l := range m.GetLabel() {
		if l.GetName() == name {
			return l.GetValue()
		}
	}
	return ""
}

// Through the standing service on the example model: the posterior
// series are exactly the states of the named targets (bounded by the
// service's limits), and a delete removes a standing query's series.
func TestStandingSeriesBoundedAndDeleted(t *testing.T) {
	log := slog.New(slog.DiscardHandler)
	js, err := jobs.NewService(memstore.New(memstore.Options{}), jobs.Config{Logger: log}, nil)
	if err != nil {
		t.Fatal(err)
	}
	raw, _ := examples.Raw("tarnwick-platform")
	ctx := context.Background()
	if _, _, err := js.PutModel(ctx, raw); err != nil {
		t.Fatal(err)
	}
	reg := prometheus.NewRegistry()
	sm, err := metrics.NewStanding(reg, metrics.StandingOptions{})
	if err != nil {
		t.Fatal(err)
	}
	svc, err := standing.New(standing.NewMemoryStore(), js, standing.Config{MaxQueries: 2, Logger: log, Observer: sm})
	if err != nil {
		t.Fatal(err)
	}
	sm.Export(svc.Snapshot)
	// 2 + 3 states and 3 states.
	if _, err := svc.Create(ctx, &standing.Spec{ID: "checkout", Model: "tarnwick-platform", Targets: []string{"bad_deploy", "orders_db"},
		Evidence: map[string]string{"alarm_checkout_5xx": "firing"}}); err != nil {
		t.Fatal(err)
	}
	if _, err := svc.Create(ctx, &standing.Spec{ID: "tracking", Model: "tarnwick-platform", Targets: []string{"tracking_api"}}); err != nil {
		t.Fatal(err)
	}
	if _, err := svc.Create(ctx, &standing.Spec{ID: "third", Model: "tarnwick-platform", Targets: []string{"bad_deploy"}}); err == nil {
		t.Fatal("a third standing query was accepted with a limit of 2")
	}
	if got := seriesOf(t, reg, "beliefd_standing_posterior"); len(got) != 0 {
		t.Fatalf("posterior series before any result: %v", got)
	}
	if _, err := svc.Step(ctx); err != nil {
		t.Fatal(err)
	}
	for _, name := range []string{"beliefd_standing_posterior", "beliefd_standing_posterior_lower", "beliefd_standing_posterior_upper"} {
		if got := seriesOf(t, reg, name); len(got) != 2 || got["checkout"] != 5 || got["tracking"] != 3 {
			t.Fatalf("%s series per standing query %v, want checkout 5, tracking 3", name, got)
		}
	}
	if err := testutil.GatherAndCompare(reg, strings.NewReader(`
# HELP beliefd_standing_queries Standing queries registered (all tenants), as this process last read them.
# TYPE beliefd_standing_queries gauge
beliefd_standing_queries 2
`), "beliefd_standing_queries"); err != nil {
		t.Fatal(err)
	}
	if err := svc.Delete(ctx, "checkout"); err != nil {
		t.Fatal(err)
	}
	for _, name := range []string{"beliefd_standing_posterior", "beliefd_standing_evidence_revision", "beliefd_standing_result_age_seconds", "beliefd_standing_failing"} {
		if got := seriesOf(t, reg, name); got["checkout"] != 0 || got["tracking"] == 0 {
			t.Fatalf("after deleting checkout, %s series %v", name, got)
		}
	}
}
